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

import numpy as np

from selector.core import photometry as ph
from selector.core.schema import infrared_mag_column
from selector.store.io import atomic_path

__all__ = ["COLOUR_COLOUR", "COLOUR_MAGNITUDE", "PLOTS", "PlotData", "colour_colour", "colour_magnitude", "cutflow_funnel", "figure_png",
           "motion_statistics", "render_plots", "score_distribution", "sky_map", "write_plots"]

#: Largest number of candidates drawn as points (an even stride of the rest is drawn beyond that).
MAX_POINTS = 50_000
_DPI = 100
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

    @classmethod
    def from_evaluation(cls, cache, ev, candidate=None, p_quasar=None, cutflow=None) -> "PlotData":
        """Build from a :class:`~selector.store.cache.FeatureCache` and a :class:`~selector.jobs.tune.Evaluation`.

        ``candidate``, ``p_quasar`` and ``cutflow`` override what the evaluation says (the report
        takes them from the run's recorded outputs).
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
                   col("ra_deg"), col("dec_deg"), ev.cutflow if cutflow is None else list(cutflow), p_quasar)


# --- rendering ------------------------------------------------------------------------------------

def _figure(width_in: float = 7.0, height_in: float = 5.0, **subplots):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_in, height_in), dpi=_DPI, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


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
    ax.legend(loc="upper left", fontsize=7, framealpha=0.85)
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
    ax.set_title(title, fontsize=10)
    ax.legend(loc="upper left", fontsize=7, framealpha=0.85)
    return fig


def motion_statistics(data: PlotData):
    """Distributions of the parallax significance and the proper-motion χ², thresholds marked.

    The proper-motion cut keeps p = exp(−χ²/2) ≥ p_min (χ² with two degrees of freedom), that is
    χ² ≤ −2 ln p_min, which is the line drawn.
    """
    mo = data.cfg.motion
    fig = _figure(10.0, 4.2)
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
    ax1.legend(fontsize=7)

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
    ax2.legend(fontsize=7)
    missing = int((~ok).sum())
    fig.suptitle("zero-motion test" + (f" ({missing:,d} sources without a solution not shown)" if missing else ""),
                 fontsize=11)
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

    fig = _figure(9.0, 5.2)
    ax = fig.add_subplot(projection="mollweide")
    ax.set_facecolor("white")
    finite = img[np.isfinite(img)]
    vmax = float(finite.max()) if finite.size and finite.max() > 0 else 1.0
    mesh = ax.pcolormesh(lon_e, lat_e, np.ma.masked_invalid(img), cmap="viridis",
                         norm=Normalize(vmin=0.0, vmax=vmax), shading="flat", rasterized=True)
    ticks = np.radians(np.arange(-150, 151, 30))
    ax.set_xticks(ticks)
    ax.set_xticklabels([f"{round(float(np.mod(-np.degrees(t), 360.0))) % 360:d}°" for t in ticks], fontsize=7)
    ax.tick_params(axis="y", labelsize=7)
    ax.grid(True, color="0.6", lw=0.5)
    fig.colorbar(mesh, ax=ax, orientation="horizontal", shrink=0.6, pad=0.06,
                 label=f"candidates per deg² (HEALPix order {order}, {area_deg2:.3g} deg² pixels)")
    ax.set_title(f"candidate density, ICRS; {int(data.candidate.sum()):,d} candidates, "
                 f"{int(footprint.sum()):,d} pixels with matched sources", fontsize=10)
    return fig


def score_distribution(data: PlotData):
    """The ranking score of zero-motion sources and candidates; the classifier's, if any."""
    has_p = data.p_quasar is not None and np.isfinite(data.p_quasar).any()
    fig = _figure(10.0 if has_p else 7.0, 4.2)
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
    ax.legend(fontsize=7)
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
        ax2.legend(fontsize=7)
    fig.suptitle("score distribution", fontsize=11)
    return fig


def cutflow_funnel(cutflow: list):
    """The cut-flow as a funnel: one centred bar per stage, width ∝ log10(1 + rows left)."""
    names = [n for n, _ in cutflow]
    counts = np.array([c for _, c in cutflow], float)
    width = np.log10(1.0 + counts)
    top = width.max() if len(width) and width.max() > 0 else 1.0
    fig = _figure(7.0, 0.45 * len(names) + 1.2)
    ax = fig.add_subplot()
    y = np.arange(len(names))[::-1]
    colours = [_CANDIDATE if i == len(names) - 1 else _MOTION for i in range(len(names))]
    ax.barh(y, width, left=-width / 2, color=colours, alpha=0.85, height=0.8)
    first = counts[0] if len(counts) and counts[0] > 0 else 1.0
    for yi, n, c in zip(y, names, counts):
        ax.text(top / 2 + 0.03 * top, yi, f"{int(c):,d}  ({c / first:.2%})", va="center", fontsize=8)
    ax.set_yticks(y)
    ax.set_yticklabels(names, fontsize=8)
    ax.set_xlim(-top / 2 - 0.02 * top, top * 1.05)
    ax.set_xticks([])
    for side in ("top", "right", "bottom"):
        ax.spines[side].set_visible(False)
    ax.set_title("cut-flow (bar width ∝ log₁₀ of rows left)", fontsize=10)
    return fig


#: Name, title and function of every picture, in report order.
PLOTS = (
    ("cutflow", "Cut-flow", lambda d: cutflow_funnel(d.cutflow)),
    ("colour_colour", "Colour–colour diagram", colour_colour),
    ("colour_magnitude", "Colour–magnitude diagram", colour_magnitude),
    ("motion", "Parallax significance and proper-motion χ²", motion_statistics),
    ("score", "Score distribution", score_distribution),
    ("sky", "Sky map of candidate density", sky_map),
)


def render_plots(data: PlotData) -> dict[str, bytes]:
    """PNG bytes of every picture, keyed by name (in :data:`PLOTS` order)."""
    return {name: figure_png(fn(data)) for name, _, fn in PLOTS}


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
