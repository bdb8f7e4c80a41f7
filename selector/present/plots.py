"""Diagnostic pictures of a selection: colour diagrams, zero-motion statistics, sky map, scores, cut-flow.

Every function takes a :class:`PlotData` (built from a feature cache and an evaluation, see
:mod:`selector.tune`) and returns a :class:`matplotlib.figure.Figure` drawn with the Agg canvas, so
no global pyplot state or display is needed. :func:`figure_png` renders a figure to PNG bytes
without the software and date tags, so the same data give the same bytes.

The colour-criterion boundaries are drawn from each criterion's own object in the registry
:data:`selector.core.photometry.CRITERIA` (its boundary curves in the diagram's plane and its style),
with no per-criterion code here, so a picture always shows the criterion the selection applies.
Background populations are drawn as 2-D histograms, which keeps the cost independent of the
number of cached rows; candidates are drawn as points.
"""

from __future__ import annotations

import io
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, NamedTuple

import numpy as np

from selector.core import photometry as ph
from selector.core.frames import galactic_matrix, xyz_to_radec
from selector.core.schema import infrared_mag_column, optical_mag_column
from selector.store.io import atomic_path

__all__ = ["COLOUR_COLOUR", "COLOUR_MAGNITUDE", "PLOTS", "Plot", "PlotData", "colour_colour", "colour_magnitude",
           "completeness_magnitude", "cutflow_funnel", "draw_png", "figure_png", "luminosity_redshift",
           "magnitude_distributions",
           "match_separations", "motion_statistics", "new_figure", "parallax_error", "proper_motion_plane", "render_plots",
           "score_distribution", "sky_map", "write_plots"]

#: Largest number of candidates drawn as points (an even stride of the rest is drawn beyond that).
MAX_POINTS = 50_000
_DPI = 100
#: Width of a full-width figure (inches at :data:`_DPI`): 1000 px, legible on a screen and in a
#: proposal's page without scaling down.
_WIDTH_IN = 10.0
#: Font sizes of every picture (points): legends and ticks readable at the figure's own size.
_RC = {"font.size": 12, "axes.titlesize": 13, "axes.labelsize": 12, "legend.fontsize": 10,
       "xtick.labelsize": 10, "ytick.labelsize": 10, "figure.titlesize": 14}
_LEGEND = 10
_CANDIDATE = "#c0392b"
_MOTION = "#2471a3"
#: Infrared bands the pictures read.
_BANDS = ("3.4", "4.6", "12")
#: The two diagrams: [3.4]−[4.6] against [4.6]−[12], and against [4.6].
COLOUR_COLOUR = ph.Plane(y=("3.4", "4.6"), x=("4.6", "12"))
COLOUR_MAGNITUDE = ph.Plane(y=("3.4", "4.6"), x=("4.6",))


@dataclass
class PlotData:
    """What the pictures show, as plain arrays over the matched (usable) sources.

    Attributes
    ----------
    cfg : selector.config.Config
        The selection shown (criteria, thresholds, tiling order).
    mags_vega : dict
        Infrared Vega magnitudes keyed by band label ``3.4``, ``4.6``, ``12`` (NaN where missing).
    candidate : numpy.ndarray of bool
        Selected sources.
    zero_motion : numpy.ndarray of bool or None
        Sources that pass the zero-motion stages (before the colour cuts).
    parallax_snr, pm_chi2, score : numpy.ndarray
        Parallax significance, proper-motion χ² (2 degrees of freedom) and the criteria score.
    p_quasar : numpy.ndarray or None
        Classifier probability (NaN where unknown).
    ra_deg, dec_deg : numpy.ndarray
        ICRS positions.
    cutflow : list of (stage, count)
        Rows left after each stage.
    sep_arcsec : numpy.ndarray or None
        Distance to the matched infrared counterpart.
    parallax_mas, parallax_error_mas, pmra_mas_yr, pmdec_mas_yr : numpy.ndarray or None
        The astrometric solution (NaN where the source has none).
    opt_mags_ab : dict
        Optical AB magnitudes keyed by band label.
    truth_quasar : numpy.ndarray of bool or None
        Rows that truth labels call quasars (None when no truth is given).
    """

    cfg: object
    mags_vega: dict
    candidate: np.ndarray
    zero_motion: np.ndarray | None
    parallax_snr: np.ndarray
    pm_chi2: np.ndarray
    score: np.ndarray
    ra_deg: np.ndarray
    dec_deg: np.ndarray
    cutflow: list
    p_quasar: np.ndarray | None = None
    notes: list = field(default_factory=list)
    sep_arcsec: np.ndarray | None = None
    parallax_mas: np.ndarray | None = None
    parallax_error_mas: np.ndarray | None = None
    pmra_mas_yr: np.ndarray | None = None
    pmdec_mas_yr: np.ndarray | None = None
    opt_mags_ab: dict = field(default_factory=dict)
    truth_quasar: np.ndarray | None = None

    @classmethod
    def from_evaluation(cls, cache, ev, candidate=None, p_quasar=None, cutflow=None, *,
                        truth_quasar=None) -> "PlotData":
        """Build from a :class:`~selector.store.cache.FeatureCache` and a :class:`~selector.jobs.tune.Evaluation`.

        ``candidate``, ``p_quasar`` and ``cutflow`` override what the evaluation says (the report
        takes them from the run's recorded outputs); ``truth_quasar`` marks the cache rows that
        truth labels call quasars.
        """
        t = cache.table

        def col(name):
            if name not in t.column_names:
                return np.full(t.num_rows, np.nan)
            return t.column(name).to_numpy(zero_copy_only=False).astype(float, copy=False)

        d = ev.selection.derived
        motion = None
        for name in ("joint_motion", "proper_motion", "parallax"):
            try:
                motion = ev.stage_mask(name)
                break
            except KeyError:
                continue
        if p_quasar is None and "p_quasar" in d:
            p_quasar = np.asarray(d["p_quasar"], float)
        return cls(ev.cfg, {b: col(infrared_mag_column(b)) for b in _BANDS},
                   ev.passed if candidate is None else np.asarray(candidate, bool), motion,
                   np.asarray(d["parallax_snr"]), np.asarray(d["pm_chi2"]), np.asarray(d["criteria_score"]),
                   col("ra_deg"), col("dec_deg"), ev.cutflow if cutflow is None else list(cutflow), p_quasar,
                   sep_arcsec=col("sep_arcsec"), parallax_mas=col("parallax_mas"),
                   parallax_error_mas=col("parallax_error_mas"), pmra_mas_yr=col("pmra_mas_yr"),
                   pmdec_mas_yr=col("pmdec_mas_yr"),
                   opt_mags_ab={b: col(optical_mag_column(b)) for b in ev.cfg.optical_bands()},
                   truth_quasar=None if truth_quasar is None else np.asarray(truth_quasar, bool))


# --- rendering ------------------------------------------------------------------------------------

def _figure(width_in: float = _WIDTH_IN, height_in: float = 6.0, **subplots):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_in, height_in), dpi=_DPI, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def new_figure(width_in: float = _WIDTH_IN, height_in: float = 6.0):
    """An empty Agg figure of the pictures' size, for pictures drawn outside this module (the report's)."""
    return _figure(width_in, height_in)


def figure_png(fig) -> bytes:
    """PNG bytes of a figure, without software or time tags (identical data give identical bytes)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=_DPI, metadata={"Software": None})
    return buf.getvalue()


def _points(mask: np.ndarray) -> tuple[np.ndarray, str]:
    idx = np.flatnonzero(mask)
    if len(idx) <= MAX_POINTS:
        return idx, ""
    step = math.ceil(len(idx) / MAX_POINTS)
    return idx[::step], f" (every {step}th shown)"


def _limits(values: np.ndarray, default: tuple[float, float], pad: float = 0.05) -> tuple[float, float]:
    finite = values[np.isfinite(values)]
    lo, hi = default
    if len(finite):
        a, b = np.percentile(finite, [0.5, 99.5])
        lo, hi = min(lo, a), max(hi, b)
    span = hi - lo
    return lo - pad * span, hi + pad * span


def _density(ax, x, y, xlim, ylim, *, bins=120, label="matched sources"):
    from matplotlib.colors import LogNorm

    ok = np.isfinite(x) & np.isfinite(y)
    h, xe, ye = np.histogram2d(x[ok], y[ok], bins=bins, range=[xlim, ylim])
    if h.max() > 0:
        ax.pcolormesh(xe, ye, np.ma.masked_equal(h.T, 0), cmap="Greys", norm=LogNorm(vmin=1, vmax=max(h.max(), 2)),
                      shading="flat", rasterized=True)
    # a proxy entry, since a mesh has no legend handle
    ax.plot([], [], "s", color="0.5", ms=6, label=f"{label} ({int(ok.sum()):,d})")


def _candidates(ax, x, y, candidate, label="candidates"):
    idx, note = _points(candidate & np.isfinite(x) & np.isfinite(y))
    ax.scatter(x[idx], y[idx], s=9, c=_CANDIDATE, edgecolors="none", alpha=0.8, zorder=5,
               label=f"{label} ({int(candidate.sum()):,d}){note}")


def _linear_cuts(ax, cfg, plane: ph.Plane, xlim):
    for cut in cfg.colours.linear_cuts:
        if tuple(cut.y) == plane.y and tuple(cut.x) == plane.x:
            xs = np.array(xlim)
            ax.plot(xs, cut.slope * xs + cut.intercept, color="#884ea0", lw=1.5, ls=(0, (5, 2)),
                    label=f"linear cut '{cut.name}' (keep {cut.side})")


def _axis(mags: dict, bands: tuple) -> np.ndarray:
    """A magnitude (one band) or a colour (two) of a plane's axis."""
    return mags[bands[0]] if len(bands) == 1 else mags[bands[0]] - mags[bands[1]]


def _criteria(ax, cfg, plane: ph.Plane, xlim, ylim) -> list[str]:
    """Draw the boundary of every configured criterion in ``plane``; the names that have none there."""
    skipped = []
    for name in cfg.colours.criteria:
        criterion = ph.CRITERIA[name]
        curves = criterion.curves(plane, xlim, ylim)
        for c in curves:
            ax.plot(c.x, c.y, lw=1.6, color=criterion.style.color, ls=criterion.style.ls, label=c.label)
        if not curves:
            skipped.append(name)
    return skipped


def colour_colour(data: PlotData):
    """[3.4]−[4.6] against [4.6]−[12] (Vega) with the selected criteria's boundaries.

    The Mateos et al. 2012 wedge (MNRAS 426, 3271) is defined in flux-density ratios; its criterion
    maps it into Vega colours with the Vega-to-AB offsets of
    :data:`selector.core.photometry.VEGA_TO_AB_MAG`, where it stays a wedge of straight lines.
    """
    x = _axis(data.mags_vega, COLOUR_COLOUR.x)
    y = _axis(data.mags_vega, COLOUR_COLOUR.y)
    fig = _figure()
    ax = fig.add_subplot()
    xlim = _limits(x, (-0.5, 6.5))
    ylim = _limits(y, (-0.5, 2.5))
    if not np.isfinite(x).any():
        ax.text(0.5, 0.5, "no 12 µm magnitudes in this run", ha="center", va="center", transform=ax.transAxes)
    else:
        _density(ax, x, y, xlim, ylim)
        _candidates(ax, x, y, data.candidate)
    _criteria(ax, data.cfg, COLOUR_COLOUR, xlim, ylim)
    _linear_cuts(ax, data.cfg, COLOUR_COLOUR, xlim)
    ax.set_xlim(xlim)
    ax.set_ylim(ylim)
    ax.set_xlabel("[4.6] − [12] (Vega mag)")
    ax.set_ylabel("[3.4] − [4.6] (Vega mag)")
    ax.set_title("infrared colour–colour diagram")
    ax.legend(loc="upper left", fontsize=_LEGEND, framealpha=0.85)
    return fig


def colour_magnitude(data: PlotData):
    """[3.4]−[4.6] against [4.6] (Vega) with the selected criteria's boundaries."""
    x = _axis(data.mags_vega, COLOUR_MAGNITUDE.x)
    y = _axis(data.mags_vega, COLOUR_MAGNITUDE.y)
    fig = _figure()
    ax = fig.add_subplot()
    xlim = _limits(x, (8.0, 17.5))
    ylim = _limits(y, (-0.5, 2.5))
    _density(ax, x, y, xlim, ylim)
    _candidates(ax, x, y, data.candidate)
    skipped = _criteria(ax, data.cfg, COLOUR_MAGNITUDE, xlim, ylim)
    _linear_cuts(ax, data.cfg, COLOUR_MAGNITUDE, xlim)
    ax.set_xlim(xlim)
    ax.set_ylim(ylim)
    ax.set_xlabel("[4.6] (Vega mag)")
    ax.set_ylabel("[3.4] − [4.6] (Vega mag)")
    title = "infrared colour–magnitude diagram"
    if skipped:
        title += f"\n(not drawn here, see colour–colour: {', '.join(skipped)})"
    ax.set_title(title)
    ax.legend(loc="upper left", fontsize=_LEGEND, framealpha=0.85)
    return fig


def motion_statistics(data: PlotData):
    """Distributions of the parallax significance and the proper-motion χ², thresholds marked.

    The proper-motion cut keeps p = exp(−χ²/2) ≥ p_min (χ² with two degrees of freedom), that is
    χ² ≤ −2 ln p_min, which is the line drawn.
    """
    mo = data.cfg.motion
    fig = _figure(_WIDTH_IN, 4.8)
    ax1, ax2 = fig.subplots(1, 2)
    snr = data.parallax_snr
    ok = np.isfinite(snr)
    span = max(10.0, 1.5 * mo.parallax_snr_max)
    bins = np.linspace(-span, span, 121)
    clipped = np.clip(snr, -span, span)
    ax1.hist(clipped[ok], bins=bins, color="0.6", label=f"matched ({int(ok.sum()):,d})")
    ax1.hist(clipped[ok & data.candidate], bins=bins, histtype="step", color=_CANDIDATE, lw=1.5,
             label=f"candidates ({int((ok & data.candidate).sum()):,d})")
    # the parallax cut is one-sided (separate test); below zero only the quality cut applies
    low = getattr(data.cfg, "quality", None)
    low = -span if low is None or low.negative_parallax_snr_max is None else -low.negative_parallax_snr_max
    for s in (low, mo.parallax_snr_max):
        ax1.axvline(s, color="k", ls="--", lw=1.2)
    ax1.axvspan(low, mo.parallax_snr_max, color=_MOTION, alpha=0.08,
                label=f"kept: {low:g} ≤ (ϖ − ϖ₀)/σ ≤ {mo.parallax_snr_max:g}"
                      + (" (separate test)" if mo.test == "joint" else ""))
    ax1.set_yscale("log")
    ax1.set_xlabel(f"parallax significance (ϖ − ϖ₀)/σ  (clipped to ±{span:g})")
    ax1.set_ylabel("sources per bin")
    ax1.legend(fontsize=_LEGEND)

    chi2 = data.pm_chi2
    ok2 = np.isfinite(chi2)
    lo, hi = 1e-3, 1e6
    lbins = np.logspace(np.log10(lo), np.log10(hi), 121)
    c = np.clip(chi2, lo, hi)
    ax2.hist(c[ok2], bins=lbins, color="0.6", label=f"matched ({int(ok2.sum()):,d})")
    ax2.hist(c[ok2 & data.candidate], bins=lbins, histtype="step", color=_CANDIDATE, lw=1.5,
             label=f"candidates ({int((ok2 & data.candidate).sum()):,d})")
    if mo.pm_pvalue_min > 0:
        limit = -2.0 * math.log(mo.pm_pvalue_min)
        ax2.axvline(limit, color="k", ls="--", lw=1.2)
        ax2.axvspan(lo, limit, color=_MOTION, alpha=0.08, label=f"kept: χ² ≤ {limit:.3g} (p ≥ {mo.pm_pvalue_min:g})")
    ax2.set_xscale("log")
    ax2.set_yscale("log")
    ax2.set_xlabel("proper-motion χ² (2 d.o.f.)")
    ax2.legend(fontsize=_LEGEND)
    missing = int((~ok).sum())
    fig.suptitle("zero-motion test" + (f" ({missing:,d} sources without a solution not shown)" if missing else ""),
                 )
    return fig


def sky_map(data: PlotData, order: int | None = None):
    """Candidate surface density on HEALPix pixels, Mollweide projection in ICRS (RA grows to the left).

    Pixels (nested, at the tiling order unless ``order`` is given) that hold matched sources but no
    candidate are drawn at zero, pixels without data are left blank, so the footprint shows.
    """
    import healpy as hp
    from matplotlib.colors import Normalize

    order = data.cfg.tiling.order if order is None else int(order)
    nside = 1 << order
    npix = 12 * nside * nside
    area_deg2 = 4.0 * 180.0**2 / np.pi / npix
    ok = np.isfinite(data.ra_deg) & np.isfinite(data.dec_deg)
    pix = hp.ang2pix(nside, data.ra_deg[ok], data.dec_deg[ok], nest=True, lonlat=True)
    footprint = np.bincount(pix, minlength=npix) > 0
    density = np.bincount(pix[data.candidate[ok]], minlength=npix) / area_deg2
    values = np.where(footprint, density, np.nan)

    # sample the map on a grid of the projection's longitude and latitude
    n_lon, n_lat = 720, 360
    lon_e = np.linspace(-np.pi, np.pi, n_lon + 1)
    lat_e = np.linspace(-np.pi / 2, np.pi / 2, n_lat + 1)
    lon_c = 0.5 * (lon_e[1:] + lon_e[:-1])
    lat_c = 0.5 * (lat_e[1:] + lat_e[:-1])
    ra_c = np.mod(-np.degrees(lon_c), 360.0)  # plot longitude −RA: east to the left, as on the sky
    grid_ra, grid_dec = np.meshgrid(ra_c, np.degrees(lat_c))
    img = values[hp.ang2pix(nside, grid_ra, grid_dec, nest=True, lonlat=True)]

    fig = _figure(_WIDTH_IN, 6.2)
    ax = fig.add_subplot(projection="mollweide")
    ax.set_facecolor("white")
    finite = img[np.isfinite(img)]
    vmax = float(finite.max()) if finite.size and finite.max() > 0 else 1.0
    mesh = ax.pcolormesh(lon_e, lat_e, np.ma.masked_invalid(img), cmap="viridis",
                         norm=Normalize(vmin=0.0, vmax=vmax), shading="flat", rasterized=True)
    ticks = np.radians(np.arange(-150, 151, 30))
    ax.set_xticks(ticks)
    ax.set_xticklabels([f"{round(float(np.mod(-np.degrees(t), 360.0))) % 360:d}°" for t in ticks], fontsize=_LEGEND)
    ax.tick_params(axis="y", labelsize=_LEGEND)
    ax.grid(True, color="0.6", lw=0.5)
    ax.set_xlabel("right ascension (ICRS)")
    ax.set_ylabel("declination (ICRS)")
    labelled = set()
    for b_deg, style, label in ((0.0, "-", "Galactic plane (b = 0°)"), (-10.0, ":", "b = ±10°"), (10.0, ":", "b = ±10°")):
        for lon, lat in _galactic_latitude_line(b_deg):
            ax.plot(lon, lat, color="#d35400", lw=1.6 if b_deg == 0 else 1.1, ls=style,
                    label=None if label in labelled else label)
            labelled.add(label)
    ax.legend(loc="lower right", bbox_to_anchor=(1.0, -0.02), fontsize=_LEGEND, framealpha=0.85)
    fig.colorbar(mesh, ax=ax, orientation="horizontal", shrink=0.6, pad=0.06,
                 label=f"candidates per deg² (HEALPix order {order}, {area_deg2:.3g} deg² pixels)")
    ax.set_title(f"candidate density, ICRS; {int(data.candidate.sum()):,d} candidates, "
                 f"{int(footprint.sum()):,d} pixels with matched sources", pad=18)
    return fig


def _galactic_latitude_line(b_deg: float, n: int = 721) -> list[tuple[np.ndarray, np.ndarray]]:
    """A line of constant Galactic latitude in the sky map's coordinates (longitude −RA, radians), cut
    where it wraps around the map's edge so no segment crosses the whole picture.

    The Galactic-to-ICRS rotation is the transpose of :func:`selector.core.frames.galactic_matrix`.
    """
    l_rad = np.linspace(0.0, 2.0 * np.pi, n)
    b_rad = math.radians(b_deg)
    gal = np.stack([np.cos(b_rad) * np.cos(l_rad), np.cos(b_rad) * np.sin(l_rad), np.full(n, np.sin(b_rad))], axis=1)
    ra, dec = xyz_to_radec(gal @ galactic_matrix())
    lon = -np.radians(np.where(ra > 180.0, ra - 360.0, ra))
    lat = np.radians(dec)
    cuts = np.flatnonzero(np.abs(np.diff(lon)) > np.pi) + 1
    return [(a, b) for a, b in zip(np.split(lon, cuts), np.split(lat, cuts)) if len(a) > 1]


def score_distribution(data: PlotData):
    """The ranking score of zero-motion sources and candidates; the classifier's, if any."""
    has_p = data.p_quasar is not None and np.isfinite(data.p_quasar).any()
    fig = _figure(_WIDTH_IN, 4.8)
    axes = fig.subplots(1, 2 if has_p else 1)
    ax = axes[0] if has_p else axes
    s = data.score
    pool = data.zero_motion if data.zero_motion is not None else np.ones(len(s), bool)
    ok = np.isfinite(s)
    if (ok & pool).any():
        lo, hi = np.percentile(s[ok & pool], [0.1, 99.9])
        if data.candidate.any():
            lo, hi = min(lo, s[data.candidate].min()), max(hi, s[data.candidate].max())
        bins = np.linspace(lo, hi if hi > lo else lo + 1.0, 81)
        ax.hist(s[ok & pool], bins=bins, color="0.6", label=f"zero-motion sources ({int((ok & pool).sum()):,d})")
        ax.hist(s[ok & data.candidate], bins=bins, histtype="step", color=_CANDIDATE, lw=1.5,
                label=f"candidates ({int(data.candidate.sum()):,d})")
        ax.axvline(0.0, color="k", lw=0.8, ls=":")
    r = data.cfg.ranking
    ax.set_yscale("log")
    ax.set_xlabel(f"criteria score: colour excess + {r.brightness_weight:g}·({r.brightness_pivot_mag:g} − "
                  f"[{r.brightness_band}]) (mag)")
    ax.set_ylabel("sources per bin")
    ax.legend(fontsize=_LEGEND)
    if has_p:
        ax2 = axes[1]
        p = data.p_quasar
        bins = np.linspace(0.0, 1.0, 51)
        okp = np.isfinite(p)
        ax2.hist(p[okp & pool], bins=bins, color="0.6", label=f"scored zero-motion sources ({int((okp & pool).sum()):,d})")
        ax2.hist(p[okp & data.candidate], bins=bins, histtype="step", color=_CANDIDATE, lw=1.5, label="candidates")
        ax2.axvline(data.cfg.classifier.threshold, color="k", ls="--", lw=1.2,
                    label=f"threshold {data.cfg.classifier.threshold:g}")
        ax2.set_yscale("log")
        ax2.set_xlabel("classifier P(quasar)")
        ax2.legend(fontsize=_LEGEND)
    fig.suptitle("score distribution")
    return fig


def cutflow_funnel(cutflow: list):
    """The cut-flow as a funnel: one centred bar per stage, width ∝ log10(1 + rows left)."""
    names = [n for n, _ in cutflow]
    counts = np.array([c for _, c in cutflow], float)
    width = np.log10(1.0 + counts)
    top = width.max() if len(width) and width.max() > 0 else 1.0
    fig = _figure(_WIDTH_IN, 0.5 * len(names) + 1.4)
    ax = fig.add_subplot()
    y = np.arange(len(names))[::-1]
    colours = [_CANDIDATE if i == len(names) - 1 else _MOTION for i in range(len(names))]
    ax.barh(y, width, left=-width / 2, color=colours, alpha=0.85, height=0.8)
    first = counts[0] if len(counts) and counts[0] > 0 else 1.0
    for yi, n, c in zip(y, names, counts):
        ax.text(top / 2 + 0.03 * top, yi, f"{int(c):,d}  ({c / first:.2%})", va="center")
    ax.set_yticks(y)
    ax.set_yticklabels(names)
    ax.set_xlim(-top / 2 - 0.02 * top, top * 1.05)
    ax.set_xticks([])
    for side in ("top", "right", "bottom"):
        ax.spines[side].set_visible(False)
    ax.set_title("cut-flow (bar width ∝ log₁₀ of rows left)")
    return fig


def _no_data(ax, text: str) -> None:
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes)


def match_separations(data: PlotData):
    """Distance to the matched infrared counterpart, with the match radius and the chance-match level.

    Chance coincidences with an unrelated source of uniform surface density grow in number in
    proportion to the separation r (the area of an annulus is 2πr dr), while true counterparts
    pile up near zero with a width set by the positional errors; the line ∝ r is scaled to the
    outer quarter of the radius, where chance matches dominate (common practice).
    """
    if data.sep_arcsec is None or not np.isfinite(data.sep_arcsec).any():
        return None
    radius = float(data.cfg.match.radius_arcsec)
    sep = data.sep_arcsec
    ok = np.isfinite(sep)
    bins = np.linspace(0.0, radius, 41)
    centres = 0.5 * (bins[1:] + bins[:-1])
    fig = _figure(_WIDTH_IN, 5.0)
    ax = fig.add_subplot()
    counts, _, _ = ax.hist(sep[ok], bins=bins, color="0.6", label=f"matched sources ({int(ok.sum()):,d})")
    ax.hist(sep[ok & data.candidate], bins=bins, histtype="step", color=_CANDIDATE, lw=1.8,
            label=f"candidates ({int((ok & data.candidate).sum()):,d})")
    outer = centres >= 0.75 * radius
    if counts[outer].sum() > 0:
        scale = counts[outer].sum() / centres[outer].sum()
        ax.plot(centres, scale * centres, color="#884ea0", lw=1.6, ls="--",
                label="chance-match level (∝ r, scaled to the outer quarter)")
    ax.axvline(radius, color="k", ls="--", lw=1.2, label=f"match radius {radius:g}″")
    ax.set_xlabel("separation from the infrared counterpart (arcsec, at the infrared epoch)")
    ax.set_ylabel("sources per bin")
    ax.set_xlim(0.0, radius * 1.03)
    ax.legend(fontsize=_LEGEND)
    return fig


def magnitude_distributions(data: PlotData):
    """Magnitude histograms of matched sources and candidates: each optical band (AB) and [3.4], [4.6] (Vega)."""
    panels = [(f"{b} (AB mag)", v) for b, v in data.opt_mags_ab.items()]
    panels += [(f"[{b}] (Vega mag)", data.mags_vega[b]) for b in ("3.4", "4.6")]
    panels = [(label, v) for label, v in panels if np.isfinite(v).any()]
    if not panels:
        return None
    ncols = min(3, len(panels))
    nrows = math.ceil(len(panels) / ncols)
    fig = _figure(_WIDTH_IN, 3.8 * nrows + 0.4)
    axes = np.atleast_1d(fig.subplots(nrows, ncols)).ravel()
    for ax in axes[len(panels):]:
        ax.set_visible(False)
    for ax, (label, v) in zip(axes, panels):
        ok = np.isfinite(v)
        lo, hi = np.percentile(v[ok], [0.2, 99.8])
        bins = np.linspace(lo, hi if hi > lo else lo + 1.0, 41)
        ax.hist(np.clip(v[ok], lo, hi), bins=bins, color="0.6", label=f"matched ({int(ok.sum()):,d})")
        ax.hist(np.clip(v[ok & data.candidate], lo, hi), bins=bins, histtype="step", color=_CANDIDATE, lw=1.8,
                label=f"candidates ({int((ok & data.candidate).sum()):,d})")
        ax.set_yscale("log")
        ax.set_xlabel(label)
    for ax in axes[::ncols]:
        ax.set_ylabel("sources per bin")
    axes[0].legend(fontsize=_LEGEND)
    return fig


def completeness_magnitude(data: PlotData):
    """Fraction of truth-labelled quasars selected, per optical magnitude bin, with binomial errors.

    Completeness is :func:`selector.core.metrics.completeness_purity`'s ratio computed per bin over
    the quasars that have an infrared counterpart (the rows of the feature cache); the error bar is
    the binomial standard error √(c(1 − c)/n) (common practice).
    """
    if data.truth_quasar is None or not data.truth_quasar.any() or not data.opt_mags_ab:
        return None
    band, mag = next(iter(data.opt_mags_ab.items()))
    q = data.truth_quasar & np.isfinite(mag)
    if not q.any():
        return None
    lo, hi = np.floor(np.percentile(mag[q], 1)), np.ceil(np.percentile(mag[q], 99))
    edges = np.arange(lo, hi + 0.5, 0.5)
    if len(edges) < 3:
        edges = np.array([lo, lo + 0.5, lo + 1.0])
    which = np.clip(np.digitize(mag[q], edges) - 1, 0, len(edges) - 2)
    n = np.bincount(which, minlength=len(edges) - 1)
    k = np.bincount(which, weights=data.candidate[q].astype(float), minlength=len(edges) - 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        c = k / n
        err = np.sqrt(c * (1.0 - c) / n)
    centres = 0.5 * (edges[1:] + edges[:-1])
    fig = _figure(_WIDTH_IN, 4.8)
    ax = fig.add_subplot()
    ax.errorbar(centres, c, yerr=err, fmt="o-", color=_CANDIDATE, capsize=3,
                label=f"selected / true quasars with a counterpart ({int(data.candidate[q].sum()):,d} / {int(q.sum()):,d})")
    ax2 = ax.twinx()
    ax2.bar(centres, n, width=0.45, color="0.85", zorder=0)
    ax2.set_ylabel("true quasars per bin", color="0.45")
    ax.set_zorder(ax2.get_zorder() + 1)
    ax.patch.set_visible(False)
    ax.set_ylim(0.0, 1.05)
    ax.set_xlabel(f"optical {band} magnitude (AB)")
    ax.set_ylabel("completeness")
    ax.legend(loc="lower left", fontsize=_LEGEND)
    return fig


def proper_motion_plane(data: PlotData):
    """Proper motions of matched sources (density) and candidates (points), on a symmetric log scale.

    Quasars sit at zero within their errors; stars spread out along the Galactic rotation and
    the solar reflex motion. The axes are linear within ±1 mas/yr and logarithmic beyond.
    """
    a, d = data.pmra_mas_yr, data.pmdec_mas_yr
    if a is None or d is None or not (np.isfinite(a) & np.isfinite(d)).any():
        return None
    fig = _figure(_WIDTH_IN, 6.0)
    ax1, ax2 = fig.subplots(1, 2)
    ok = np.isfinite(a) & np.isfinite(d)
    # left: the full range on a symmetric log scale; right: the inner ±5 mas/yr, linear
    lim = float(np.percentile(np.abs(np.concatenate([a[ok], d[ok]])), 99.5)) if ok.any() else 10.0
    lim = max(lim, 10.0)
    tr = np.arcsinh
    _density(ax1, tr(a), tr(d), (-tr(lim), tr(lim)), (-tr(lim), tr(lim)), bins=100)
    _candidates(ax1, tr(a), tr(d), data.candidate)
    ticks = np.array([-100, -10, -1, 0, 1, 10, 100], float)
    ticks = ticks[np.abs(ticks) <= lim]
    for ax in (ax1,):
        ax.set_xticks(tr(ticks))
        ax.set_xticklabels([f"{v:g}" for v in ticks])
        ax.set_yticks(tr(ticks))
        ax.set_yticklabels([f"{v:g}" for v in ticks])
        ax.set_xlim(-tr(lim), tr(lim))
        ax.set_ylim(-tr(lim), tr(lim))
    ax1.set_xlabel("μ_α* (mas/yr, arcsinh scale)")
    ax1.set_ylabel("μ_δ (mas/yr, arcsinh scale)")
    ax1.legend(loc="upper left", fontsize=_LEGEND, framealpha=0.85)
    inner = (-5.0, 5.0)
    _density(ax2, a, d, inner, inner, bins=100)
    _candidates(ax2, a, d, data.candidate)
    ax2.axhline(0.0, color="k", lw=0.6)
    ax2.axvline(0.0, color="k", lw=0.6)
    ax2.set_xlim(inner)
    ax2.set_ylim(inner)
    ax2.set_aspect("equal")
    ax2.set_xlabel("μ_α* (mas/yr)")
    ax2.set_ylabel("μ_δ (mas/yr)")
    return fig


def parallax_error(data: PlotData):
    """Parallax against its uncertainty, with the parallax limits of the selection.

    The separate parallax test keeps (ϖ − ϖ₀)/(k·σ) ≤ s (s = ``motion.parallax_snr_max``, k =
    ``motion.error_inflation``; :func:`selector.core.astrometry.zero_motion`), the quality cut
    refuses (ϖ − ϖ₀)/(k·σ) < −``quality.negative_parallax_snr_max``; both lines are drawn. With the
    joint test (``motion.test = "joint"``) the parallax and the proper motion are judged together,
    so the upper line is a guide, not the cut.
    """
    p, s = data.parallax_mas, data.parallax_error_mas
    if p is None or s is None or not (np.isfinite(p) & np.isfinite(s)).any():
        return None
    mo = data.cfg.motion
    fig = _figure(_WIDTH_IN, 5.6)
    ax = fig.add_subplot()
    ok = np.isfinite(p) & np.isfinite(s) & (s > 0)
    ls = np.log10(np.where(ok, s, np.nan))
    xlim = _limits(ls, (-2.0, 0.5))
    ylim = _limits(p, (-2.0, 2.0), pad=0.02)
    ylim = (max(ylim[0], -10.0), min(ylim[1], 10.0))
    _density(ax, ls, p, xlim, ylim)
    _candidates(ax, ls, p, data.candidate)
    xs = np.linspace(*xlim, 100)
    zp = mo.parallax_zero_point_mas
    # as in the zero-motion picture: the parallax cut above zero, the quality cut below it
    quality = getattr(data.cfg, "quality", None)
    low = None if quality is None else quality.negative_parallax_snr_max
    ax.plot(xs, zp + mo.parallax_snr_max * mo.error_inflation * 10.0 ** xs, color="k", ls="--", lw=1.2,
            label=f"ϖ₀ + {mo.parallax_snr_max:g}·σ" + (" (separate test; the joint test decides)"
                                                      if mo.test == "joint" else ""))
    if low is not None:
        ax.plot(xs, zp - low * mo.error_inflation * 10.0 ** xs, color="k", ls=":", lw=1.2,
                label=f"ϖ₀ − {low:g}·σ (negative-parallax quality cut)")
    ax.axhline(zp, color="k", lw=0.6)
    ax.set_xlim(xlim)
    ax.set_ylim(ylim)
    ax.set_xlabel("log₁₀ parallax uncertainty σ (mas)")
    ax.set_ylabel("parallax ϖ (mas)")
    ax.legend(loc="upper left", fontsize=_LEGEND, framealpha=0.85)
    return fig


class Plot(NamedTuple):
    """One picture of :data:`PLOTS`: its name (the PNG's stem and the page's anchor), the function
    that draws it from a :class:`PlotData` (returning None when the data it needs are absent), and
    the caption under it, which says what to look for."""

    name: str
    draw: Callable
    caption: str


def luminosity_redshift(candidates: dict, labelled: dict | None = None):
    """Candidates in the luminosity–redshift plane, with the labelled quasars for reference.

    Parameters
    ----------
    candidates : dict
        Arrays ``redshift``, ``redshift_low``, ``redshift_high``, ``lbol_erg_s``, ``z_source``
        (``spec``/``photo``) and ``beyond`` (bool), one value per candidate.
    labelled : dict, optional
        Arrays ``redshift`` and ``lbol_erg_s`` of the labelled quasars (spectroscopic redshifts).

    Returns
    -------
    matplotlib.figure.Figure
        log10 L_bol against redshift: labelled quasars as a grey 2-D histogram, candidates with a
        photometric redshift as points with their 68 % redshift interval, spectroscopic ones as
        filled points, those more luminous than every labelled quasar ringed.
    """
    fig = _figure(_WIDTH_IN, 6.0)
    ax = fig.add_subplot()
    z = np.asarray(candidates["redshift"], float)
    with np.errstate(divide="ignore", invalid="ignore"):
        logl = np.log10(np.asarray(candidates["lbol_erg_s"], float))
    ok = np.isfinite(z) & np.isfinite(logl)
    if labelled is not None:
        with np.errstate(divide="ignore", invalid="ignore"):
            lz, ll = np.asarray(labelled["redshift"], float), np.log10(np.asarray(labelled["lbol_erg_s"], float))
        lok = np.isfinite(lz) & np.isfinite(ll)
        if lok.any():
            zmax = max(float(lz[lok].max()), float(z[ok].max()) if ok.any() else 0.0, 0.5)
            lo = min(float(ll[lok].min()), float(logl[ok].min()) if ok.any() else np.inf) - 0.2
            hi = max(float(ll[lok].max()), float(logl[ok].max()) if ok.any() else -np.inf) + 0.2
            ax.hist2d(lz[lok], ll[lok], bins=(np.linspace(0, zmax * 1.05, 60), np.linspace(lo, hi, 60)),
                      cmap="Greys", cmin=1, rasterized=True)
            ax.plot([], [], "s", color="0.5", label=f"labelled quasars ({int(lok.sum()):,d}, spectroscopic z)")
            ax.axhline(float(ll[lok].max()), color="0.4", lw=0.8, ls=":", label="most luminous labelled quasar")
    source = np.asarray(candidates["z_source"]).astype(str)
    photo = ok & (source == "photo")
    spec = ok & (source == "spec")
    stride = max(1, int(math.ceil(photo.sum() / MAX_POINTS)))
    idx = np.flatnonzero(photo)[::stride]
    if len(idx):
        zl = np.asarray(candidates["redshift_low"], float)[idx]
        zh = np.asarray(candidates["redshift_high"], float)[idx]
        ax.errorbar(z[idx], logl[idx], xerr=np.stack([np.clip(z[idx] - zl, 0, None), np.clip(zh - z[idx], 0, None)]),
                    fmt="o", ms=2.5, color=_CANDIDATE, ecolor=_CANDIDATE, elinewidth=0.4, alpha=0.6,
                    label=f"candidates, photometric z with 68% interval ({int(photo.sum()):,d})")
    if spec.any():
        ax.plot(z[spec], logl[spec], "o", ms=4, color=_MOTION, label=f"candidates, spectroscopic z ({int(spec.sum()):,d})")
    beyond = ok & np.asarray(candidates["beyond"], bool)
    if beyond.any():
        ax.plot(z[beyond], logl[beyond], "o", ms=10, mfc="none", mec="k", mew=1.2,
                label=f"more luminous than every labelled quasar ({int(beyond.sum()):,d})")
    ax.set_xlabel("redshift")
    ax.set_ylabel("log10 L_bol (erg/s)")
    ax.legend(fontsize=8, loc="lower right")
    ax.set_title("candidates in the luminosity–redshift plane", fontsize=10)
    return fig

#: Every picture drawn from a selection, in report order. Adding one is one entry here (it then
#: appears in ``selector tune --plots`` and in the report).
PLOTS = (
    Plot("sky", sky_map,
         "Where the candidates are. Look for a smooth spread at high Galactic latitude; clumps along the orange "
         "Galactic plane, or single hot pixels, point to crowded or artefact-ridden fields rather than quasars."),
    Plot("colour_colour", colour_colour,
         "Candidates (red) should sit inside the drawn criteria, well away from the dense stellar locus near zero "
         "colour; a crowd of candidates hugging a boundary means the cut, not the colours, decides their fate."),
    Plot("colour_magnitude", colour_magnitude,
         "Faint candidates have larger colour errors: a fan of red points opening towards faint magnitudes near a "
         "boundary is where contaminants come in."),
    Plot("cutflow", lambda d: cutflow_funnel(d.cutflow),
         "Which stage removes most sources. A stage that removes almost nothing, or almost everything, deserves a "
         "second look at its setting."),
    Plot("motion", motion_statistics,
         "Sources inside the shaded bands are consistent with no parallax and no proper motion. A candidate "
         "histogram piled against a threshold line means that threshold is cutting into the quasars."),
    Plot("pm_plane", proper_motion_plane,
         "Quasars gather at the origin; stars stream away from it. Candidates far from the origin in the right "
         "panel are sources whose large errors let them pass."),
    Plot("parallax_error", parallax_error,
         "Candidates should sit near zero parallax, below the dashed line and above the dotted one. Points at large "
         "σ pass easily: a list dominated by them is a list of poorly measured sources."),
    Plot("separations", match_separations,
         "True counterparts pile up at small separations; the dashed purple line is what chance coincidences give. "
         "Where the grey histogram meets that line, a larger radius only adds chance matches."),
    Plot("magnitudes", magnitude_distributions,
         "How bright the candidates are compared with everything matched: the faint end shows where the "
         "catalogues run out, and what a telescope will have to reach."),
    Plot("completeness", completeness_magnitude,
         "Against truth labels: the fraction of real quasars kept, per magnitude. A fall at the faint end is "
         "expected; a dip at the bright end points to a cut (saturation, colours) that removes real quasars."),
    Plot("score", score_distribution,
         "How candidates separate from the other zero-motion sources by score; with a classifier, how many sit "
         "close to the threshold, where a small change of threshold changes the list."),
)


def draw_png(draw: Callable, data) -> bytes | None:
    """PNG bytes of one picture, drawn with the pictures' font sizes (None when it has nothing to show)."""
    import matplotlib

    with matplotlib.rc_context(_RC):
        fig = draw(data)
        return None if fig is None else figure_png(fig)


def render_plots(data: PlotData) -> dict[str, bytes]:
    """PNG bytes of every picture that has data, keyed by name (in :data:`PLOTS` order)."""
    out = {}
    for plot in PLOTS:
        png = draw_png(plot.draw, data)
        if png is not None:
            out[plot.name] = png
    return out


def write_plots(data: PlotData, folder: Path) -> dict[str, Path]:
    """Write every picture as ``<folder>/<name>.png`` (atomically); returns the paths."""
    folder = Path(folder)
    out = {}
    for name, png in render_plots(data).items():
        path = folder / f"{name}.png"
        with atomic_path(path) as tmp:
            tmp.write_bytes(png)
        out[name] = path
    return out
