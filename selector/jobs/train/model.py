"""Folds, the estimator, calibration and training.

Honesty of the figures:

* folds are whole sky regions (HEALPix pixels at ``classifier.group_order``, never finer than a
  tile), so neighbouring sources, which share depth, crowding and extinction, never sit on both
  sides of a split;
* every held-out prediction comes from a model that did not see the row, and the calibration
  applied to a fold is fitted on the other folds' out-of-fold predictions.

The final model is fitted on every labelled row; its calibration maps are fitted on all the
out-of-fold predictions (the scheme of scikit-learn's ``CalibratedClassifierCV`` with
``ensemble=False``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import numpy as np
import pyarrow as pa

from selector.errors import SelectorError
from selector.jobs.train.evaluation import TrainingEvaluation, evaluate
from selector.jobs.train.features import feature_matrix, zero_motion
from selector.jobs.train.labels import CLASSES, QUASAR, LabelledSet
from selector.settings.config import Config

__all__ = ["Model", "TrainOutputs", "TrainResult", "apply_calibrators", "fit_calibrators", "grouped_folds",
           "make_estimator", "raw_proba", "thread_controller", "train_labelled"]

#: Held-out rows (over all folds together) used for permutation importances: their cost grows as
#: features × repeats × rows × trees, while the ranking of the features settles with far fewer rows.
_IMPORTANCE_ROWS = 5_000
#: Rows scored at a time.
_SCORE_BLOCK_ROWS = 1 << 20


def grouped_folds(groups: np.ndarray, y: np.ndarray, n_folds: int, seed: int) -> np.ndarray:
    """Fold index of every row; all rows of a sky region share a fold, class mix kept similar.

    Parameters
    ----------
    groups : numpy.ndarray of int
        Sky region of every row.
    y : numpy.ndarray of int
        Class index of every row.
    n_folds : int
    seed : int

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
        missing = [CLASSES[c] for c in range(len(CLASSES)) if not np.any(y[fold != k] == c)]
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


def raw_proba(estimator, X: np.ndarray) -> np.ndarray:
    """Uncalibrated probabilities in :data:`CLASSES` order (a class absent from training gets zero).

    Parameters
    ----------
    estimator : fitted classifier
    X : numpy.ndarray, shape (rows, features)

    Returns
    -------
    numpy.ndarray, shape (rows, classes)
    """
    p = estimator.predict_proba(X)
    out = np.zeros((len(X), len(CLASSES)))
    out[:, np.asarray(estimator.classes_, np.int64)] = p
    return out


_EPS = 1e-6


def _logit(p: np.ndarray) -> np.ndarray:
    p = np.clip(p, _EPS, 1.0 - _EPS)
    return np.log(p / (1.0 - p))


def fit_calibrators(raw: np.ndarray, y: np.ndarray, method: str) -> list:
    """One map per class from raw to calibrated probability, fitted one class against the rest.

    Parameters
    ----------
    raw : numpy.ndarray, shape (rows, classes)
    y : numpy.ndarray of int
    method : {"sigmoid", "isotonic"}

    Returns
    -------
    list
        One fitted map per class.
    """
    from sklearn.isotonic import IsotonicRegression
    from sklearn.linear_model import LogisticRegression

    out = []
    for k in range(len(CLASSES)):
        target = (y == k).astype(np.float64)
        if method == "isotonic":
            m = IsotonicRegression(y_min=0.0, y_max=1.0, increasing=True, out_of_bounds="clip")
            m.fit(raw[:, k], target)
        else:
            m = LogisticRegression(C=1e6, max_iter=1000)
            m.fit(_logit(raw[:, k])[:, None], target.astype(np.int64))
        out.append(m)
    return out


def apply_calibrators(raw: np.ndarray, calibrators: list) -> np.ndarray:
    """Calibrated class probabilities, renormalised to sum to one (uniform where all maps give 0).

    Parameters
    ----------
    raw : numpy.ndarray, shape (rows, classes)
    calibrators : list
        From :func:`fit_calibrators`.

    Returns
    -------
    numpy.ndarray, shape (rows, classes)
    """
    from sklearn.isotonic import IsotonicRegression

    cal = np.empty_like(raw)
    for k, m in enumerate(calibrators):
        if isinstance(m, IsotonicRegression):
            cal[:, k] = m.predict(raw[:, k])
        else:
            cal[:, k] = m.predict_proba(_logit(raw[:, k])[:, None])[:, 1]
    total = cal.sum(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        cal = np.where(total > 0, cal / total, 1.0 / len(CLASSES))
    return cal


class Model:
    """A trained classifier: the boosting model, its calibration maps and its feature list.

    Parameters
    ----------
    estimator : fitted classifier
    calibrators : list
    feature_names : sequence of str
    card : dict, optional
        The model card (JSON content), once written or read.
    """

    def __init__(self, estimator, calibrators: list, feature_names: list, card: dict | None = None):
        self.estimator = estimator
        self.calibrators = calibrators
        self.feature_names = list(feature_names)
        self.card = card or {}

    def predict_proba(self, X: np.ndarray) -> np.ndarray:
        """Calibrated P(quasar), P(star), P(galaxy) for a feature matrix, shape (rows, 3)."""
        if len(X) == 0:
            return np.zeros((0, len(CLASSES)))
        return apply_calibrators(raw_proba(self.estimator, X), self.calibrators)

    def score_table(self, table: pa.Table, cfg: Config) -> np.ndarray:
        """P(quasar) of every row of a feature table; NaN for rows that fail the zero-motion test."""
        out = np.full(table.num_rows, np.nan)
        # blocks of rows bound the temporaries when a whole feature cache is scored at once
        for lo in range(0, table.num_rows, _SCORE_BLOCK_ROWS):
            part = table.slice(lo, _SCORE_BLOCK_ROWS)
            passed, plx_snr, chi2 = zero_motion(part, cfg)
            idx = np.flatnonzero(passed)
            if len(idx) == 0:
                continue
            X = feature_matrix(part.take(pa.array(idx, pa.int64())), cfg, self.feature_names, (plx_snr[idx], chi2[idx]))
            # tiles run in parallel processes; threads inside each would only compete for the cores
            with thread_controller().limit(limits=1):
                out[lo + idx] = self.predict_proba(X)[:, QUASAR]
        return out


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
    """

    model: Model
    evaluation: TrainingEvaluation
    held_out: pa.Table
    outputs: TrainOutputs | None = None


def train_labelled(cfg: Config, data: LabelledSet, log=print) -> TrainResult:
    """Cross-validate, evaluate and fit the final model on a labelled set (nothing written).

    Parameters
    ----------
    cfg : Config
    data : LabelledSet
    log : callable
        Receives a line per fold.

    Returns
    -------
    TrainResult

    Raises
    ------
    SelectorError
        Too few labels of a class, or too few sky regions for the folds.
    """
    # sums over threads round differently with the thread count, and idle threads spin on a busy
    # machine; classifier.threads = 1 (the default) avoids both
    with thread_controller().limit(limits=cfg.classifier.threads or None):
        return _train_labelled(cfg, data, log)


def _train_labelled(cfg: Config, data: LabelledSet, log) -> TrainResult:
    c = cfg.classifier
    seed = cfg.project.seed
    y, X = data.y, data.X
    counts = np.bincount(y, minlength=len(CLASSES))
    short = [CLASSES[k] for k in range(len(CLASSES)) if counts[k] < 2 * c.folds]
    if short:
        n = int(counts[CLASSES.index(short[0])])
        raise SelectorError(f"only {n} labelled sources of class {short[0]} pass the zero-motion test; training needs "
                            f"at least {2 * c.folds} of every class with classifier.folds = {c.folds}: add {short[0]} "
                            "labels (e.g. a labelled file in [classifier.labels]) or check classifier.class_map")
    fold = grouped_folds(data.groups, y, c.folds, seed)
    raw = np.zeros((len(y), len(CLASSES)))
    importances = []
    for k in range(c.folds):
        train_rows, test_rows = fold != k, fold == k
        est = make_estimator(cfg, seed).fit(X[train_rows], y[train_rows])
        raw[test_rows] = raw_proba(est, X[test_rows])
        importances.append(_importances(est, X[test_rows], y[test_rows], seed=seed + k, repeats=c.permutation_repeats,
                                        max_rows=math.ceil(_IMPORTANCE_ROWS / c.folds)))
        log(f"  fold {k + 1} of {c.folds}: trained on {int(train_rows.sum()):,d}, held out {int(test_rows.sum()):,d}")
    # the calibration applied to a fold is fitted on the other folds' out-of-fold predictions
    cal = np.zeros_like(raw)
    for k in range(c.folds):
        maps = fit_calibrators(raw[fold != k], y[fold != k], c.calibration)
        cal[fold == k] = apply_calibrators(raw[fold == k], maps)
    final = make_estimator(cfg, seed).fit(X, y)
    final_maps = fit_calibrators(raw, y, c.calibration)
    imp = np.concatenate(importances, axis=1)
    evaluation = evaluate(cfg, data, fold=fold, raw=raw, calibrated=cal, importances=imp)
    model = Model(final, final_maps, data.feature_names)
    held = pa.table({
        "astro_id": data.table.column("astro_id"),
        "tile": data.table.column("tile"),
        "region": pa.array(data.groups),
        "fold": pa.array(fold),
        "label": data.table.column("label"),
        "label_source": data.table.column("label_source"),
        **{f"p_{name}_raw": pa.array(raw[:, k]) for k, name in enumerate(CLASSES)},
        **{f"p_{name}": pa.array(cal[:, k]) for k, name in enumerate(CLASSES)},
    })
    return TrainResult(model, evaluation, held)
