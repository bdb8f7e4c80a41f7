"""Photometric redshifts of quasars: quantile gradient boosting on the classifier's features.

``selector train`` fits, beside the classifier, three gradient-boosting regressors with the pinball
(quantile) loss at the 16th, 50th and 84th percentiles (Koenker & Bassett 1978, Econometrica 46,
33, for the loss) on the labelled quasars that carry a spectroscopic redshift (follow-up outcomes,
the labelled file's ``redshift_column``, the known objects' ``redshift`` role; in that order of
precedence). The inputs are the classifier's own features (:mod:`.features`): colours and
magnitudes, so a redshift is estimated from where the continuum's breaks and bumps fall.

The three predictions are sorted per row, so the 68 % interval is never inverted, and cut at zero.
The figures are measured on held-out sky regions (the classifier's grouped folds,
:func:`~selector.jobs.train.model.grouped_folds`, stratified by redshift tercile):

* σ_NMAD = 1.48 · median(|Δz| / (1 + z)), the normalised median absolute deviation, which equals
  the standard deviation for a Gaussian and ignores the outliers (common practice);
* the outlier fraction, |Δz| / (1 + z) > 0.15 (common practice);
* the bias, median(Δz / (1 + z)), and the share of true redshifts inside the 68 % interval.

With fewer labelled quasar redshifts than ``classifier.redshift_labels_min`` no redshift model is
fitted (and the run computes no luminosities): said in one line, not an error.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from selector.core.candidate_physics import Redshifts, photometric_bands
from selector.errors import SelectorError
from selector.jobs.train.features import feature_matrix
from selector.jobs.train.labels import LabelledSet
from selector.jobs.train.model import grouped_folds, thread_controller
from selector.settings.config import Config

__all__ = ["OUTLIER_LIMIT", "QUANTILES", "RedshiftEvaluation", "RedshiftModel", "RedshiftResult", "fit_redshift",
           "redshift_figures", "redshift_predictor", "reference_columns"]

#: Percentiles fitted: the median and the 68 % interval.
QUANTILES = (0.16, 0.5, 0.84)
#: |Δz|/(1+z) above which a photometric redshift counts as an outlier (common practice).
OUTLIER_LIMIT = 0.15
#: 1.48 = 1/Φ⁻¹(0.75): the median absolute deviation of a Gaussian times this is its σ (common practice).
NMAD_FACTOR = 1.48

#: Names of the regressors in the model archive, one per percentile of :data:`QUANTILES`.
_NAMES = tuple(f"redshift_q{round(100 * q):02d}" for q in QUANTILES)


def redshift_figures(z_true, z_pred) -> dict:
    """σ_NMAD, outlier fraction and bias of photometric against spectroscopic redshifts.

    Parameters
    ----------
    z_true, z_pred : array_like
        Spectroscopic and photometric redshifts (rows where either is not finite are left out).

    Returns
    -------
    dict
        ``rows``, ``sigma_nmad`` (1.48·median(|Δz|/(1+z))), ``outlier_fraction`` (share with
        |Δz|/(1+z) > 0.15) and ``bias`` (median(Δz/(1+z))), Δz = z_pred − z_true; NaN for no rows.
    """
    z_true = np.asarray(z_true, np.float64)
    z_pred = np.asarray(z_pred, np.float64)
    ok = np.isfinite(z_true) & np.isfinite(z_pred)
    dz = (z_pred[ok] - z_true[ok]) / (1.0 + z_true[ok])
    if dz.size == 0:
        return {"rows": 0, "sigma_nmad": float("nan"), "outlier_fraction": float("nan"), "bias": float("nan")}
    return {"rows": int(dz.size), "sigma_nmad": float(NMAD_FACTOR * np.median(np.abs(dz))),
            "outlier_fraction": float(np.mean(np.abs(dz) > OUTLIER_LIMIT)), "bias": float(np.median(dz))}


class RedshiftModel:
    """Three fitted quantile regressors and their feature list.

    Parameters
    ----------
    estimators : sequence
        Fitted regressors at :data:`QUANTILES`, in that order.
    feature_names : sequence of str
    """

    def __init__(self, estimators, feature_names):
        self.estimators = list(estimators)
        self.feature_names = list(feature_names)

    def predict(self, X: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """16th, 50th and 84th percentile redshifts, sorted per row and cut at zero."""
        if len(X) == 0:
            empty = np.zeros(0)
            return empty, empty, empty
        q = np.sort(np.stack([e.predict(X) for e in self.estimators], axis=1), axis=1)
        q = np.maximum(q, 0.0)
        return q[:, 0], q[:, 1], q[:, 2]

    def named_estimators(self) -> dict:
        """The regressors by name for the model archive's ``estimators`` (``redshift_q16``, ...)."""
        return dict(zip(_NAMES, self.estimators))

    @classmethod
    def from_named(cls, estimators: dict, feature_names) -> "RedshiftModel | None":
        """The model from an archive's named estimators; None when it has no redshift part."""
        if _NAMES[0] not in estimators:
            return None
        return cls([estimators[name] for name in _NAMES], feature_names)

    @staticmethod
    def named_ok(estimators: dict, n_features: int) -> bool:
        """Whether an archive's redshift regressors, if any, are all there and fit the feature list."""
        from sklearn.ensemble import HistGradientBoostingRegressor

        present = [name for name in _NAMES if name in estimators]
        if not present:
            return not any(str(k).startswith("redshift") for k in estimators)
        return len(present) == len(_NAMES) and all(
            type(estimators[name]) is HistGradientBoostingRegressor
            and getattr(estimators[name], "n_features_in_", None) == n_features for name in _NAMES)


@dataclass
class RedshiftEvaluation:
    """Held-out figures of the redshift model (the ``redshift`` part of the card and ``evaluation.json``)."""

    rows: int
    folds: int
    sigma_nmad: float
    outlier_fraction: float
    bias: float
    interval_coverage: float
    by_source: dict

    def to_dict(self) -> dict:
        return {"rows": self.rows, "folds": self.folds, "sigma_nmad": self.sigma_nmad,
                "outlier_fraction": self.outlier_fraction, "outlier_limit": OUTLIER_LIMIT, "bias": self.bias,
                "interval_68_coverage": self.interval_coverage, "quantiles": list(QUANTILES),
                "by_label_source": self.by_source,
                "definitions": {"sigma_nmad": "1.48 median(|dz|/(1+z))",
                                "outlier_fraction": f"share with |dz|/(1+z) > {OUTLIER_LIMIT}",
                                "bias": "median(dz/(1+z))", "dz": "photometric - spectroscopic",
                                "validation": "held-out sky regions (grouped folds)"}}

    def summary_line(self) -> str:
        return (f"photometric redshifts, held-out sky regions ({self.rows:,d} quasars): sigma_NMAD = "
                f"{self.sigma_nmad:.3f}, outliers (|dz|/(1+z) > {OUTLIER_LIMIT}) {self.outlier_fraction:.1%}, "
                f"bias {self.bias:+.3f}, true redshift inside the 68% interval {self.interval_coverage:.1%}")


@dataclass
class RedshiftResult:
    """The fitted redshift model, its held-out evaluation and predictions, and the labelled quasars.

    Attributes
    ----------
    model : RedshiftModel
        Fitted on every labelled quasar with a redshift.
    evaluation : RedshiftEvaluation
    held_out : pyarrow.Table
        ``astro_id``, ``fold``, ``label_source``, ``redshift`` (spectroscopic), ``z_phot_low``,
        ``z_phot``, ``z_phot_high`` (held-out predictions).
    reference : pyarrow.Table
        The labelled quasars' id, redshift and photometry (:func:`reference_columns`), so their
        luminosities can be drawn and compared with the candidates' under any ``[physics]``.
    """

    model: RedshiftModel
    evaluation: RedshiftEvaluation
    held_out: pa.Table
    reference: pa.Table


def reference_columns(cfg: Config) -> list[str]:
    """The columns of the labelled-quasar reference: id, position, photometry and reddening."""
    cols = ["astro_id", "ra_deg", "dec_deg"] + [b.column for b in photometric_bands(cfg)]
    return cols + (["ebv_mag"] if "ebv" in cfg.astrometric.columns else [])


def _estimator(cfg: Config, quantile: float, seed: int):
    from sklearn.ensemble import HistGradientBoostingRegressor

    c = cfg.classifier
    return HistGradientBoostingRegressor(
        loss="quantile", quantile=quantile, learning_rate=c.learning_rate, max_iter=c.max_iter,
        max_leaf_nodes=c.max_leaf_nodes, min_samples_leaf=c.min_samples_leaf, l2_regularization=c.l2_regularization,
        early_stopping=False, random_state=seed)


def _fit(cfg: Config, X: np.ndarray, z: np.ndarray, names, seed: int) -> RedshiftModel:
    return RedshiftModel([_estimator(cfg, q, seed).fit(X, z) for q in QUANTILES], names)


def fit_redshift(cfg: Config, data: LabelledSet, log=print) -> RedshiftResult | None:
    """Fit and evaluate the photometric-redshift model on the labelled quasars with redshifts.

    Parameters
    ----------
    cfg : Config
    data : LabelledSet
        With its ``label_redshift`` column (NaN where a row has no quasar redshift).
    log : callable
        Receives a line per fold, or the reason no model is fitted.

    Returns
    -------
    RedshiftResult or None
        None when fewer than ``classifier.redshift_labels_min`` quasars carry a redshift.

    Raises
    ------
    SelectorError
        The quasars with redshifts lie in too few sky regions for the folds.
    """
    # one thread by default, for the reasons of the classifier's training (classifier.threads)
    with thread_controller().limit(limits=cfg.classifier.threads or None):
        return _fit_redshift(cfg, data, log)


def _fit_redshift(cfg: Config, data: LabelledSet, log) -> RedshiftResult | None:
    c = cfg.classifier
    z_all = (data.table.column("label_redshift").to_numpy(zero_copy_only=False).astype(np.float64)
             if "label_redshift" in data.table.column_names else np.full(len(data.y), np.nan))
    rows = np.flatnonzero(np.isfinite(z_all) & (z_all > 0.0))
    if len(rows) < c.redshift_labels_min:
        log(f"photometric redshifts: only {len(rows):,d} labelled quasars carry a redshift, fewer than "
            f"classifier.redshift_labels_min = {c.redshift_labels_min}; no redshift model, so no luminosities "
            "(give redshifts: classifier.labels.redshift_column, the known objects' redshift role, or outcomes)")
        return None
    X, z, groups = data.X[rows], z_all[rows], data.groups[rows]
    seed = cfg.project.seed
    # strata: redshift terciles, so every fold trains on low, middle and high redshifts alike
    strata = np.searchsorted(np.quantile(z, [1 / 3, 2 / 3]), z, side="right").astype(np.int64)
    try:
        fold = grouped_folds(groups, strata, c.folds, seed,
                             classes=("lowest third in redshift", "middle third", "highest third"))
    except SelectorError:
        raise SelectorError(f"the {len(rows):,d} labelled quasars with a redshift lie in too few sky regions for "
                            f"classifier.folds = {c.folds} held-out folds; lower classifier.folds or raise "
                            "classifier.group_order") from None
    pred = np.full((len(rows), 3), np.nan)
    for k in range(c.folds):
        train_rows, test_rows = fold != k, fold == k
        model = _fit(cfg, X[train_rows], z[train_rows], data.feature_names, seed)
        pred[test_rows] = np.stack(model.predict(X[test_rows]), axis=1)
        log(f"  redshift fold {k + 1} of {c.folds}: trained on {int(train_rows.sum()):,d}, "
            f"held out {int(test_rows.sum()):,d}")
    final = _fit(cfg, X, z, data.feature_names, seed)
    figures = redshift_figures(z, pred[:, 1])
    sources = data.table.column("label_source").to_numpy(zero_copy_only=False)[rows].astype(str)
    by_source = {s: redshift_figures(z[sources == s], pred[sources == s, 1]) for s in sorted(set(sources))}
    evaluation = RedshiftEvaluation(rows=len(rows), folds=c.folds, sigma_nmad=figures["sigma_nmad"],
                                    outlier_fraction=figures["outlier_fraction"], bias=figures["bias"],
                                    interval_coverage=float(np.mean((z >= pred[:, 0]) & (z <= pred[:, 2]))),
                                    by_source=by_source)
    table = data.table.take(pa.array(rows, pa.int64()))
    held = pa.table({"astro_id": table.column("astro_id"), "fold": pa.array(fold),
                     "label_source": table.column("label_source"), "redshift": pa.array(z),
                     "z_phot_low": pa.array(pred[:, 0]), "z_phot": pa.array(pred[:, 1]),
                     "z_phot_high": pa.array(pred[:, 2])})
    ref_cols = [name for name in reference_columns(cfg) if name in table.column_names]
    reference = table.select(ref_cols).append_column("redshift", pa.array(z))
    return RedshiftResult(final, evaluation, held, reference)


def redshift_predictor(model: RedshiftModel, cfg: Config):
    """A function giving the photometric :class:`Redshifts` of candidate rows.

    The candidates carry the zero-motion statistics of the selection (``parallax_snr``,
    ``pm_chi2``), which are reused as features rather than recomputed.

    Parameters
    ----------
    model : RedshiftModel
    cfg : Config

    Returns
    -------
    callable
        ``predict(table) -> Redshifts`` (source ``photo`` where the median is finite).
    """

    def predict(table: pa.Table) -> Redshifts:
        stats = None
        if {"parallax_snr", "pm_chi2"} <= set(table.column_names):
            stats = tuple(table.column(n).to_numpy(zero_copy_only=False).astype(np.float64)
                          for n in ("parallax_snr", "pm_chi2"))
        X = feature_matrix(table, cfg, model.feature_names, stats)
        # tiles run in parallel processes; threads inside each would only compete for the cores
        with thread_controller().limit(limits=1):
            low, median, high = model.predict(X)
        source = np.where(np.isfinite(median), "photo", "")
        return Redshifts(low, median, high, source)

    return predict
