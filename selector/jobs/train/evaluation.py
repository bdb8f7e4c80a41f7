"""The held-out evaluation of a trained classifier, as one typed value.

Every figure here is held out: each prediction comes from a fold model that did not see the row,
calibrated by maps fitted on the other folds. The published colour criteria are scored on the same
rows, so the comparison is like for like. :meth:`TrainingEvaluation.to_dict` is the content of
``evaluation.json``.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import asdict, dataclass

import numpy as np
import pyarrow as pa

from selector.core.metrics import Score, completeness_purity
from selector.core.photometry import CRITERIA
from selector.core.selection import infrared_mags
from selector.jobs.train.labels import QUASAR, LabelledSet
from selector.settings.config import Config

__all__ = ["COMPLETENESS_TARGET", "TARGET_KEY", "Brier", "SkyMix", "sky_mix", "weighted_reliability", "CalibrationCurve", "ClassCalibration",
           "CriterionComparison", "FoldSummary", "Importance", "OperatingPoint", "ThresholdCurve",
           "TrainingEvaluation", "evaluate", "purity_at_completeness", "summary_text"]

#: Quasar completeness at which purities are compared.
COMPLETENESS_TARGET = 0.95
#: Key of the figures at :data:`COMPLETENESS_TARGET` in ``evaluation.json``.
TARGET_KEY = f"at_{int(COMPLETENESS_TARGET * 100)}_percent_completeness"
#: Probability thresholds of the completeness and purity curves.
THRESHOLDS = np.round(np.linspace(0.0, 1.0, 101), 2)

_NOTE = ("held-out figures from spatially grouped cross-validation; completeness and purity are over labelled "
         "sources that passed the zero-motion test, so they depend on how representative the labels are")
_IMPORTANCE_SCORING = "drop in average precision of P(quasar) on held-out folds when the feature is shuffled"


def _num(x):
    x = float(x)
    return x if math.isfinite(x) else None


class _Record:
    """Base of the evaluation records whose JSON form is just their fields."""

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class OperatingPoint(_Record):
    """The selection ``score >= threshold`` chosen to reach a completeness.

    Attributes
    ----------
    threshold : float or None
        None when no score is finite or there is no positive.
    completeness, purity : float or None
    selected : int
    """

    threshold: float | None
    completeness: float | None
    purity: float | None
    selected: int


def purity_at_completeness(score: np.ndarray, positive: np.ndarray, target: float = COMPLETENESS_TARGET) -> OperatingPoint:
    """Purity of the selection ``score >= t`` with the highest ``t`` whose completeness reaches ``target``.

    Rows with a NaN score sort last (they are selected only when nothing less reaches the target).

    Parameters
    ----------
    score : numpy.ndarray of float
    positive : numpy.ndarray of bool
    target : float

    Returns
    -------
    OperatingPoint
    """
    s = np.where(np.isfinite(score), score, -np.inf)
    n_pos = int(positive.sum())
    if n_pos == 0:
        return OperatingPoint(None, None, None, 0)
    order = np.argsort(-s, kind="stable")
    cum = np.cumsum(positive[order])
    k = int(np.searchsorted(cum, math.ceil(target * n_pos - 1e-9)))
    t = s[order][min(k, len(s) - 1)]
    sel = s >= t
    return OperatingPoint(_num(t), float(positive[sel].sum() / n_pos), float(positive[sel].mean()), int(sel.sum()))


@dataclass(frozen=True)
class FoldSummary(_Record):
    """The cross-validation: folds, sky-region order, regions, rows held out by each fold."""

    n: int
    group_order: int
    regions: int
    rows_per_fold: list


@dataclass(frozen=True)
class ThresholdCurve(_Record):
    """Completeness, purity and selected rows of one class at every threshold of :data:`THRESHOLDS`."""

    completeness: list
    purity: list
    selected: list


@dataclass(frozen=True)
class CalibrationCurve(_Record):
    """Reliability diagram in equal bins of predicted probability (None in an empty bin)."""

    bin_edges: list
    count: list
    mean_predicted: list
    observed_fraction: list


@dataclass(frozen=True)
class ClassCalibration:
    """One class's calibration curves before and after the calibration maps."""

    raw: CalibrationCurve
    calibrated: CalibrationCurve

    def to_dict(self) -> dict:
        return {"raw": self.raw.to_dict(), "calibrated": self.calibrated.to_dict()}


@dataclass(frozen=True)
class Brier(_Record):
    """Brier scores (all classes, and P(quasar) alone), raw and calibrated."""

    raw: float
    calibrated: float
    quasar_raw: float
    quasar_calibrated: float


@dataclass(frozen=True)
class Importance:
    """Permutation importances, most important first (None where a feature was never shuffled)."""

    features: list
    mean: list
    std: list

    def to_dict(self) -> dict:
        return {"scoring": _IMPORTANCE_SCORING, **asdict(self)}


@dataclass(frozen=True)
class CriterionComparison:
    """One published criterion on the held-out rows, beside the classifier.

    Attributes
    ----------
    at_published_boundary : Score
        The criterion as published.
    classifier_purity_at_same_completeness : float or None
    at_target : OperatingPoint
        The criterion's excess used as a ranking, at :data:`COMPLETENESS_TARGET`.
    """

    at_published_boundary: Score
    classifier_purity_at_same_completeness: float | None
    at_target: OperatingPoint

    def to_dict(self) -> dict:
        return {"at_published_boundary": self.at_published_boundary.as_dict(),
                "classifier_purity_at_same_completeness": self.classifier_purity_at_same_completeness,
                TARGET_KEY: self.at_target.to_dict()}


@dataclass(frozen=True)
class SkyMix:
    """Held-out figures at the sky's class mix, and what the default list is expected to hold.

    Labelled rows stand for the sky through importance weights (:func:`selector.jobs.train.sky.sky_weights`);
    probabilities are the held-out ones moved to the sky mix (Saerens, Latinne & Decaestecker 2002,
    Neural Computation 14, 21).

    Attributes
    ----------
    priors : dict
        The sky adjustment as the model card shows it.
    at_threshold : Score-like dict
        Quasar completeness and purity of held-out P(quasar) on the sky ≥ the threshold, weighted to the sky mix.
    curve : ThresholdCurve
        The same at every threshold of :data:`THRESHOLDS` (``selected``: weighted count).
    reliability : dict
        Reliability diagram of held-out sky P(quasar) after the adjustment, weighted to the sky mix.
    expected_purity : float or None
        Mean sky P(quasar) over the default list a run with this model makes (every scored row).
    expected_purity_error : float or None
        Its Poisson-binomial standard deviation.
    listed : int
        Length of that list.
    scored_rows : int
        Rows the model scores (the population of the sky estimate).
    """

    priors: dict
    at_threshold: dict
    curve: ThresholdCurve
    reliability: dict
    expected_purity: float | None
    expected_purity_error: float | None
    listed: int
    scored_rows: int

    def to_dict(self) -> dict:
        return {"note": _SKY_NOTE, "priors": self.priors, "quasar_at_threshold": self.at_threshold,
                "threshold_curve": self.curve.to_dict(), "reliability_after_adjustment": self.reliability,
                "default_list": {"expected_purity": self.expected_purity,
                                 "expected_purity_error": self.expected_purity_error, "listed": self.listed,
                                 "scored_rows": self.scored_rows,
                                 "meaning": "mean P(quasar) on the sky over the list a run with this model makes"}}


_SKY_NOTE = ("held-out figures moved to the sky's class mix: probabilities adjusted by the sky proportions "
             "(Saerens, Latinne & Decaestecker 2002), labelled sources weighted to stand for the sky")


def _weighted_score(selected: np.ndarray, positive: np.ndarray, w: np.ndarray) -> dict:
    tp = float(np.sum(w[selected & positive]))
    pos = float(np.sum(w[positive]))
    sel = float(np.sum(w[selected]))
    return {"completeness": _num(tp / pos) if pos > 0 else None, "purity": _num(tp / sel) if sel > 0 else None,
            "selected_weight": sel}


def weighted_reliability(p: np.ndarray, positive: np.ndarray, w: np.ndarray, n_bins: int = 10) -> dict:
    """Reliability diagram with row weights, in equal-width bins of predicted probability.

    Observed fraction Σw·y/Σw against mean prediction Σw·p/Σw per bin; the spread expected if the
    predictions were right is √(Σw²p(1−p))/Σw (the Poisson-binomial deviation of
    :func:`selector.core.calibration.reliability_table`, with weights; common practice). With unit
    weights the figures equal that function's ``strategy="uniform"`` table.
    """
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    idx = np.clip(np.searchsorted(edges[1:-1], p, side="right"), 0, n_bins - 1)
    sw = np.bincount(idx, weights=w, minlength=n_bins)
    count = np.bincount(idx, minlength=n_bins)
    mean_p = np.bincount(idx, weights=w * p, minlength=n_bins)
    obs = np.bincount(idx, weights=w * positive, minlength=n_bins)
    var = np.bincount(idx, weights=w * w * p * (1 - p), minlength=n_bins)
    keep = sw > 0
    return {"lower": edges[:-1][keep].tolist(), "upper": edges[1:][keep].tolist(),
            "mean_predicted": (mean_p[keep] / sw[keep]).tolist(), "observed": (obs[keep] / sw[keep]).tolist(),
            "count": count[keep].tolist(), "error": (np.sqrt(var[keep]) / sw[keep]).tolist()}


def sky_mix(threshold: float, p_sky: np.ndarray, positive: np.ndarray, weights: np.ndarray, **extra) -> SkyMix:
    """The held-out figures at the sky mix (see :class:`SkyMix`).

    Parameters
    ----------
    threshold : float
    p_sky : numpy.ndarray
        Held-out P(quasar) moved to the sky mix, per labelled row.
    positive : numpy.ndarray of bool
        Labelled quasars.
    weights : numpy.ndarray
        Importance weights of the labelled rows for the sky mix.
    **extra
        ``priors``, ``expected_purity``, ``expected_purity_error``, ``listed``, ``scored_rows``.
    """
    rows = [_weighted_score(p_sky >= t, positive, weights) for t in THRESHOLDS]
    curve = ThresholdCurve([r["completeness"] for r in rows], [r["purity"] for r in rows],
                           [r["selected_weight"] for r in rows])
    return SkyMix(at_threshold=_weighted_score(p_sky >= threshold, positive, weights), curve=curve,
                  reliability=weighted_reliability(p_sky, positive.astype(float), weights), **extra)


@dataclass(frozen=True)
class TrainingEvaluation:
    """Held-out figures of one training.

    Attributes
    ----------
    classes : tuple of str
    rows : int
        Labelled rows evaluated.
    by_class : dict
        Rows per class name.
    folds : FoldSummary
    threshold : float
        ``classifier.threshold``.
    at_threshold : dict of str to Score
        Each class selected by its calibrated probability at the threshold.
    thresholds : list of float
    threshold_curves : dict of str to ThresholdCurve
    confusion_counts : list of list of int
        Rows: true class; columns: most probable class.
    calibration_curves : dict of str to ClassCalibration
    brier : Brier
    importance : Importance
    quasar_at_target : OperatingPoint
        Calibrated P(quasar) at :data:`COMPLETENESS_TARGET`.
    criteria : dict of str to CriterionComparison
        Every published criterion the configured bands allow.
    best_criterion : str or None
        The criterion purest at :data:`COMPLETENESS_TARGET`.
    sky : SkyMix or None
        The figures at the sky mix (set once the sky's proportions are known).
    """

    classes: tuple
    rows: int
    by_class: dict
    folds: FoldSummary
    threshold: float
    at_threshold: dict
    thresholds: list
    threshold_curves: dict
    confusion_counts: list
    calibration_curves: dict
    brier: Brier
    importance: Importance
    quasar_at_target: OperatingPoint
    criteria: dict
    best_criterion: str | None
    sky: SkyMix | None = None

    def to_dict(self) -> dict:
        """The content of ``evaluation.json``."""
        return {
            "note": _NOTE,
            "classes": list(self.classes),
            "rows": self.rows,
            "by_class": dict(self.by_class),
            "folds": self.folds.to_dict(),
            "threshold": self.threshold,
            "at_threshold": {name: s.as_dict() for name, s in self.at_threshold.items()},
            "threshold_curves": {"threshold": list(self.thresholds),
                                 **{name: c.to_dict() for name, c in self.threshold_curves.items()}},
            "confusion_matrix": {"rows": "true class", "columns": "most probable class", "labels": list(self.classes),
                                 "counts": [list(r) for r in self.confusion_counts]},
            "calibration_curves": {name: c.to_dict() for name, c in self.calibration_curves.items()},
            "brier": self.brier.to_dict(),
            "permutation_importance": self.importance.to_dict(),
            "quasar": {TARGET_KEY: self.quasar_at_target.to_dict()},
            "criteria": {name: c.to_dict() for name, c in self.criteria.items()},
            "best_criterion": self.best_criterion,
            "sky_mix": self.sky.to_dict() if self.sky is not None else None,
        }


def _brier(p: np.ndarray, y: np.ndarray) -> float:
    onehot = np.eye(p.shape[1])[y]
    return float(np.mean(np.sum((p - onehot) ** 2, axis=1)))


def _brier_quasar(p: np.ndarray, y: np.ndarray) -> float:
    return float(np.mean((p[:, QUASAR] - (y == QUASAR)) ** 2))


def _calibration_curve(p: np.ndarray, positive: np.ndarray, n_bins: int = 10) -> CalibrationCurve:
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    b = np.clip(np.digitize(p, edges[1:-1]), 0, n_bins - 1)
    count = np.bincount(b, minlength=n_bins)
    mean_p = np.bincount(b, weights=p, minlength=n_bins)
    frac = np.bincount(b, weights=positive.astype(float), minlength=n_bins)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_p, frac = mean_p / count, frac / count
    return CalibrationCurve(edges.tolist(), count.tolist(), [_num(v) for v in mean_p], [_num(v) for v in frac])


def _criteria_scores(table: pa.Table, cfg: Config) -> dict:
    mags = infrared_mags(table, cfg.infrared_bands())
    out = {}
    for name, criterion in CRITERIA.items():
        if set(criterion.bands) <= set(mags):
            r = criterion.select(mags)
            out[name] = (np.asarray(r.passed, bool), np.asarray(r.excess_mag, float))
    return out


def _threshold_curve(p: np.ndarray, positive: np.ndarray) -> ThresholdCurve:
    rows = [completeness_purity(p >= t, positive).as_dict() for t in THRESHOLDS]
    return ThresholdCurve([r["completeness"] for r in rows], [r["purity"] for r in rows],
                          [r["selected"] for r in rows])


def evaluate(cfg: Config, data: LabelledSet, *, fold: np.ndarray, raw: np.ndarray, calibrated: np.ndarray,
             importances: np.ndarray, classes) -> TrainingEvaluation:
    """The held-out figures of out-of-fold predictions.

    Parameters
    ----------
    cfg : Config
        The threshold, the folds and the infrared bands of the criteria.
    data : LabelledSet
    fold : numpy.ndarray of int
        Fold of every row.
    raw, calibrated : numpy.ndarray, shape (rows, classes)
        Out-of-fold probabilities before and after calibration.
    importances : numpy.ndarray, shape (features, repeats)
        Permutation importances of every repeat (NaN where never shuffled).
    classes : sequence of str
        The model's classes (``data.y`` indexes them).

    Returns
    -------
    TrainingEvaluation
    """
    y = data.y
    cal = calibrated
    thr = cfg.classifier.threshold
    names = tuple(classes)
    positive = {name: y == k for k, name in enumerate(names)}
    curves, at_thr = {}, {}
    for k, name in enumerate(names):
        curves[name] = _threshold_curve(cal[:, k], positive[name])
        at_thr[name] = completeness_purity(cal[:, k] >= thr, positive[name])
    pred = np.argmax(cal, axis=1)
    confusion = np.zeros((len(names), len(names)), np.int64)
    np.add.at(confusion, (y, pred), 1)
    q = positive["quasar"]
    criteria = {}
    for name, (passed, excess) in _criteria_scores(data.table, cfg).items():
        at_boundary = completeness_purity(passed, q)
        # a criterion selecting no quasar (or a set without quasars) has no completeness to match
        reached = at_boundary.positives > 0 and at_boundary.completeness > 0
        same = purity_at_completeness(cal[:, QUASAR], q, at_boundary.completeness).purity if reached else None
        criteria[name] = CriterionComparison(at_boundary, same, purity_at_completeness(excess, q))
    best = (max(criteria, key=lambda n: (criteria[n].at_target.purity or -1.0, n)) if criteria else None)
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a feature never shuffled (no quasar in a fold)
        imp_mean, imp_std = np.nanmean(importances, axis=1), np.nanstd(importances, axis=1)
    order = np.argsort(-np.nan_to_num(imp_mean, nan=-np.inf), kind="stable")
    return TrainingEvaluation(
        classes=tuple(names),
        rows=int(len(y)),
        by_class={name: int(positive[name].sum()) for name in names},
        folds=FoldSummary(int(cfg.classifier.folds), int(data.group_order), int(len(np.unique(data.groups))),
                          np.bincount(fold, minlength=cfg.classifier.folds).tolist()),
        threshold=thr,
        at_threshold=at_thr,
        thresholds=THRESHOLDS.tolist(),
        threshold_curves=curves,
        confusion_counts=confusion.tolist(),
        calibration_curves={name: ClassCalibration(_calibration_curve(raw[:, k], positive[name]),
                                                   _calibration_curve(cal[:, k], positive[name]))
                            for k, name in enumerate(names)},
        brier=Brier(_brier(raw, y), _brier(cal, y), _brier_quasar(raw, y), _brier_quasar(cal, y)),
        importance=Importance([data.feature_names[j] for j in order], [_num(imp_mean[j]) for j in order],
                              [_num(imp_std[j]) for j in order]),
        quasar_at_target=purity_at_completeness(cal[:, QUASAR], q),
        criteria=criteria,
        best_criterion=best,
    )


def _pct(x) -> str:
    return "-" if x is None else f"{x:.1%}"


def _ratio(x: float) -> float | None:
    """A :class:`~selector.core.metrics.Score` ratio as shown: None where it is undefined."""
    return None if math.isnan(x) else x


def _sky_lines(e: TrainingEvaluation) -> list[str]:
    k = e.sky
    pri = k.priors
    how = {"em": "estimated by EM (Saerens et al. 2002)", "config": "given in classifier.sky_priors"}.get(pri["method"],
                                                                                                     pri["method"])
    out = []
    if "sky" in pri:
        out.append(f"sky: class proportions among the {k.scored_rows:,d} sources the model scores, {how}: "
                   + ", ".join(f"{c} {v:.4g}" for c, v in pri["sky"].items())
                   + " (labelled mix: " + ", ".join(f"{c} {v:.4g}" for c, v in pri["labelled_mix"].items()) + ")")
    else:
        out.append(f"sky: class proportions among the {k.scored_rows:,d} sources the model scores, {how}, in "
                   f"{len(pri['bins'])} bins of {pri['band']} magnitude (see the model card)")
    if not pri.get("converged", True):
        out.append("  warning: the EM estimate did not converge; the sky proportions are approximate")
    lab = e.at_threshold["quasar"]
    sky = k.at_threshold
    out.append(f"held-out quasar purity at threshold {e.threshold:.2f}: at the labelled mix {_pct(_ratio(lab.purity))} "
               f"(completeness {_pct(_ratio(lab.completeness))}); at the sky mix {_pct(sky['purity'])} "
               f"(completeness {_pct(sky['completeness'])})")
    if k.expected_purity is None:
        out.append("expected purity of the default list on the sky: - (the list would be empty)")
    else:
        out.append(f"expected purity of the default list on the sky: {k.expected_purity:.1%} ± "
                   f"{k.expected_purity_error:.1%} (mean P(quasar) on the sky over its {k.listed:,d} candidates)")
    return out


def summary_text(evaluation: TrainingEvaluation, summary: dict, configured=()) -> str:
    """A short plain-text account of the training set and the held-out figures.

    Parameters
    ----------
    evaluation : TrainingEvaluation
    summary : dict
        The training-set summary of the labelled set (:attr:`LabelledSet.summary`).
    configured : sequence of str
        The criteria of ``[colours]``, compared with the classifier too.

    Returns
    -------
    str
    """
    e = evaluation
    s = summary
    lines = [f"training set: {s['rows']:,d} labelled sources that passed the zero-motion test ("
             + ", ".join(f"{n} {c:,d}" for n, c in s["by_class"].items() if c) + ")"]
    for name, src in s["sources"].items():
        dropped = sum(src.get("dropped_unknown_class", {}).values())
        lines.append(f"  {name}: {src['rows']:,d} rows, {src['matched']:,d} matched, {src['used']:,d} used"
                     + (f", {dropped:,d} with a class outside classifier.class_map dropped" if dropped else ""))
    if s["conflicting_labels"]:
        lines.append(f"  {s['conflicting_labels']:,d} sources labelled differently by two sources (precedence: "
                     + " > ".join(s["precedence"]) + ")")
    f = e.folds
    lines.append(f"cross-validation: {f.n} folds over {f.regions} sky regions (HEALPix order {f.group_order})")
    lines.append(f"held-out at the labelled mix, threshold {e.threshold:.2f}:   completeness   purity")
    for name in e.classes:
        r = e.at_threshold[name]
        lines.append(f"  {name:<8} {_pct(_ratio(r.completeness)):>45} {_pct(_ratio(r.purity)):>8}")
    b = e.brier
    lines.append(f"Brier score (held out): raw {b.raw:.4f} → calibrated {b.calibrated:.4f}")
    q = e.quasar_at_target
    best = e.best_criterion
    if best:
        c = e.criteria[best]
        lines.append(f"quasar purity at {COMPLETENESS_TARGET:.0%} completeness: classifier {_pct(q.purity)}, best "
                     f"published criterion ({best}) {_pct(c.at_target.purity)}")
        bd = c.at_published_boundary
        lines.append(f"  {best} at its published boundary: completeness {_pct(_ratio(bd.completeness))}, purity "
                     f"{_pct(_ratio(bd.purity))}; the classifier at that completeness: purity "
                     f"{_pct(c.classifier_purity_at_same_completeness)}")
    else:
        lines.append(f"quasar purity at {COMPLETENESS_TARGET:.0%} completeness: classifier {_pct(q.purity)}")
    for name in configured:
        if name in e.criteria and name != best:
            c = e.criteria[name]
            bd = c.at_published_boundary
            lines.append(f"  {name} (configured) at its published boundary: completeness "
                         f"{_pct(_ratio(bd.completeness))}, purity {_pct(_ratio(bd.purity))}; the classifier at that "
                         f"completeness: purity {_pct(c.classifier_purity_at_same_completeness)}")
    if e.sky is not None:
        lines.extend(_sky_lines(e))
    return "\n".join(lines)
