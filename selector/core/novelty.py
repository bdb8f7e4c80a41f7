"""How far rows lie from the labelled set, and whether the labels cover the candidates.

A classifier's probability for a source unlike anything it was trained on is an extrapolation, not
a measurement. :class:`NoveltyModel` says, per row, how far it lies from the labelled rows (distance
to the k-th nearest labelled neighbour in robustly standardised features, in units of the same
distance among the labelled rows themselves) and on which features it lies beyond the labelled
range. :func:`label_coverage` compares the labelled set with a candidate set feature by feature and
as a whole (a classifier two-sample test) and returns warnings that name the features where the
labels do not cover the candidates.

Pass the labelled rows you want to measure against: all labels, or only the labelled quasars if the
question is "is this candidate like the quasars we know".
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from scipy.spatial import cKDTree
from scipy.stats import ks_2samp

from selector.errors import ConfigError, InputError

__all__ = ["Coverage", "NoveltyModel", "NoveltyScore", "label_coverage"]

#: IQR of a Gaussian in units of its standard deviation: 2·Φ⁻¹(0.75).
_IQR_PER_SIGMA = 1.3489795003921634


class NoveltyScore(NamedTuple):
    """Result of :meth:`NoveltyModel.score`; row order as given."""

    distance: np.ndarray
    """Distance to the k-th nearest labelled row over the labelled rows' median of the same (1 ≈ typical)."""
    flag: np.ndarray
    """True where ``distance`` exceeds the labelled rows' ``quantile`` of it."""
    below: np.ndarray
    """(rows, features): value below every labelled value of that feature."""
    above: np.ndarray
    """(rows, features): value above every labelled value of that feature."""
    imputed: np.ndarray
    """(rows, features): value missing, replaced by the labelled median for the distance."""


def _matrix(X, name: str, n_features: int | None = None) -> np.ndarray:
    a = np.asarray(X, dtype=np.float64)
    if a.ndim != 2:
        raise InputError(f"{name} must have shape (rows, features), got {a.shape}")
    if n_features is not None and a.shape[1] != n_features:
        raise InputError(f"{name} has {a.shape[1]} features, the labelled set had {n_features}")
    if np.any(np.isinf(a)):
        raise InputError(f"{name} holds {int(np.isinf(a).sum())} infinite values (use NaN for missing)")
    return a


class NoveltyModel:
    """Distance of rows from the labelled rows' feature distribution.

    Features are standardised with the labelled rows' median and interquartile range (scaled to a
    Gaussian σ, common practice for robust scales), missing values are imputed with the labelled
    median, and each row's distance to its k-th nearest labelled neighbour is divided by the median
    of the same distance among labelled rows, where each labelled row's own point is skipped
    (k-nearest-neighbour distance as an outlier score: Ramaswamy, Rastogi & Shim 2000, SIGMOD; from
    memory). Rows whose distance exceeds the labelled rows' ``quantile`` are flagged, so rows drawn
    from the labelled distribution are flagged at a rate of about 1 − quantile.

    Parameters
    ----------
    k : int
        Neighbour rank; 5 smooths over single stray labels without blurring small groups.
    quantile : float
        Flag threshold as a quantile of the labelled rows' own distances, in (0, 1).
    """

    def __init__(self, k: int = 5, quantile: float = 0.99):
        if not (isinstance(k, (int, np.integer)) and k >= 1):
            raise ConfigError(f"k must be a positive integer, got {k!r}")
        if not (0 < quantile < 1):
            raise ConfigError(f"quantile must lie strictly between 0 and 1, got {quantile!r}")
        self.k = int(k)
        self.quantile = float(quantile)
        self.feature_names: list[str] | None = None
        self._tree = None

    # -- fitting ------------------------------------------------------------------------------

    def fit(self, X_labelled, feature_names=None) -> NoveltyModel:
        """Learn location, scale, range and the labelled distance distribution.

        Parameters
        ----------
        X_labelled : array_like, shape (n, f)
            Labelled rows; NaN marks a missing value. Needs more than k rows and at least one
            measured value per feature.
        feature_names : sequence of str, optional
            Names used by :meth:`features_outside`; default ``feature_0``, ``feature_1``, ...
        """
        X = _matrix(X_labelled, "labelled features")
        n, nf = X.shape
        if n <= self.k:
            raise InputError(f"the labelled set has {n} rows; the k-th neighbour distance needs more than k={self.k}")
        empty = np.flatnonzero(np.all(np.isnan(X), axis=0))
        if len(empty):
            raise InputError(f"labelled features {', '.join(self._names(nf, feature_names)[i] for i in empty)} "
                             "have no measured values")
        self.feature_names = self._names(nf, feature_names)
        self.center = np.nanmedian(X, axis=0)
        q75, q25 = np.nanpercentile(X, [75, 25], axis=0)
        scale = (q75 - q25) / _IQR_PER_SIGMA
        # A feature with most labelled values equal has IQR 0: fall back to the standard deviation,
        # and to one if the feature is constant (then any other value stands out, as it should).
        sd = np.nanstd(X, axis=0)
        scale = np.where(scale > 0, scale, np.where(sd > 0, sd, 1.0))
        self.scale = scale
        self.lower = np.nanmin(X, axis=0)
        self.upper = np.nanmax(X, axis=0)
        self.reference = self._standardise(X)[0]
        self._tree = cKDTree(self.reference)
        d, _ = self._tree.query(self.reference, k=self.k + 1)
        # Column 0 is the row itself (or an exact duplicate at the same zero distance).
        own = d[:, self.k]
        self.typical = float(np.median(own))
        if not self.typical > 0:
            raise InputError(f"more than half the labelled rows have {self.k} exact duplicates; "
                             "the labelled distances cannot set a scale")
        self.threshold = float(np.quantile(own / self.typical, self.quantile))
        return self

    @staticmethod
    def _names(nf: int, names) -> list[str]:
        if names is None:
            return [f"feature_{i}" for i in range(nf)]
        names = [str(x) for x in names]
        if len(names) != nf:
            raise InputError(f"{len(names)} feature names given for {nf} features")
        return names

    def _standardise(self, X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        missing = np.isnan(X)
        Z = (X - self.center) / self.scale
        Z[missing] = 0.0
        return Z, missing

    # -- scoring ------------------------------------------------------------------------------

    def score(self, X) -> NoveltyScore:
        """Distance, flag, range indicators and imputation mask for rows X, shape (n, f)."""
        if self._tree is None:
            raise ConfigError("the novelty model is not fitted yet")
        X = _matrix(X, "features", len(self.center))
        Z, missing = self._standardise(X)
        if len(Z):
            d, _ = self._tree.query(Z, k=[self.k])
            dist = d[:, 0] / self.typical
        else:
            dist = np.zeros(0)
        with np.errstate(invalid="ignore"):
            below = X < self.lower
            above = X > self.upper
        return NoveltyScore(dist, dist > self.threshold, below, above, missing)

    def features_outside(self, result: NoveltyScore) -> list[tuple[str, ...]]:
        """Per row, the names of features beyond the labelled range, with ``<`` (below) or ``>``."""
        names = np.asarray(self.feature_names, dtype=object)
        out = []
        for lo, hi in zip(result.below, result.above):
            out.append(tuple(f"{n}<" for n in names[lo]) + tuple(f"{n}>" for n in names[hi]))
        return out

    # -- storing ------------------------------------------------------------------------------

    def to_arrays(self) -> dict[str, np.ndarray]:
        """Plain arrays (for ``numpy.savez``; no pickled objects): the tree is rebuilt on loading.

        Keys: ``k``, ``quantile``, ``typical``, ``threshold`` (0-d); ``center``, ``scale``,
        ``lower``, ``upper`` (f,); ``reference`` (n, f), the standardised labelled rows;
        ``feature_names`` (f,) unicode strings.
        """
        if self._tree is None:
            raise ConfigError("the novelty model is not fitted yet")
        return {"k": np.array(self.k), "quantile": np.array(self.quantile), "typical": np.array(self.typical),
                "threshold": np.array(self.threshold), "center": self.center.copy(), "scale": self.scale.copy(),
                "lower": self.lower.copy(), "upper": self.upper.copy(), "reference": self.reference.copy(),
                "feature_names": np.array(self.feature_names, dtype=str)}

    @classmethod
    def from_arrays(cls, arrays) -> NoveltyModel:
        """Rebuild a model from :meth:`to_arrays` output (a dict or an ``NpzFile``)."""
        keys = ("k", "quantile", "typical", "threshold", "center", "scale", "lower", "upper", "reference",
                "feature_names")
        missing = [k for k in keys if k not in arrays]
        if missing:
            raise InputError(f"novelty model record lacks {', '.join(missing)}")
        m = cls(int(arrays["k"]), float(arrays["quantile"]))
        m.typical, m.threshold = float(arrays["typical"]), float(arrays["threshold"])
        for key in ("center", "scale", "lower", "upper"):
            setattr(m, key, np.asarray(arrays[key], dtype=np.float64))
        m.reference = np.asarray(arrays["reference"], dtype=np.float64)
        m.feature_names = [str(x) for x in arrays["feature_names"]]
        nf = len(m.center)
        if m.reference.ndim != 2 or m.reference.shape[1] != nf or len(m.feature_names) != nf or \
                any(getattr(m, key).shape != (nf,) for key in ("scale", "lower", "upper")):
            raise InputError("novelty model record has arrays of inconsistent shapes")
        m._tree = cKDTree(m.reference)
        return m


# ----------------------------------------------------------------------------------------------
# coverage of candidates by labels


class Coverage(NamedTuple):
    """Result of :func:`label_coverage`; per-feature arrays in feature order."""

    feature_names: list
    ks_statistic: np.ndarray
    ks_pvalue: np.ndarray
    outside_fraction: np.ndarray
    """Fraction of candidates (with a value) outside the labelled 1–99 % range."""
    auc: float
    """Cross-validated AUC of a classifier separating labelled from candidate rows (0.5: no difference)."""
    auc_null_sd: float
    """Standard deviation of the AUC if the two sets were alike: √((n₁+n₂+1)/(12·n₁·n₂))."""
    warnings: list


def _auc_null_sd(n1: int, n2: int) -> float:
    # Variance of the Mann–Whitney statistic over n1·n2 under the null (Mann & Whitney 1947,
    # Annals of Mathematical Statistics 18, 50).
    return float(np.sqrt((n1 + n2 + 1) / (12.0 * n1 * n2)))


def label_coverage(labelled, candidates, *, feature_names=None, ks_max: float = 0.1, alpha: float = 0.01,
                   outside_max: float = 0.05, auc_max: float = 0.6, n_folds: int = 5, max_rows: int = 5000,
                   seed: int = 0) -> Coverage:
    """Do the labelled rows cover the candidates? Per-feature and multivariate checks with warnings.

    Per feature: the two-sample Kolmogorov–Smirnov statistic (scipy.stats.ks_2samp) and the
    fraction of candidates outside the labelled 1–99 % range. As a whole: a classifier two-sample
    test (Lopez-Paz & Oquab 2017, ICLR; from memory): a small forest of randomised trees
    (Geurts, Ernst & Wehenkel 2006, Machine Learning 63, 3) separating labelled (0) from candidate
    (1) rows, scored by cross-validated AUC; 0.5 means the model cannot tell them apart.

    Thresholds, each needing both size and significance so that large sets do not warn about
    trivia and small ones do not warn about noise:

    * a feature warns when KS D > ``ks_max`` *and* p < ``alpha``. D = 0.1 means the cumulative
      distributions differ by ten percentage points somewhere: enough to change the class mix a
      classifier sees there;
    * a feature warns when more than ``outside_max`` of candidates lie outside the labelled
      1–99 % range; alike sets put about 2 % there, so 5 % is well beyond that at a few hundred
      candidates;
    * the whole set warns when AUC > ``auc_max`` *and* AUC − 0.5 > 3 × its null spread. At 0.6 a
      random candidate beats a random label only 60 % of the time: a modest shift; above it the
      probabilities should not be trusted without a look.

    Parameters
    ----------
    labelled, candidates : array_like, shape (n, f) and (m, f)
        Feature matrices; NaN marks a missing value (ignored per feature; the classifier handles
        it natively).
    feature_names : sequence of str, optional
        Names for the warnings; default ``feature_0``, ...
    n_folds : int
        Cross-validation folds for the AUC.
    max_rows : int
        Each set is subsampled (seeded) to at most this many rows for the classifier test only.
    seed : int
        Seed of the subsampling, the folds and the classifier.

    Returns
    -------
    Coverage
        ``(feature_names, ks_statistic, ks_pvalue, outside_fraction, auc, auc_null_sd, warnings)``.
    """
    from sklearn.ensemble import ExtraTreesClassifier
    from sklearn.metrics import roc_auc_score
    from sklearn.model_selection import StratifiedKFold, cross_val_predict

    A = _matrix(labelled, "labelled features")
    B = _matrix(candidates, "candidate features", A.shape[1])
    nf = A.shape[1]
    names = NoveltyModel._names(nf, feature_names)
    if not (isinstance(n_folds, (int, np.integer)) and n_folds >= 2):
        raise ConfigError(f"n_folds must be an integer of at least 2, got {n_folds!r}")
    if not (isinstance(max_rows, (int, np.integer)) and max_rows >= n_folds):
        raise ConfigError(f"max_rows must be an integer of at least n_folds, got {max_rows!r}")

    ks = np.full(nf, np.nan)
    pv = np.full(nf, np.nan)
    outside = np.full(nf, np.nan)
    warnings = []
    for j in range(nf):
        a = A[:, j][~np.isnan(A[:, j])]
        b = B[:, j][~np.isnan(B[:, j])]
        if len(a) < 2 or len(b) < 1:
            warnings.append(f"feature '{names[j]}': too few measured values to compare "
                            f"({len(a)} labelled, {len(b)} candidates)")
            continue
        # The exact p-value costs O(n·m); the asymptotic one is accurate long before that matters.
        res = ks_2samp(a, b, method="exact" if len(a) * len(b) <= 250_000 else "asymp")
        ks[j], pv[j] = res.statistic, res.pvalue
        lo, hi = np.quantile(a, [0.01, 0.99])
        outside[j] = np.mean((b < lo) | (b > hi))
        reasons = []
        if ks[j] > ks_max and pv[j] < alpha:
            reasons.append(f"distributions differ (KS D = {ks[j]:.3f}, p = {pv[j]:.1e})")
        if outside[j] > outside_max:
            reasons.append(f"{100 * outside[j]:.1f} % of candidates outside the labelled 1-99 % range "
                           f"[{lo:.4g}, {hi:.4g}]")
        if reasons:
            warnings.append(f"feature '{names[j]}': labels do not cover candidates: " + "; ".join(reasons))

    rng = np.random.default_rng(seed)
    a_rows = np.sort(rng.permutation(len(A))[:max_rows])
    b_rows = np.sort(rng.permutation(len(B))[:max_rows])
    n1, n2 = len(a_rows), len(b_rows)
    if min(n1, n2) < n_folds:
        raise InputError(f"the classifier test needs at least {n_folds} rows in each set, got {n1} labelled "
                         f"and {n2} candidates")
    X = np.vstack([A[a_rows], B[b_rows]])
    y = np.r_[np.zeros(n1, np.int64), np.ones(n2, np.int64)]
    # Randomised trees: they find shifts of any shape, take NaN as it is, and run on one thread
    # (an OpenMP model stalls on a shared, busy machine).
    model = ExtraTreesClassifier(n_estimators=50, max_depth=8, min_samples_leaf=20, class_weight="balanced",
                                 n_jobs=1, random_state=seed)
    cv = StratifiedKFold(n_splits=n_folds, shuffle=True, random_state=seed)
    p = cross_val_predict(model, X, y, cv=cv, method="predict_proba")[:, 1]
    auc = float(roc_auc_score(y, p))
    sd = _auc_null_sd(n1, n2)
    if auc > auc_max and auc - 0.5 > 3 * sd:
        order = [names[j] for j in np.argsort(-np.nan_to_num(ks, nan=-1.0), kind="stable")[:3]]
        warnings.append(f"a classifier tells candidates from labels (cross-validated AUC = {auc:.3f}, "
                        f"{(auc - 0.5) / sd:.1f} sigma from 0.5); largest KS differences: {', '.join(order)}")
    return Coverage(names, ks, pv, outside, auc, sd, warnings)
