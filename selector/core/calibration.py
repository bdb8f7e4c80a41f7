"""Strictly monotone probability calibration, fitted leak-free, with checks of its promises.

A step-function calibration (isotonic regression) maps whole ranges of raw scores onto one value:
thousands of candidates then share one probability and their order is decided by their ids. The
maps here are smooth and *strictly* increasing, so distinct raw scores stay distinct and the
classifier's ranking survives calibration:

* ``"logistic"``: q = σ(a·logit s + c), a > 0 (Platt 1999, in: Advances in Large Margin
  Classifiers, MIT Press; here on the logit of the raw probability);
* ``"beta"``: q = σ(a·ln s − b·ln(1−s) + c), a, b > 0 (Kull, Silva Filho & Flach 2017, AISTATS,
  PMLR 54, 623), which also corrects asymmetric distortions at the two ends.

The slopes are bounded below by ``min_slope`` (> 0) so that even raw scores that carry no
information map to a strictly increasing (nearly flat, near the base rate) curve. The fit is
maximum likelihood with a weak ridge penalty on the slopes, which keeps them finite for separable
data. Every map is three floats and stores as a plain dict.

Ranking by calibrated probability can still meet ties in floating point where σ saturates (raw
scores within 1e-16 of 0 or 1); :meth:`MonotoneCalibrator.decision` returns the calibrated logit,
which never saturates, for ranking.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from scipy.optimize import minimize
from scipy.special import expit

from selector.errors import ConfigError, InputError

__all__ = [
    "CrossFitted",
    "MonotoneCalibrator",
    "OneVsRestCalibrator",
    "Reliability",
    "cross_fit_calibration",
    "probabilities_1d",
    "reliability_table",
    "tie_fraction",
]

METHODS = ("logistic", "beta")

#: Raw scores are clipped to [_TINY, 1 − 2⁻⁵³] so that logs stay finite. Only exact 0 and 1 are
#: moved: every other float64 in (0, 1) keeps a distinct logit.
_TINY = np.finfo(np.float64).tiny
_TOP = 1.0 - 2.0 ** -53


def probabilities_1d(values, name: str = "raw scores") -> np.ndarray:
    """Check that ``values`` is a 1-D array of probabilities and return it as float64.

    Parameters
    ----------
    values : array_like of float
        The probabilities.
    name : str, optional
        What they are, for the error message.

    Returns
    -------
    numpy.ndarray
        ``values`` as float64.

    Raises
    ------
    InputError
        If ``values`` is not 1-D, or a value is NaN or outside [0, 1].
    """
    s = np.asarray(values, dtype=np.float64)
    if s.ndim != 1:
        raise InputError(f"{name} must be a 1-D array, got shape {s.shape}")
    bad = ~np.isfinite(s) | (s < 0) | (s > 1)
    if np.any(bad):
        raise InputError(f"{name} must lie in [0, 1]; {int(bad.sum())} values do not")
    return s


def _log_features(s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(ln s, −ln(1−s)): the two inputs of beta calibration; their sum is logit s."""
    s = np.clip(s, _TINY, _TOP)
    return np.log(s), -np.log1p(-s)


def _binary(y, n: int) -> np.ndarray:
    y = np.asarray(y)
    if y.shape != (n,):
        raise InputError(f"outcomes must have one value per score ({n}), got shape {y.shape}")
    if y.dtype == bool:
        return y.astype(np.float64)
    yf = np.asarray(y, dtype=np.float64)
    if not np.all((yf == 0) | (yf == 1)):
        raise InputError("outcomes must be 0/1 (or boolean)")
    return yf


class MonotoneCalibrator:
    """A strictly increasing map from one raw class probability to a calibrated one.

    Parameters
    ----------
    method : {"logistic", "beta"}
        ``"logistic"``: q = σ(a·logit s + c) (Platt 1999 on the logit of the score);
        ``"beta"``: q = σ(a·ln s − b·ln(1−s) + c) (Kull, Silva Filho & Flach 2017, AISTATS).
    min_slope : float
        Lower bound on a (and b), > 0: keeps the map strictly increasing even when the fit would
        prefer a flat or decreasing curve (scores without information).
    l2 : float
        Ridge penalty on the slopes, added to the mean log-loss as l2·(a² + b²)/2. The default is
        weak (it moves a slope of order one by about l2) and only matters when the classes are
        separable, where it keeps the slopes finite.

    Attributes
    ----------
    a, b, c : float
        Fitted parameters (for ``"logistic"``, a = b is the slope on logit s and c the intercept).
    """

    def __init__(self, method: str = "logistic", *, min_slope: float = 1e-3, l2: float = 1e-4):
        if method not in METHODS:
            raise ConfigError(f"calibration method must be one of {', '.join(METHODS)}, got {method!r}")
        if not (np.isfinite(min_slope) and min_slope > 0):
            raise ConfigError(f"min_slope must be a positive number, got {min_slope!r}")
        if not (np.isfinite(l2) and l2 >= 0):
            raise ConfigError(f"l2 must be a non-negative number, got {l2!r}")
        self.method = method
        self.min_slope = float(min_slope)
        self.l2 = float(l2)
        self.a = self.b = self.c = None

    # -- fitting ------------------------------------------------------------------------------

    def fit(self, raw, outcome, sample_weight=None) -> MonotoneCalibrator:
        """Fit by penalised maximum likelihood (L-BFGS-B with the slope bounds).

        Parameters
        ----------
        raw : array_like, shape (n,)
            Raw probabilities in [0, 1] (out-of-fold predictions, never in-sample ones).
        outcome : array_like, shape (n,)
            1 where the row belongs to the class, else 0; both values must occur.
        sample_weight : array_like, shape (n,), optional
            Non-negative row weights.
        """
        s = probabilities_1d(raw)
        y = _binary(outcome, len(s))
        w = np.ones(len(s)) if sample_weight is None else np.asarray(sample_weight, dtype=np.float64)
        if w.shape != s.shape or not np.all(np.isfinite(w)) or np.any(w < 0):
            raise InputError("sample_weight must hold one finite non-negative weight per score")
        pos, neg = float(np.sum(w * y)), float(np.sum(w * (1 - y)))
        if pos <= 0 or neg <= 0:
            raise InputError(f"calibration needs rows in and out of the class (weighted: {pos:g} in, {neg:g} out)")
        w = w / w.sum()
        u, v = _log_features(s)
        if self.method == "logistic":
            X = np.column_stack([u + v, np.ones_like(u)])
            bounds = [(self.min_slope, None), (None, None)]
            start = np.array([1.0, 0.0])
            penal = np.array([1.0, 0.0])
        else:
            X = np.column_stack([u, v, np.ones_like(u)])
            bounds = [(self.min_slope, None), (self.min_slope, None), (None, None)]
            start = np.array([1.0, 1.0, 0.0])
            penal = np.array([1.0, 1.0, 0.0])
        # Start from the identity map but at the observed base rate, a sensible point for both
        # good and useless scores.
        base = pos / (pos + neg)
        start[-1] = np.log(base / (1 - base)) - float(np.sum(w * (X[:, :-1] @ start[:-1])))

        l2 = self.l2

        def loss(theta):
            z = X @ theta
            nll = np.sum(w * (np.logaddexp(0.0, z) - y * z))
            grad = X.T @ (w * (expit(z) - y))
            return nll + 0.5 * l2 * np.sum(penal * theta ** 2), grad + l2 * penal * theta

        res = minimize(loss, start, jac=True, method="L-BFGS-B", bounds=bounds,
                       options={"maxiter": 1000, "gtol": 1e-10, "ftol": 1e-15})
        theta = res.x
        if self.method == "logistic":
            self.a = self.b = float(theta[0])
            self.c = float(theta[1])
        else:
            self.a, self.b, self.c = (float(t) for t in theta)
        return self

    # -- applying -----------------------------------------------------------------------------

    def _check_fitted(self) -> None:
        if self.a is None:
            raise ConfigError("the calibration map is not fitted yet")

    def decision(self, raw) -> np.ndarray:
        """Calibrated logit a·ln s − b·ln(1−s) + c: strictly increasing, never saturates."""
        self._check_fitted()
        u, v = _log_features(probabilities_1d(raw))
        return self.a * u + self.b * v + self.c

    def transform(self, raw) -> np.ndarray:
        """Calibrated probabilities, shape (n,)."""
        return expit(self.decision(raw))

    # -- storing ------------------------------------------------------------------------------

    def to_dict(self) -> dict:
        """Plain floats for a model card: ``{"method", "a", "b", "c", "min_slope", "l2"}``."""
        self._check_fitted()
        return {"method": self.method, "a": self.a, "b": self.b, "c": self.c,
                "min_slope": self.min_slope, "l2": self.l2}

    @classmethod
    def from_dict(cls, data: dict) -> MonotoneCalibrator:
        """Rebuild a map written by :meth:`to_dict`; a damaged record raises InputError."""
        if not isinstance(data, dict):
            raise InputError(f"a calibration map must be a mapping, got {type(data).__name__}")
        missing = {"method", "a", "b", "c"} - set(data)
        if missing:
            raise InputError(f"calibration map lacks {', '.join(sorted(missing))}")
        try:
            m = cls(data["method"], min_slope=float(data.get("min_slope", 1e-3)), l2=float(data.get("l2", 1e-4)))
        except ConfigError as exc:
            raise InputError(f"calibration map: {exc}") from None
        vals = []
        for key in ("a", "b", "c"):
            v = data[key]
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not np.isfinite(v):
                raise InputError(f"calibration map: {key} must be a finite number, got {v!r}")
            vals.append(float(v))
        a, b, c = vals
        if a <= 0 or b <= 0 or (m.method == "logistic" and a != b):
            raise InputError(f"calibration map: slopes must be positive (and equal for logistic), got a={a}, b={b}")
        m.a, m.b, m.c = a, b, c
        return m


class OneVsRestCalibrator:
    """One :class:`MonotoneCalibrator` per class, then rows renormalised to sum to one.

    Each class's map is fitted on that class against the rest; the renormalisation is a smooth
    function of all the class scores, so it introduces no plateaus (no ties), though the order by
    one class's calibrated probability can differ slightly from the order by its raw score.

    Parameters
    ----------
    method, min_slope, l2 :
        Passed to every :class:`MonotoneCalibrator`.
    """

    def __init__(self, method: str = "logistic", *, min_slope: float = 1e-3, l2: float = 1e-4):
        MonotoneCalibrator(method, min_slope=min_slope, l2=l2)  # validates the settings
        self.method, self.min_slope, self.l2 = method, float(min_slope), float(l2)
        self.maps: list[MonotoneCalibrator] = []

    def fit(self, raw, labels, sample_weight=None) -> OneVsRestCalibrator:
        """Fit one map per class.

        Parameters
        ----------
        raw : array_like, shape (n, k)
            Raw class probabilities (out-of-fold).
        labels : array_like of int, shape (n,)
            Class index of each row, 0..k−1; every class must occur.
        """
        r = _raw_matrix(raw)
        y = _class_labels(labels, r.shape)
        self.maps = [MonotoneCalibrator(self.method, min_slope=self.min_slope, l2=self.l2)
                     .fit(r[:, j], y == j, sample_weight) for j in range(r.shape[1])]
        return self

    def transform(self, raw, *, normalise: bool = True) -> np.ndarray:
        """Calibrated class probabilities, shape (n, k); rows sum to one unless ``normalise=False``."""
        if not self.maps:
            raise ConfigError("the calibration maps are not fitted yet")
        r = _raw_matrix(raw)
        if r.shape[1] != len(self.maps):
            raise InputError(f"raw scores have {r.shape[1]} classes but the maps were fitted for {len(self.maps)}")
        q = np.column_stack([m.transform(r[:, j]) for j, m in enumerate(self.maps)]) if len(r) else r.copy()
        if normalise and len(q):
            q = q / q.sum(axis=1, keepdims=True)  # each q > 0 (σ of a finite value), so no zero sums
        return q

    def to_dict(self) -> dict:
        """``{"method", "min_slope", "l2", "maps": [MonotoneCalibrator.to_dict(), ...]}``, plain floats."""
        if not self.maps:
            raise ConfigError("the calibration maps are not fitted yet")
        return {"method": self.method, "min_slope": self.min_slope, "l2": self.l2,
                "maps": [m.to_dict() for m in self.maps]}

    @classmethod
    def from_dict(cls, data: dict) -> OneVsRestCalibrator:
        """Rebuild maps written by :meth:`to_dict`; a damaged record raises InputError."""
        if not isinstance(data, dict) or not isinstance(data.get("maps"), list) or len(data["maps"]) < 2:
            raise InputError("a one-vs-rest calibration record must hold 'maps', a list of at least two maps")
        try:
            out = cls(data.get("method", "logistic"), min_slope=float(data.get("min_slope", 1e-3)),
                      l2=float(data.get("l2", 1e-4)))
        except (ConfigError, TypeError, ValueError) as exc:
            raise InputError(f"calibration record: {exc}") from None
        out.maps = [MonotoneCalibrator.from_dict(m) for m in data["maps"]]
        return out


def _raw_matrix(raw) -> np.ndarray:
    r = np.asarray(raw, dtype=np.float64)
    if r.ndim != 2 or r.shape[1] < 2:
        raise InputError(f"raw scores must have shape (rows, classes) with at least 2 classes, got {r.shape}")
    bad = ~np.isfinite(r) | (r < 0) | (r > 1)
    if np.any(bad):
        raise InputError(f"raw scores must lie in [0, 1]; {int(bad.sum())} values do not")
    return r


def _class_labels(labels, shape) -> np.ndarray:
    y = np.asarray(labels)
    n, k = shape
    if y.shape != (n,) or not np.issubdtype(y.dtype, np.integer):
        raise InputError(f"labels must be {n} class indices, got shape {y.shape} of {y.dtype}")
    if n and (y.min() < 0 or y.max() >= k):
        raise InputError(f"labels must lie in 0..{k - 1}, found {int(y.min())}..{int(y.max())}")
    return y


# ----------------------------------------------------------------------------------------------
# cross-fitting


class CrossFitted(NamedTuple):
    """Result of :func:`cross_fit_calibration`."""

    held_out: np.ndarray
    """Calibrated probabilities of each row from a map fitted without the row's fold."""
    final: MonotoneCalibrator | OneVsRestCalibrator
    """The map fitted on all rows, to apply to new data."""
    fold_maps: list
    """The map used for each fold, in the order of the sorted fold ids."""
    folds: np.ndarray
    """The sorted distinct fold ids."""


def cross_fit_calibration(raw, labels, folds, *, method: str = "logistic", min_slope: float = 1e-3,
                          l2: float = 1e-4) -> CrossFitted:
    """Leak-free calibrated probabilities from out-of-fold raw predictions.

    ``raw`` must already be out-of-fold: row i predicted by a model that did not train on fold
    ``folds[i]``. The calibration map applied to fold f is then fitted on the other folds' rows
    only, so no row's own label touches its calibrated probability (cross-fitting; common
    practice, as in Chernozhukov et al. 2018, Econometrics Journal 21, C1). The final map for new
    data is fitted on all out-of-fold rows.

    Parameters
    ----------
    raw : array_like, shape (n,) or (n, k)
        Out-of-fold raw probabilities: one class (with 0/1 ``labels``) or all k classes (with class
        indices as ``labels``).
    labels : array_like, shape (n,)
        0/1 outcomes (1-D ``raw``) or class indices (2-D ``raw``).
    folds : array_like of int, shape (n,)
        Fold id of each row; at least two distinct ids.
    method, min_slope, l2 :
        As in :class:`MonotoneCalibrator`.

    Returns
    -------
    CrossFitted
        ``(held_out, final, fold_maps, folds)``.
    """
    r = np.asarray(raw, dtype=np.float64)
    f = np.asarray(folds)
    if f.shape != r.shape[:1] or not np.issubdtype(f.dtype, np.integer):
        raise InputError(f"folds must be {len(r)} integers (one per row), got shape {f.shape} of {f.dtype}")
    ids = np.unique(f)
    if len(ids) < 2:
        raise InputError(f"cross-fitting needs at least two folds, got {len(ids)}")

    def make():
        if r.ndim == 1:
            return MonotoneCalibrator(method, min_slope=min_slope, l2=l2)
        return OneVsRestCalibrator(method, min_slope=min_slope, l2=l2)

    held = np.empty_like(r)
    maps = []
    for fid in ids:
        inside = f == fid
        m = make().fit(r[~inside], np.asarray(labels)[~inside])
        held[inside] = m.transform(r[inside])
        maps.append(m)
    final = make().fit(r, labels)
    return CrossFitted(held, final, maps, ids)


# ----------------------------------------------------------------------------------------------
# checks


class Reliability(NamedTuple):
    """A reliability-diagram table, one entry per non-empty bin of predicted probability."""

    lower: np.ndarray
    upper: np.ndarray
    mean_predicted: np.ndarray
    observed: np.ndarray
    """Fraction of rows in the class."""
    count: np.ndarray
    error: np.ndarray
    """Standard deviation of ``observed`` if the predictions were right: √Σp(1−p)/count."""


def reliability_table(predicted, outcome, *, n_bins: int = 10, strategy: str = "quantile") -> Reliability:
    """Bin predicted probabilities and compare with observed class fractions.

    For calibrated predictions the observed fraction in a bin scatters about the mean predicted
    probability with standard deviation √Σp_i(1−p_i)/n (Poisson-binomial; common practice), which
    is reported as ``error`` (it stays meaningful when the observed fraction is 0 or 1).

    Parameters
    ----------
    predicted : array_like, shape (n,)
        Predicted probabilities in [0, 1].
    outcome : array_like, shape (n,)
        0/1 outcomes.
    n_bins : int
        Number of bins requested.
    strategy : {"quantile", "uniform"}
        ``"quantile"``: equal counts (edges at quantiles of ``predicted``; repeated edges from ties
        merge bins); ``"uniform"``: equal widths on [0, 1]. Empty bins are left out.

    Returns
    -------
    Reliability
        ``(lower, upper, mean_predicted, observed, count, error)``.
    """
    p = probabilities_1d(predicted, "predicted probabilities")
    y = _binary(outcome, len(p))
    if not (isinstance(n_bins, (int, np.integer)) and n_bins >= 1):
        raise ConfigError(f"n_bins must be a positive integer, got {n_bins!r}")
    if strategy == "quantile":
        edges = np.unique(np.quantile(p, np.linspace(0, 1, n_bins + 1))) if len(p) else np.array([0.0, 1.0])
        if len(edges) < 2:
            edges = np.array([edges[0], edges[0]])
    elif strategy == "uniform":
        edges = np.linspace(0.0, 1.0, n_bins + 1)
    else:
        raise ConfigError(f"strategy must be 'quantile' or 'uniform', got {strategy!r}")
    nb = len(edges) - 1
    # Right-closed last bin so that the largest value is counted.
    idx = np.clip(np.searchsorted(edges[1:-1], p, side="right"), 0, nb - 1)
    count = np.bincount(idx, minlength=nb)
    sum_p = np.bincount(idx, weights=p, minlength=nb)
    sum_y = np.bincount(idx, weights=y, minlength=nb)
    var = np.bincount(idx, weights=p * (1 - p), minlength=nb)
    keep = count > 0
    c = count[keep]
    return Reliability(edges[:-1][keep], edges[1:][keep], sum_p[keep] / c, sum_y[keep] / c, c,
                       np.sqrt(var[keep]) / c)


def tie_fraction(values) -> float:
    """Fraction of rows whose value equals at least one other row's value.

    A ranking needs this small: calibrated probabilities from the maps here should give well under
    1 % on distinct raw scores, where a step-function calibration can give most of the list.
    NaNs count as equal to each other.
    """
    v = np.asarray(values, dtype=np.float64).ravel()
    if len(v) == 0:
        return 0.0
    _, counts = np.unique(v, return_counts=True)
    return float(counts[counts > 1].sum() / len(v))
