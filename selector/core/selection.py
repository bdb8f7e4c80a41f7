"""The selection of one tile's matched sources: rejects, cuts, scores, cut-flow and the ranked order.

Pure functions over the feature-cache table; shared by the run, the tuning loop and training.
"""

from __future__ import annotations

from dataclasses import dataclass, field
import numpy as np
import pyarrow as pa

from scipy.stats import chi2 as chi2_distribution

from selector.core import schema
from selector.core.astrometry import zero_motion
from selector.core.joint_motion import joint_zero_motion
from selector.core.candidate_physics import dereddened
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


#: Column of the match probability, when the cross-match gives one (the probabilistic match).
MATCH_PROBABILITY_COLUMN = "match_probability"
#: Stages of the zero-motion test, whichever ``motion.test`` is in force.
MOTION_STAGES = ("parallax", "proper_motion", "joint_motion")


@dataclass(frozen=True)
class ModelScores:
    """A trained model's verdict on feature-table rows (NaN, or False, for rows it does not score).

    Attributes
    ----------
    p_quasar : numpy.ndarray
        P(quasar) on the sky: the labelled-mix probability moved to the sky's class proportions.
    p_quasar_labelled_mix : numpy.ndarray
        P(quasar) at the class mix of the training labels.
    quasar_log_odds : numpy.ndarray
        ln[P/(1−P)] of ``p_quasar``, computed without rounding to P = 1: the ranking's tie-break.
    novelty_distance : numpy.ndarray
        Distance from the labelled sources in feature space (1 = typical among them).
    beyond_training : numpy.ndarray of bool
        ``novelty_distance`` beyond what the labelled sources show among themselves.
    """

    p_quasar: np.ndarray
    p_quasar_labelled_mix: np.ndarray
    quasar_log_odds: np.ndarray
    novelty_distance: np.ndarray
    beyond_training: np.ndarray

    def rows(self, lo: int, hi: int) -> "ModelScores":
        """The scores of rows ``lo`` to ``hi`` − 1."""
        return ModelScores(*(np.asarray(v)[lo:hi] for v in self))

    def __iter__(self):
        return iter((self.p_quasar, self.p_quasar_labelled_mix, self.quasar_log_odds, self.novelty_distance,
                     self.beyond_training))


@dataclass
class Selection:
    """Outcome of the selection stages over a feature table.

    Attributes
    ----------
    stages : list of (name, mask)
        Cumulative masks after each cut, in order; the last is the candidates.
    derived : dict of numpy arrays
        Columns computed from the selection settings (significances, colour excess, score).
    notes : list of str
        Configured cuts left out, each with the reason (e.g. a column the feature cache lacks).
    """

    stages: list = field(default_factory=list)
    derived: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)

    @property
    def passed(self) -> np.ndarray:
        return self.stages[-1][1]

    @property
    def zero_motion_passed(self) -> np.ndarray:
        """Rows left after the zero-motion test (its last stage), whichever test is configured."""
        return [mask for name, mask in self.stages if name in MOTION_STAGES][-1]


def match_method(cfg) -> str:
    """The configured cross-match method; ``"nearest"`` for a configuration without the key."""
    return str(getattr(cfg.match, "method", "nearest"))


def match_quality_note(cfg, columns) -> str | None:
    """Why the match-quality cut is left out (None when it applies).

    The cut reads the match probability, which only the probabilistic match writes: with
    ``match.method = "nearest"`` (or a feature cache written before the probabilistic match
    existed) there is nothing to cut on, and the cut is skipped rather than removing every row.
    """
    if match_method(cfg) == "nearest":
        return ("match_quality: skipped, the nearest-neighbour match gives no match probability "
                "(match.method = \"nearest\")")
    if MATCH_PROBABILITY_COLUMN not in columns:
        return f"match_quality: skipped, the feature cache has no {MATCH_PROBABILITY_COLUMN} column"
    return None


def skipped_cut_notes(cfg) -> list[str]:
    """Configured cuts that ``cfg`` leaves out for want of data, each with the reason (for summaries)."""
    notes = [match_quality_note(cfg, (MATCH_PROBABILITY_COLUMN,))]
    q = cfg.quality
    if (q.extent_max_mag is not None or q.reject_extended_flags) and not point_source_columns(cfg):
        notes.append("point_source: skipped, no extent or extended_flag role is mapped in [astrometric.columns] "
                     "or [infrared.columns]")
    return [n for n in notes if n]


def point_source_columns(cfg) -> tuple[str, ...]:
    """Feature columns the point-source cut reads under ``cfg`` (the mapped, enabled roles)."""
    q = cfg.quality
    astro = cfg.astrometric.columns
    cols = []
    if q.extent_max_mag is not None and "extent" in astro:
        cols.append(schema.EXTENT_COLUMN)
    if q.extent_snr_max is not None:
        cols += [schema.EXTENT_COLUMN, schema.EXTENT_ERROR_COLUMN]
    if q.reject_extended_flags:
        if "extended_flag" in astro:
            cols.append(schema.ASTRO_EXTENDED_FLAG_COLUMN)
        if "extended_flag" in cfg.infrared.columns:
            cols.append(schema.IR_EXTENDED_FLAG_COLUMN)
    return tuple(dict.fromkeys(cols))


def point_source_mask(features: pa.Table, cfg) -> np.ndarray | None:
    """Rows that look point-like under ``[quality]`` (None when no point-source role is mapped).

    A source is kept when its extent is at most ``extent_max_mag`` (and, with ``extent_snr_max``,
    not significantly above zero) and no mapped extendedness flag is set. A missing extent or flag
    keeps the row: absence of a measurement is not evidence of a galaxy, and the classifier sees
    the missing value.
    """
    q = cfg.quality
    cols = point_source_columns(cfg)
    if not cols:
        return None
    ok = np.ones(features.num_rows, bool)
    extent = _col(features, schema.EXTENT_COLUMN)
    with np.errstate(invalid="ignore", divide="ignore"):
        if q.extent_max_mag is not None and schema.EXTENT_COLUMN in cols:
            ok &= ~(extent > q.extent_max_mag)
        if q.extent_snr_max is not None:
            ok &= ~(extent / _col(features, schema.EXTENT_ERROR_COLUMN) > q.extent_snr_max)
    for name in (schema.ASTRO_EXTENDED_FLAG_COLUMN, schema.IR_EXTENDED_FLAG_COLUMN):
        if name in cols:
            ok &= ~(_col(features, name) > 0.0)
    return ok


def one_sided_joint_pvalue(chi2, parallax_snr) -> np.ndarray:
    """p-value of the joint zero-motion test, one-sided in parallax (stars have positive parallax).

    Parameters
    ----------
    chi2 : array_like of float
        ``xᵀ C⁻¹ x`` of (ϖ − ϖ0, μα*, μδ) with its full 3×3 covariance (3 degrees of freedom).
    parallax_snr : array_like of float
        ``(ϖ − ϖ0) / σϖ``.

    Returns
    -------
    numpy.ndarray
        Probability, for a source at rest at infinite distance, of a statistic at least this large.

    Notes
    -----
    Against the alternative "moving, or ϖ > ϖ0" the likelihood-ratio statistic is the full χ² when
    ϖ ≥ ϖ0 and, when ϖ < ϖ0, the χ² left once the parallax is fixed at its boundary value ϖ0:
    ``T = χ² − z²`` with z the parallax significance (the Schur complement of the parallax in the
    covariance, so the proper motion keeps its correlation with the parallax). Under the null
    hypothesis z is on either side of zero with probability 1/2 and, given z, the rest of χ² is
    χ² with 2 degrees of freedom independent of z, so T follows the mixture
    ``½ χ²(2) + ½ χ²(3)`` (a chi-bar-squared law for a parameter on the boundary: Chernoff 1954,
    Ann. Math. Stat. 25, 573; Self & Liang 1987, JASA 82, 605; from memory). Hence
    ``p = ½ sf₂(T) + ½ sf₃(T)``; a significantly negative parallax no longer counts as motion
    (it is a quality matter, see ``[quality] negative_parallax_snr_max``).
    """
    chi2 = np.asarray(chi2, float)
    z = np.asarray(parallax_snr, float)
    t = np.where(z < 0.0, chi2 - z * z, chi2)
    # rounding can leave a tiny negative remainder when the motion is exactly zero
    t = np.maximum(t, 0.0)
    return 0.5 * chi2_distribution.sf(t, 2) + 0.5 * chi2_distribution.sf(t, 3)


def select(features: pa.Table, cfg, p_quasar: np.ndarray | ModelScores | None = None) -> Selection:
    """Apply the zero-motion test, the colour criteria and the optional cuts to matched sources.

    Parameters
    ----------
    features : pyarrow.Table
        Feature-cache rows (matched sources, tile rejects already removed).
    cfg : Config
        Only the selection sections are read (motion, quality, colours, ranking, classifier), and
        which roles the catalogues map (the point-source cut applies to the mapped ones).
    p_quasar : numpy.ndarray or ModelScores, optional
        Classifier probabilities (or a model's full scores, whose columns the candidates then
        carry); when given, ``classifier.threshold`` is applied as a last cut and candidates are
        ranked by it.
    """
    scores = p_quasar if isinstance(p_quasar, ModelScores) else None
    if scores is not None:
        p_quasar = scores.p_quasar
    m = cfg.motion
    q = cfg.quality
    n = features.num_rows
    jm = joint_zero_motion(
        _col(features, "parallax_mas"), _col(features, "parallax_error_mas"),
        _col(features, "pmra_mas_yr"), _col(features, "pmdec_mas_yr"),
        pmra_error_mas_yr=_col(features, "pmra_error_mas_yr"), pmdec_error_mas_yr=_col(features, "pmdec_error_mas_yr"),
        parallax_pmra_corr=_col(features, "parallax_pmra_corr"),
        parallax_pmdec_corr=_col(features, "parallax_pmdec_corr"),
        pmra_pmdec_corr=_col(features, "pm_corr"), parallax_zero_point_mas=m.parallax_zero_point_mas,
        error_inflation=m.error_inflation,
    )
    joint_p = one_sided_joint_pvalue(jm.chi2, jm.parallax_snr)
    zm = zero_motion(
        _col(features, "parallax_mas"), _col(features, "parallax_error_mas"),
        _col(features, "pmra_mas_yr"), _col(features, "pmdec_mas_yr"),
        pmra_error_mas_yr=_col(features, "pmra_error_mas_yr"), pmdec_error_mas_yr=_col(features, "pmdec_error_mas_yr"),
        pmra_pmdec_corr=_col(features, "pm_corr"), parallax_zero_point_mas=m.parallax_zero_point_mas,
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
    note = match_quality_note(cfg, features.column_names)
    if note is None:
        stage("match_quality", _col(features, MATCH_PROBABILITY_COLUMN) >= q.match_probability_min)
    else:
        sel.notes.append(note)
    if m.require_solution:
        stage("astrometric_solution", has_solution)
    if m.fit_quality_max is not None:
        stage("fit_quality", _col(features, "fit_quality") <= m.fit_quality_max)
    # without a solution (and require_solution = false) the motion tests have nothing to reject
    if q.negative_parallax_snr_max is not None:
        # a parallax far below zero is no evidence of a star but of a failed solution: a quality cut
        stage("negative_parallax", ~has_solution | (zm.parallax_snr >= -q.negative_parallax_snr_max))
    if m.test == "joint":
        joint_ok = np.isfinite(joint_p) & (joint_p >= m.joint_pvalue_min)
        stage("joint_motion", ~has_solution | joint_ok)
    else:
        # one-sided: stars have positive parallaxes
        stage("parallax", ~has_solution | (zm.parallax_snr <= m.parallax_snr_max))
        stage("proper_motion", ~has_solution | (zm.pm_pvalue >= m.pm_pvalue_min))
    point_like = point_source_mask(features, cfg)
    if point_like is not None:
        stage("point_source", point_like)

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
        # intrinsic colours: dereddened where the source has an E(B-V) and [physics.extinction] a coefficient
        extinction = getattr(getattr(cfg, "physics", None), "extinction", None)
        opt = dereddened(_col(features, schema.optical_mag_column(oi.optical_band)), features, oi.optical_band,
                         extinction)
        ir_ab = dereddened(vega_to_ab(mags[oi.infrared_band], oi.infrared_band), features, oi.infrared_band,
                           extinction)
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
        "motion_chi2": jm.chi2, "motion_pvalue": joint_p,
        "colour_excess_mag": excess, "criteria_score": score,
    }
    if p_quasar is not None:
        sel.derived["p_quasar"] = np.asarray(p_quasar, float)
        # the published criteria stay beside the model's verdict as a reference column
        sel.derived["passes_colour_criteria"] = np.asarray(crit.passed, bool)
    if scores is not None:
        sel.derived.update(p_quasar_labelled_mix=np.asarray(scores.p_quasar_labelled_mix, float),
                           quasar_log_odds=np.asarray(scores.quasar_log_odds, float),
                           novelty_distance=np.asarray(scores.novelty_distance, float),
                           beyond_training=np.asarray(scores.beyond_training, bool))
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


def rank_candidates(table: pa.Table, order: str = "probability") -> pa.Table:
    """The merged ranked list: sorted by :func:`sort_by_score` with a ``rank`` column from 1."""
    table = sort_by_score(table, order)
    return table.add_column(0, "rank", pa.array(np.arange(1, table.num_rows + 1, dtype=np.int64)))


#: With a model, the order after P(quasar) on the sky: its log-odds (distinct where the probability
#: rounds to one), then the colour excess over the criteria boundary (redder: more secure hot dust).
_MODEL_TIE_BREAKS = ("quasar_log_odds", "colour_excess_mag")

#: Sort column of each ranking order (``ranking.order``), ahead of the probability order.
ORDER_COLUMNS = {"probability": None, "luminosity": "lbol_erg_s", "expected_luminosity": "expected_lbol_erg_s"}


def rank_keys(names, order: str = "probability") -> list[tuple[str, str]]:
    """Sort keys of the ranked order for a table with these columns: best first.

    ``order = "probability"``: with a model, ``p_quasar`` (on the sky), then ``quasar_log_odds``
    (distinct where the probability rounds to one), then ``colour_excess_mag``; without one,
    ``criteria_score``. ``"luminosity"`` puts the bolometric luminosity ``lbol_erg_s`` first and
    ``"expected_luminosity"`` the expected luminosity ``expected_lbol_erg_s`` = P(quasar) × L_bol,
    each followed by the probability order. The source id comes last only so that the order is total
    and the bytes deterministic when every science quantity is equal. NaN sorts last.

    Raises
    ------
    SelectorError
        A luminosity order for candidates without luminosities (a model without a redshift part).
    """
    if order not in ORDER_COLUMNS:
        raise SelectorError(f"internal error: unknown ranking order {order!r}")
    names = list(names)
    if "p_quasar" in names:
        keys = [("p_quasar", "descending")] + [(k, "descending") for k in _MODEL_TIE_BREAKS if k in names]
    else:
        keys = [("criteria_score", "descending")]
    first = ORDER_COLUMNS[order]
    if first is not None:
        if first not in names:
            raise SelectorError(f"ranking.order = {order!r} needs the column {first!r}, which the candidates lack: "
                                "the classifier.model has no photometric-redshift part (retrain with redshifts: "
                                "classifier.labels.redshift_column or the known objects' redshift role) or use "
                                "ranking.order = \"probability\"")
        keys.insert(0, (first, "descending"))
    return keys + [("astro_id", "ascending")]


def sort_by_score(table: pa.Table, order: str = "probability") -> pa.Table:
    """The rows in the ranked order of :func:`rank_keys`."""
    keys = rank_keys(table.column_names, order)
    if table.num_rows == 0:
        return table
    return table.sort_by(keys)


def check_accounting(n_rows: int, n_rejects: int, flow: list) -> None:
    """Rows of a tile = rejects + input; the cut-flow never increases. Raises on a violation."""
    counts = [c for _, c in flow]
    if flow[0][1] + n_rejects != n_rows or any(b > a for a, b in zip(counts, counts[1:])):
        raise SelectorError(f"internal error: row accounting does not add up ({n_rows} rows, {n_rejects} rejects, "
                            f"cut-flow {flow}); the results were not written")
