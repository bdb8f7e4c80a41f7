"""The selection of one tile's matched sources: rejects, cuts, scores, cut-flow and the ranked order.

Pure functions over the feature-cache table; shared by the run, the tuning loop and training.
"""

from __future__ import annotations

from dataclasses import dataclass, field
import numpy as np
import pyarrow as pa

from selector.core import schema
from selector.core.astrometry import zero_motion
from selector.core.photometry import LinearCut, apply_criteria, apply_linear_cut, vega_to_ab
from selector.errors import SelectorError


#: Reason codes for rows a tile cannot use (kept out of the cut-flow, written to the tile's rejects).
TILE_REJECT_REASONS = ("zero_astrometric_error",)


def _col(table: pa.Table, name: str) -> np.ndarray:
    if name not in table.column_names:
        return np.full(table.num_rows, np.nan)
    return table.column(name).to_numpy(zero_copy_only=False).astype(float, copy=False)


#: Columns :func:`tile_rejects` reads (so a reader of the feature cache loads them).
TILE_REJECT_COLUMNS = ("parallax_error_mas", "pmra_error_mas_yr", "pmdec_error_mas_yr")


def tile_rejects(features: pa.Table) -> np.ndarray:
    """Rows whose astrometric errors are exactly zero: their significances would be infinite."""
    errs = [_col(features, c) for c in TILE_REJECT_COLUMNS]
    return np.any(np.stack([e == 0.0 for e in errs]), axis=0)


def infrared_mags(features: pa.Table, bands) -> dict[str, np.ndarray]:
    """Vega magnitudes keyed by band label (``"3.4"``, ...), as the photometry module reads them."""
    return {b: _col(features, schema.infrared_mag_column(b)) for b in bands}


@dataclass
class Selection:
    """Outcome of the selection stages over a feature table.

    Attributes
    ----------
    stages : list of (name, mask)
        Cumulative masks after each cut, in order; the last is the candidates.
    derived : dict of numpy arrays
        Columns computed from the selection settings (significances, colour excess, score).
    """

    stages: list = field(default_factory=list)
    derived: dict = field(default_factory=dict)

    @property
    def passed(self) -> np.ndarray:
        return self.stages[-1][1]


def select(features: pa.Table, cfg, p_quasar: np.ndarray | None = None) -> Selection:
    """Apply the zero-motion test, the colour criteria and the optional cuts to matched sources.

    Parameters
    ----------
    features : pyarrow.Table
        Feature-cache rows (matched sources, tile rejects already removed).
    cfg : Config
        Only the selection sections are read (motion, colours, ranking, classifier).
    p_quasar : numpy.ndarray, optional
        Classifier probabilities; when given, ``classifier.threshold`` is applied as a last cut
        and candidates are ranked by it.
    """
    m = cfg.motion
    n = features.num_rows
    zm = zero_motion(
        _col(features, "parallax_mas"), _col(features, "parallax_error_mas"),
        _col(features, "pmra_mas_yr"), _col(features, "pmdec_mas_yr"),
        pmra_error_mas_yr=_col(features, "pmra_error_mas_yr"), pmdec_error_mas_yr=_col(features, "pmdec_error_mas_yr"),
        pmra_pmdec_corr=_col(features, "pmra_pmdec_corr"), parallax_zero_point_mas=m.parallax_zero_point_mas,
        error_inflation=m.error_inflation,
    )
    has_solution = np.isfinite(zm.parallax_snr) & np.isfinite(zm.pm_chi2)
    sel = Selection()
    keep = np.ones(n, bool)

    def stage(name, mask):
        nonlocal keep
        keep = keep & mask
        sel.stages.append((name, keep.copy()))

    stage("matched", np.ones(n, bool))
    if m.require_solution:
        stage("astrometric_solution", has_solution)
    if m.fit_quality_max is not None:
        stage("fit_quality", _col(features, "fit_quality") <= m.fit_quality_max)
    # without a solution (and require_solution = false) the motion tests have nothing to reject
    stage("parallax", ~has_solution | (np.abs(zm.parallax_snr) <= m.parallax_snr_max))
    stage("proper_motion", ~has_solution | (zm.pm_pvalue >= m.pm_pvalue_min))

    c = cfg.colours
    mags = infrared_mags(features, cfg.infrared_bands())
    crit = apply_criteria(mags, c.criteria, c.combine)
    # with a model, the published criteria may be left to the classifier, which then sees every
    # source that passed the zero-motion test
    replaced = p_quasar is not None and not cfg.classifier.require_colour_criteria
    colour_ok = np.ones(n, bool) if replaced else crit.passed
    excess = crit.excess_mag
    if c.linear_cuts:
        quantities = dict(mags)
        for band in cfg.optical_bands():
            quantities[f"opt_{band}"] = _col(features, schema.optical_mag_column(band))
        for spec in c.linear_cuts:
            cut = LinearCut(spec.name, tuple(spec.y), tuple(spec.x), spec.slope, spec.intercept, spec.side).checked()
            res = apply_linear_cut(quantities, cut)
            colour_ok = colour_ok & res.passed
    stage("infrared_colour", colour_ok)
    if c.optical_infrared is not None:
        oi = c.optical_infrared
        opt = _col(features, schema.optical_mag_column(oi.optical_band))
        ir_ab = vega_to_ab(mags[oi.infrared_band], oi.infrared_band)
        colour = opt - ir_ab
        ok = np.isfinite(colour)
        if oi.min_mag is not None:
            ok &= colour >= oi.min_mag
        if oi.max_mag is not None:
            ok &= colour <= oi.max_mag
        stage("optical_infrared", ok)
    if c.galactic_latitude_min_deg is not None:
        stage("galactic_latitude", np.abs(_col(features, "gal_b_deg")) >= c.galactic_latitude_min_deg)
    if p_quasar is not None:
        stage("classifier", np.nan_to_num(p_quasar, nan=0.0) >= cfg.classifier.threshold)

    r = cfg.ranking
    bright = _col(features, schema.infrared_mag_column(r.brightness_band))
    score = criteria_score(excess, bright, r.brightness_pivot_mag, r.brightness_weight)
    sel.derived = {
        "parallax_snr": zm.parallax_snr, "pm_chi2": zm.pm_chi2, "pm_pvalue": zm.pm_pvalue,
        "colour_excess_mag": excess, "criteria_score": score,
    }
    if p_quasar is not None:
        sel.derived["p_quasar"] = np.asarray(p_quasar, float)
    return sel


def criteria_score(excess_mag, bright_mag, pivot_mag: float, weight: float) -> np.ndarray:
    """Ranking score used until a classifier is configured.

    ``score = colour excess over the criterion boundary (mag) + weight · (pivot − m)``: redder
    than the boundary means more secure hot-dust colours, brighter means cheaper spectroscopy and
    smaller photometric errors. A missing band scores as if at the pivot.
    """
    brightness = np.nan_to_num(pivot_mag - np.asarray(bright_mag, float), nan=0.0)
    return np.nan_to_num(np.asarray(excess_mag, float), nan=0.0) + weight * brightness


def cutflow(n_input: int, n_matched_input: int, sel: Selection) -> list[tuple[str, int]]:
    """Rows left after each stage, starting from every usable owned source of the tile(s)."""
    rows = [("input", int(n_input)), ("matched", int(n_matched_input))]
    rows += [(name, int(mask.sum())) for name, mask in sel.stages[1:]]
    return rows


def candidates_table(features: pa.Table, sel: Selection) -> pa.Table:
    """Candidates: passing rows with the derived columns, sorted by score (then id) for determinism."""
    idx = np.flatnonzero(sel.passed)
    out = features.take(pa.array(idx, pa.int64()))
    for name, values in sel.derived.items():
        out = out.append_column(name, pa.array(np.asarray(values)[idx]))
    return sort_by_score(out)


def rank_candidates(table: pa.Table) -> pa.Table:
    """The merged ranked list: sorted by score (then id) with a ``rank`` column from 1."""
    table = sort_by_score(table)
    return table.add_column(0, "rank", pa.array(np.arange(1, table.num_rows + 1, dtype=np.int64)))


def sort_by_score(table: pa.Table) -> pa.Table:
    key = "p_quasar" if "p_quasar" in table.column_names else "criteria_score"
    if table.num_rows == 0:
        return table
    return table.sort_by([(key, "descending"), ("astro_id", "ascending")])


def check_accounting(n_rows: int, n_rejects: int, flow: list) -> None:
    """Rows of a tile = rejects + input; the cut-flow never increases. Raises on a violation."""
    counts = [c for _, c in flow]
    if flow[0][1] + n_rejects != n_rows or any(b > a for a, b in zip(counts, counts[1:])):
        raise SelectorError(f"internal error: row accounting does not add up ({n_rows} rows, {n_rejects} rejects, "
                            f"cut-flow {flow}); the results were not written")
