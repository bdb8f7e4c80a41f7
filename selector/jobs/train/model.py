"""Folds, the estimator, calibration, the classes a label set supports, and training.

Honesty of the figures:

* folds are whole sky regions (HEALPix pixels at ``classifier.group_order``, never finer than a
  tile), so neighbouring sources, which share depth, crowding and extinction, never sit on both
  sides of a split;
* every held-out prediction comes from a model that did not see the row, and the calibration map
  applied to a fold is fitted on the other folds' out-of-fold predictions only (cross-fitting,
  :func:`selector.core.calibration.cross_fit_calibration`), so no row's label touches its own
  held-out probability.

The final model is fitted on every labelled row; its calibration maps are fitted on all the
out-of-fold predictions. The maps are strictly increasing (logistic or beta,
:class:`selector.core.calibration.OneVsRestCalibrator`), so distinct scores keep distinct
probabilities and the ranking has no plateaus.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from selector.core.calibration import OneVsRestCalibrator, cross_fit_calibration
from selector.core.novelty import NoveltyModel
from selector.core.selection import ModelScores, select, tile_rejects
from selector.errors import SelectorError
from selector.jobs.train.evaluation import TrainingEvaluation, evaluate
from selector.jobs.train.features import feature_matrix, zero_motion
from selector.jobs.progress import Progress
from selector.jobs.train.labels import CLASSES, QUASAR, LabelledSet, feature_cache
from selector.jobs.train.sky import (PriorAdjustment, ScoredPopulation, band_column, identity, log_posteriors)
from selector.settings.config import Config

__all__ = ["ClassPlan", "Model", "TrainOutputs", "TrainResult", "grouped_folds", "make_estimator", "plan_classes",
           "raw_proba", "score_population", "thread_controller", "train_labelled", "zero_motion_features"]

#: Held-out rows (over all folds together) used for permutation importances: their cost grows as
#: features × repeats × rows × trees, while the ranking of the features settles with far fewer rows.
_IMPORTANCE_ROWS = 5_000
#: Rows scored at a time.
_SCORE_BLOCK_ROWS = 1 << 20
#: Rows of the scored population sampled for the coverage test (it subsamples to this anyway).
_COVERAGE_ROWS = 5_000
#: Labelled rows the novelty distance is measured against at most (a seeded sample beyond): in ~30
#: dimensions a k-d tree query costs nearly one distance per reference row, so this bounds the cost
#: per scored source (at 14,000 rows it is already four times the boosting model's), while the
#: distance is normalised by the same sample's own, so it keeps its meaning.
_NOVELTY_MAX_ROWS = 20_000


def grouped_folds(groups: np.ndarray, y: np.ndarray, n_folds: int, seed: int, *, classes=CLASSES) -> np.ndarray:
    """Fold index of every row; all rows of a sky region share a fold, class mix kept similar.

    Parameters
    ----------
    groups : numpy.ndarray of int
        Sky region of every row.
    y : numpy.ndarray of int
        Class index of every row.
    n_folds : int
    seed : int
    classes : sequence of str
        Names of the class indices (for the message about a fold without a class).

    Returns
    -------
    numpy.ndarray of int64

    Raises
    ------
    SelectorError
        When there are fewer regions than folds, or a fold's training part lacks a class.
    """
    from sklearn.model_selection import StratifiedGroupKFold

    n_groups = len(np.unique(groups))
    if n_groups < n_folds:
        raise SelectorError(f"the labelled sources lie in only {n_groups} sky regions, fewer than classifier.folds = "
                            f"{n_folds}; lower classifier.folds or raise classifier.group_order")
    splitter = StratifiedGroupKFold(n_splits=n_folds, shuffle=True, random_state=seed)
    fold = np.full(len(y), -1, np.int64)
    for k, (_, test) in enumerate(splitter.split(np.zeros((len(y), 1)), y, groups)):
        fold[test] = k
    for k in range(n_folds):
        missing = [classes[c] for c in np.unique(y) if not np.any(y[fold != k] == c)]
        if missing:
            raise SelectorError(f"cross-validation fold {k + 1} would train without any source of class {missing[0]}: "
                                "those labels lie in too few sky regions; lower classifier.folds or raise "
                                "classifier.group_order")
    return fold


def make_estimator(cfg: Config, seed: int):
    """The unfitted gradient-boosting model of ``[classifier]``.

    Parameters
    ----------
    cfg : Config
    seed : int

    Returns
    -------
    sklearn.ensemble.HistGradientBoostingClassifier
    """
    from sklearn.ensemble import HistGradientBoostingClassifier

    c = cfg.classifier
    return HistGradientBoostingClassifier(
        loss="log_loss", learning_rate=c.learning_rate, max_iter=c.max_iter, max_leaf_nodes=c.max_leaf_nodes,
        min_samples_leaf=c.min_samples_leaf, l2_regularization=c.l2_regularization, early_stopping=False,
        class_weight="balanced" if c.class_weight == "balanced" else None, random_state=seed)


def raw_proba(estimator, X: np.ndarray, n_classes: int | None = None) -> np.ndarray:
    """Uncalibrated probabilities in the model's class order (a class absent from training gets zero).

    Parameters
    ----------
    estimator : fitted classifier
    X : numpy.ndarray, shape (rows, features)
    n_classes : int, optional
        Columns of the result (default: the estimator's classes).

    Returns
    -------
    numpy.ndarray, shape (rows, classes)
    """
    p = estimator.predict_proba(X)
    k = len(estimator.classes_) if n_classes is None else n_classes
    out = np.zeros((len(X), k))
    out[:, np.asarray(estimator.classes_, np.int64)] = p
    return out



@dataclass(frozen=True)
class ClassPlan:
    """The classes a label set supports, after merging or dropping classes with too few labels.

    Attributes
    ----------
    classes : tuple of str
        The model's classes, quasar first, in the order of :data:`CLASSES`.
    y : numpy.ndarray of int
        Model class of every kept labelled row.
    keep : numpy.ndarray of bool
        Labelled rows kept (rows of a dropped class are not).
    messages : tuple of str
        One line per class merged or dropped, naming it and saying why.
    """

    classes: tuple
    y: np.ndarray
    keep: np.ndarray
    messages: tuple


def plan_classes(y_labels: np.ndarray, minimum: int, *, folds: int) -> ClassPlan:
    """Decide the model's classes from the labels: any two or more, quasar always among them.

    A class other than quasar with fewer than ``minimum`` labels cannot be learnt or calibrated on
    its own: all such classes (with "other" if it is small too) are pooled into "other", which is
    kept if the pool reaches ``minimum`` and dropped otherwise.

    Parameters
    ----------
    y_labels : numpy.ndarray of int
        Index into :data:`CLASSES` of every labelled row.
    minimum : int
        Smallest number of labels of a class (``classifier.min_class_labels``; at least two per fold).
    folds : int

    Returns
    -------
    ClassPlan

    Raises
    ------
    SelectorError
        Too few quasar labels, or fewer than two classes left.
    """
    need = max(int(minimum), 2 * int(folds))
    counts = np.bincount(y_labels, minlength=len(CLASSES))
    why = (f"fewer than {need} (classifier.min_class_labels = {minimum}"
           + (f", and 2 per fold with classifier.folds = {folds}" if 2 * folds > minimum else "") + ")")
    present = [CLASSES[k] for k in range(len(CLASSES)) if counts[k] > 0]
    if len(present) < 2:
        only = present[0] if present else "none"
        raise SelectorError(f"the labels that pass the zero-motion test hold one class only ({only}, "
                            f"{int(counts.sum()):,d} sources); training needs two or more: add labels of another class "
                            "(stars, galaxies, or anything not a quasar mapped to \"other\" in classifier.class_map)")
    if counts[QUASAR] < need:
        raise SelectorError(f"only {int(counts[QUASAR]):,d} labelled quasars pass the zero-motion test, {why}: add "
                            "quasar labels (e.g. a labelled file in [classifier.labels]) or check classifier.class_map")
    other = CLASSES.index("other")
    small = [k for k in range(len(CLASSES)) if k != QUASAR and 0 < counts[k] < need]
    mapping = np.arange(len(CLASSES))
    messages = []
    if small:
        pool = set(small) | ({other} if counts[other] > 0 else set())
        pooled = int(sum(counts[k] for k in pool))
        names = [CLASSES[k] for k in small]
        if pooled >= need:
            for k in pool:
                mapping[k] = other
            for k in small:
                if k != other:
                    messages.append(f"class {CLASSES[k]}: {int(counts[k]):,d} labels, {why}: merged into other "
                                    f"({pooled:,d} labels together)")
        else:
            for k in small:
                mapping[k] = -1
            messages.append(f"class{'es' if len(names) > 1 else ''} {', '.join(names)}: "
                            f"{', '.join(f'{int(counts[k]):,d}' for k in small)} labels, {why}, and too few to make a "
                            f"class \"other\" together: dropped (their sources are left out of training)")
    mapped = mapping[y_labels]
    keep = mapped >= 0
    kept = sorted(set(mapped[keep].tolist()))
    classes = tuple(CLASSES[k] for k in kept)
    if len(classes) < 2:
        raise SelectorError(f"the labels that pass the zero-motion test leave only the class quasar "
                            f"({int(counts[QUASAR]):,d}) once the small classes are set aside ({'; '.join(messages)}); "
                            "training needs two or more classes: add labels of another class, or lower "
                            "classifier.min_class_labels")
    index = {k: i for i, k in enumerate(kept)}
    y = np.array([index[k] for k in mapped[keep].tolist()], np.int64)
    return ClassPlan(classes, y, keep, tuple(messages))


def decisions(calibration: OneVsRestCalibrator, raw: np.ndarray) -> np.ndarray:
    """Calibrated log-odds of every class, shape (rows, classes); never saturated."""
    if len(raw) == 0:
        return np.zeros((0, len(calibration.maps)))
    return np.column_stack([m.decision(raw[:, j]) for j, m in enumerate(calibration.maps)])


class Model:
    """A trained classifier: the boosting model, its calibration maps, the sky adjustment, the novelty model.

    Parameters
    ----------
    estimator : fitted classifier
    calibration : OneVsRestCalibrator
    feature_names : sequence of str
    classes : sequence of str
        The model's classes, quasar first.
    priors : PriorAdjustment, optional
        The move to the sky mix (default: none, the labelled mix).
    novelty : NoveltyModel, optional
    card : dict, optional
        The model card (JSON content), once written or read.
    redshift : RedshiftModel, optional
        The photometric-redshift part (:mod:`selector.jobs.train.redshift`), when one was fitted.
    """

    def __init__(self, estimator, calibration: OneVsRestCalibrator, feature_names, classes, *,
                 priors: PriorAdjustment | None = None, novelty: NoveltyModel | None = None,
                 card: dict | None = None, redshift=None):
        self.estimator = estimator
        self.calibration = calibration
        self.feature_names = list(feature_names)
        self.classes = tuple(classes)
        self.priors = priors
        self.novelty = novelty
        self.card = card or {}
        self.redshift = redshift

    def decisions(self, X: np.ndarray) -> np.ndarray:
        """Calibrated log-odds of every class at the labelled mix, shape (rows, classes)."""
        return decisions(self.calibration, raw_proba(self.estimator, X, len(self.classes)))

    def predict_proba(self, X: np.ndarray) -> np.ndarray:
        """Calibrated class probabilities at the labelled mix, shape (rows, classes)."""
        if len(X) == 0:
            return np.zeros((0, len(self.classes)))
        return np.exp(log_posteriors(self.decisions(X)))

    def scores(self, X: np.ndarray, mags=None) -> ModelScores:
        """Sky and labelled-mix P(quasar), the sky log-odds and the novelty of feature rows.

        Parameters
        ----------
        X : numpy.ndarray, shape (rows, features)
        mags : numpy.ndarray, optional
            The sky bins' band magnitude of every row (only with binned sky proportions).
        """
        n = len(X)
        d = self.decisions(X) if n else np.zeros((0, len(self.classes)))
        lab = log_posteriors(d)
        if self.priors is not None:
            bins = self.priors.bin_index(np.full(n, np.nan) if mags is None else mags)
            sky = log_posteriors(d, self.priors.log_weights(bins))
        else:
            sky = lab
        others = np.delete(sky, QUASAR, axis=1)
        from_logs = np.logaddexp.reduce(others, axis=1) if n else np.zeros(0)
        with np.errstate(invalid="ignore"):
            log_odds = sky[:, QUASAR] - from_logs
        if self.novelty is not None and n:
            nov = self.novelty.score(X)
            distance, beyond = nov.distance, nov.flag
        else:
            distance, beyond = np.full(n, np.nan), np.zeros(n, bool)
        return ModelScores(np.exp(sky[:, QUASAR]), np.exp(lab[:, QUASAR]), log_odds, distance, beyond)

    def _mags(self, table: pa.Table) -> np.ndarray | None:
        if self.priors is None or not self.priors.band:
            return None
        name = band_column(self.priors.band)
        if name not in table.column_names:
            return np.full(table.num_rows, np.nan)
        return table.column(name).to_numpy(zero_copy_only=False).astype(np.float64)

    def score_table(self, table: pa.Table, cfg: Config) -> ModelScores:
        """Scores of every row of a feature table; NaN (and not beyond training) for rows failing the zero-motion test."""
        n = table.num_rows
        out = [np.full(n, np.nan), np.full(n, np.nan), np.full(n, np.nan), np.full(n, np.nan), np.zeros(n, bool)]
        # blocks of rows bound the temporaries when a whole feature cache is scored at once
        for lo in range(0, n, _SCORE_BLOCK_ROWS):
            part = table.slice(lo, _SCORE_BLOCK_ROWS)
            idx, rows, X = zero_motion_features(part, cfg, self.feature_names)
            if len(idx) == 0:
                continue
            # tiles run in parallel processes; threads inside each would only compete for the cores
            with thread_controller().limit(limits=1):
                s = self.scores(X, self._mags(rows))
            for column, values in zip(out, s):
                column[lo + idx] = values
        return ModelScores(*out)


def zero_motion_features(table: pa.Table, cfg: Config,
                         feature_names) -> tuple[np.ndarray, pa.Table, np.ndarray | None]:
    """The rows of a feature table that pass the zero-motion test, and their feature matrix.

    Parameters
    ----------
    table : pyarrow.Table
        Feature-cache rows.
    cfg : Config
        The configuration (zero-motion test and feature settings).
    feature_names : sequence of str
        The model's features, in its column order.

    Returns
    -------
    tuple of (numpy.ndarray, pyarrow.Table, numpy.ndarray)
        Indices of the passing rows in ``table``, those rows, and their feature matrix; the matrix is
        None when no row passes.
    """
    passed, plx_snr, chi2 = zero_motion(table, cfg)
    idx = np.flatnonzero(passed)
    if len(idx) == 0:
        return idx, table.slice(0, 0), None
    rows = table.take(pa.array(idx, pa.int64()))
    return idx, rows, feature_matrix(rows, cfg, feature_names, (plx_snr[idx], chi2[idx]))


@lru_cache(maxsize=1)
def thread_controller():
    """The process's thread-pool controller, to bound the model's threads.

    Returns
    -------
    threadpoolctl.ThreadpoolController
    """
    # the controller sees only libraries already loaded, so the model's OpenMP runtime is loaded
    # first; the scan is slow, so it is done once per process
    import sklearn.ensemble  # noqa: F401
    from threadpoolctl import ThreadpoolController

    return ThreadpoolController()


def _importances(estimator, X, y, *, seed: int, repeats: int, max_rows: int) -> np.ndarray:
    """Drop in average precision of raw P(quasar) when each feature is shuffled: (features, repeats).

    The permutation importance of Breiman 2001 (Machine Learning 45, 5) as scikit-learn computes it,
    with the repeats of one feature stacked into a single prediction call: the cost of a call is
    dominated by walking every tree once, so this is several times faster on held-out folds of a
    few thousand rows.
    """
    from sklearn.metrics import average_precision_score

    rng = np.random.default_rng(seed)
    if len(X) > max_rows:
        pick = np.sort(rng.choice(len(X), max_rows, replace=False))
        X, y = X[pick], y[pick]
    out = np.full((X.shape[1], repeats), np.nan)
    positive = y == QUASAR
    if not positive.any() or positive.all():
        return out
    base = average_precision_score(positive, raw_proba(estimator, X)[:, QUASAR])
    n = len(X)
    for j in range(X.shape[1]):
        stacked = np.tile(X, (repeats, 1))
        for r in range(repeats):
            stacked[r * n:(r + 1) * n, j] = X[rng.permutation(n), j]
        p = raw_proba(estimator, stacked)[:, QUASAR]
        out[j] = [base - average_precision_score(positive, p[r * n:(r + 1) * n]) for r in range(repeats)]
    return out


@dataclass
class TrainOutputs:
    """Files written by ``selector train`` below ``classifier.output_folder``.

    Attributes
    ----------
    model, card, evaluation, predictions : pathlib.Path
    plots : list of pathlib.Path
        The evaluation's pictures (drawn by the presentation floor after training).
    """

    model: Path
    card: Path
    evaluation: Path
    predictions: Path
    plots: list


@dataclass
class TrainResult:
    """What :func:`train_labelled` produced.

    Attributes
    ----------
    model : Model
        The final model (all labelled rows), with its card.
    evaluation : TrainingEvaluation
        Held-out figures (written as ``evaluation.json``).
    held_out : pyarrow.Table
        Per labelled row: id, tile, region, fold, label, raw and calibrated probabilities.
    outputs : TrainOutputs or None
        Paths written (None until the model files are written).
    plan : ClassPlan
        The classes learnt and the labelled rows kept.
    held_out_proba : numpy.ndarray, shape (kept rows, classes)
        Cross-fitted calibrated probabilities at the labelled mix.
    fold : numpy.ndarray of int
        Fold of every kept labelled row.
    sky : dict
        The sky estimate's account for the card and the summary (set by :func:`selector.jobs.train.train`).
    redshift : RedshiftResult or None
        The photometric-redshift model and its held-out figures (:mod:`selector.jobs.train.redshift`),
        when fitted.
    """

    model: Model
    evaluation: TrainingEvaluation
    held_out: pa.Table
    outputs: TrainOutputs | None = None
    plan: ClassPlan | None = None
    held_out_proba: np.ndarray | None = None
    fold: np.ndarray | None = None
    sky: dict = field(default_factory=dict)
    redshift: object | None = None


def train_labelled(cfg: Config, data: LabelledSet, log=print) -> TrainResult:
    """Cross-validate, calibrate (cross-fitted), evaluate and fit the final model on a labelled set (nothing written).

    The model's sky adjustment is left at the labelled mix; :func:`selector.jobs.train.train`
    estimates the sky's proportions afterwards over the feature cache.

    Parameters
    ----------
    cfg : Config
    data : LabelledSet
    log : callable
        Receives a line per fold, and one per class merged or dropped.

    Returns
    -------
    TrainResult

    Raises
    ------
    SelectorError
        Too few labelled quasars, a single class, or too few sky regions for the folds.
    """
    # sums over threads round differently with the thread count, and idle threads spin on a busy
    # machine; classifier.threads = 1 (the default) avoids both
    with thread_controller().limit(limits=cfg.classifier.threads or None):
        return _train_labelled(cfg, data, log)


def _train_labelled(cfg: Config, data: LabelledSet, log) -> TrainResult:
    c = cfg.classifier
    seed = cfg.project.seed
    plan = plan_classes(data.y, c.min_class_labels, folds=c.folds)
    for line in plan.messages:
        log(line)
    classes, y, keep = plan.classes, plan.y, plan.keep
    X, groups = data.X[keep], data.groups[keep]
    k = len(classes)
    fold = grouped_folds(groups, y, c.folds, seed, classes=classes)
    raw = np.zeros((len(y), k))
    importances = []
    # one step per fold model and one for the final model: the fits are what takes the time
    fits = Progress("train: models fitted", c.folds + 1, unit="fits", interval_s=cfg.run.progress_interval_s,
                    log=log)
    fits.update(0)
    for f in range(c.folds):
        train_rows, test_rows = fold != f, fold == f
        est = make_estimator(cfg, seed).fit(X[train_rows], y[train_rows])
        raw[test_rows] = raw_proba(est, X[test_rows], k)
        importances.append(_importances(est, X[test_rows], y[test_rows], seed=seed + f, repeats=c.permutation_repeats,
                                        max_rows=math.ceil(_IMPORTANCE_ROWS / c.folds)))
        fits.update(f + 1, detail=f" (fold {f + 1} of {c.folds}: trained on {int(train_rows.sum()):,d}, "
                                  f"held out {int(test_rows.sum()):,d})")
    # cross-fitting: the map applied to a fold is fitted on the other folds' out-of-fold predictions
    crossed = cross_fit_calibration(raw, y, fold, method=c.calibration)
    held_d = np.zeros_like(raw)
    for fid, maps in zip(crossed.folds, crossed.fold_maps):
        rows = fold == fid
        held_d[rows] = decisions(maps, raw[rows])
    cal = np.exp(log_posteriors(held_d))
    final = make_estimator(cfg, seed).fit(X, y)
    fits.update(c.folds + 1, detail=" (final model on every labelled source)")
    fits.finish()
    imp = np.concatenate(importances, axis=1)
    train_mix = np.bincount(y, minlength=k) / len(y)
    kept = LabelledSet(data.table.filter(pa.array(keep)), X, y, groups, data.feature_names, data.group_order,
                       data.summary)
    evaluation = evaluate(cfg, kept, fold=fold, raw=raw, calibrated=cal, importances=imp, classes=classes)
    ref = np.arange(len(X))
    if len(ref) > _NOVELTY_MAX_ROWS:
        ref = np.sort(np.random.default_rng(seed).choice(len(X), _NOVELTY_MAX_ROWS, replace=False))
    novelty = NoveltyModel(k=c.novelty_neighbours, quantile=c.novelty_quantile).fit(X[ref], data.feature_names)
    model = Model(final, crossed.final, data.feature_names, classes, priors=identity(classes, train_mix),
                  novelty=novelty)
    held = pa.table({
        "astro_id": kept.table.column("astro_id"),
        "tile": kept.table.column("tile"),
        "region": pa.array(groups),
        "fold": pa.array(fold),
        "label": kept.table.column("label"),
        "model_class": pa.array([classes[j] for j in y], pa.string()),
        "label_source": kept.table.column("label_source"),
        **{f"p_{name}_raw": pa.array(raw[:, j]) for j, name in enumerate(classes)},
        **{f"p_{name}_labelled_mix": pa.array(cal[:, j]) for j, name in enumerate(classes)},
    })
    return TrainResult(model, evaluation, held, plan=plan, held_out_proba=cal, fold=fold)


def score_population(cfg: Config, result: TrainResult, data: LabelledSet) -> ScoredPopulation:
    """Score every row a run would score (usable, zero-motion passing rows of every tile) for the sky estimate.

    Labelled rows enter with their held-out probabilities (the final model has seen their labels);
    the run's own probabilities (the final model's) are kept too, for the list the run will make.

    Parameters
    ----------
    cfg : Config
    result : TrainResult
        From :func:`train_labelled`.
    data : LabelledSet
        The labelled set ``result`` was trained on.

    Returns
    -------
    ScoredPopulation
    """
    model = result.model
    k = len(model.classes)
    keep = result.plan.keep
    lab_ids = pc.cast(data.table.column("astro_id"), pa.string()).filter(pa.array(keep)).combine_chunks()
    rng = np.random.default_rng(cfg.project.seed)
    parts_d, parts_em, parts_m, parts_cut = [], [], [], []
    sample_keys, sample_rows = np.zeros(0), np.zeros((0, len(model.feature_names)))
    for table in feature_cache(cfg):
        usable = table.filter(pa.array(~tile_rejects(table)))
        if usable.num_rows == 0:
            continue
        # every cut of the run but the classifier's threshold (a probability of one passes it)
        others = select(usable, cfg, np.ones(usable.num_rows)).passed
        idx, rows, X = zero_motion_features(usable, cfg, model.feature_names)
        if len(idx) == 0:
            continue
        with thread_controller().limit(limits=cfg.classifier.threads or None):
            d = model.decisions(X)
        em = np.exp(log_posteriors(d))
        at = pc.fill_null(pc.index_in(pc.cast(rows.column("astro_id"), pa.string()), value_set=lab_ids), -1)
        at = at.to_numpy(zero_copy_only=False)
        hit = at >= 0
        em[hit] = result.held_out_proba[at[hit]]
        parts_d.append(d)
        parts_em.append(em)
        mags = model._mags(rows)
        parts_m.append(np.full(len(idx), np.nan) if mags is None else mags)
        parts_cut.append(others[idx])
        # a seeded uniform sample over all tiles: keep the rows with the smallest random keys
        keys = np.concatenate([sample_keys, rng.random(len(idx))])
        pool = np.concatenate([sample_rows, X])
        pick = np.sort(np.argsort(keys, kind="stable")[:_COVERAGE_ROWS])
        sample_keys, sample_rows = keys[pick], pool[pick]

    def joined(parts, shape):
        return np.concatenate(parts) if parts else np.zeros(shape)

    return ScoredPopulation(joined(parts_d, (0, k)), joined(parts_em, (0, k)), joined(parts_m, (0,)),
                            joined(parts_cut, (0,)).astype(bool), sample_rows)
