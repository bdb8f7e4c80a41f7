"""Class proportions on the sky: moving classifier posteriors from the labelled mix to the sky's.

A classifier trained and calibrated on a labelled set returns posteriors for that set's class mix
π (the *training prior*). On the sky the mix is π′ (a quasar is about one source in ten thousand),
and if the class-conditional feature distributions are the same in both places the sky posterior is

    p′(c|x) = p(c|x)·π′_c/π_c / Σ_j p(j|x)·π′_j/π_j,

with π′ estimated from the unlabelled rows themselves by expectation–maximisation (Saerens,
Latinne & Decaestecker 2002, Neural Computation 14, 21). Without this step a list that the
labelled-mix probabilities call 98 % pure may be 80 % pure on the sky.

Which π belongs to the probabilities matters, and it is an explicit argument everywhere here: see
:func:`labelled_priors`.

Every function works on plain arrays: ``proba`` has shape (rows, classes), priors have shape
(classes,) or (bins, classes). Bad arrays raise :class:`~selector.errors.InputError`; bad priors or
settings raise :class:`~selector.errors.ConfigError`.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from selector.core.calibration import probabilities_1d
from selector.errors import ConfigError, InputError

__all__ = [
    "BinnedPriors",
    "Expectation",
    "PriorEstimate",
    "adjust_posteriors",
    "estimate_priors_by_bin",
    "estimate_priors_em",
    "expected_counts",
    "expected_purity",
    "labelled_priors",
    "labelled_priors_by_bin",
]

#: Default smallest bin (rows) that gets its own prior in :func:`estimate_priors_by_bin`.
MIN_BIN_COUNT = 500


class PriorEstimate(NamedTuple):
    """Result of :func:`estimate_priors_em`."""

    priors: np.ndarray
    """Estimated class proportions of the unlabelled rows, shape (classes,), summing to one."""
    posteriors: np.ndarray
    """Posteriors moved to :attr:`priors`, shape (rows, classes)."""
    n_iter: int
    """EM iterations performed."""
    converged: bool
    """True when the largest change of a prior fell below ``tol`` within ``max_iter`` iterations."""


class BinnedPriors(NamedTuple):
    """Result of :func:`estimate_priors_by_bin`."""

    posteriors: np.ndarray
    """Per-row posteriors moved to the prior of the row's bin, shape (rows, classes)."""
    priors: np.ndarray
    """Estimated class proportions per bin, shape (bins, classes); a fallback bin holds the global one."""
    counts: np.ndarray
    """Rows per bin, shape (bins,)."""
    fallback: np.ndarray
    """True for bins that used the global estimate (too few rows, or a zero training prior), shape (bins,)."""
    global_priors: np.ndarray
    """The estimate over all rows together, shape (classes,)."""
    converged: np.ndarray
    """EM convergence per bin (the global run's flag for fallback bins), shape (bins,)."""


class Expectation(NamedTuple):
    """An expected value with its standard deviation."""

    value: np.ndarray | float
    error: np.ndarray | float


# ----------------------------------------------------------------------------------------------
# validation


def _proba(proba) -> np.ndarray:
    p = np.asarray(proba, dtype=np.float64)
    if p.ndim != 2 or p.shape[1] < 2:
        raise InputError(f"proba must have shape (rows, classes) with at least 2 classes, got shape {p.shape}")
    if not np.all(np.isfinite(p)):
        raise InputError(f"proba holds {int(np.sum(~np.isfinite(p)))} non-finite values")
    if np.any(p < 0):
        raise InputError(f"proba holds {int(np.sum(p < 0))} negative values")
    return p


def _priors(priors, k: int, name: str, *, positive: bool) -> np.ndarray:
    """Check a prior vector (or one row per bin) and scale each row to sum to one."""
    q = np.asarray(priors, dtype=np.float64)
    if q.shape[-1:] != (k,) or q.ndim not in (1, 2):
        raise ConfigError(f"{name} must have {k} entries per row (one per class), got shape {q.shape}")
    if not np.all(np.isfinite(q)) or np.any(q < 0):
        raise ConfigError(f"{name} must be finite and non-negative, got {q.tolist()}")
    if positive and np.any(q <= 0):
        raise ConfigError(f"{name} must be positive for every class (a class the model never saw "
                          f"cannot be reweighted), got {q.tolist()}")
    total = q.sum(axis=-1, keepdims=True)
    if np.any(total <= 0):
        raise ConfigError(f"{name} must have a positive sum, got {q.tolist()}")
    return q / total


# ----------------------------------------------------------------------------------------------
# the prior shift


def _shift(p: np.ndarray, train: np.ndarray, sky: np.ndarray) -> np.ndarray:
    # Weights scaled by their largest value, so that no product overflows and a class with sky
    # prior zero gets exactly zero.
    w = sky / train
    w = w / w.max()
    q = p * w
    total = q.sum(axis=1, keepdims=True)
    # A row whose probability sits entirely on classes the sky prior excludes carries no usable
    # information: it falls back to the sky prior itself.
    out = np.divide(q, total, out=np.broadcast_to(sky, q.shape).copy(), where=total > 0)
    return out


def adjust_posteriors(proba, train_priors, sky_priors) -> np.ndarray:
    """Move posteriors from the training class mix to another class mix.

    p′(c|x) = p(c|x)·w_c / Σ_j p(j|x)·w_j with w_c = π′_c/π_c (Saerens, Latinne & Decaestecker
    2002, Neural Computation 14, 21), valid when the class-conditional feature distributions are
    the same under both mixes (prior shift).

    Parameters
    ----------
    proba : array_like, shape (n, k)
        Posteriors under the training mix; non-negative. Rows need not sum exactly to one: the
        result is renormalised.
    train_priors : array_like, shape (k,)
        Class mix the probabilities refer to (see :func:`labelled_priors`); every entry positive.
        Scaled to sum to one.
    sky_priors : array_like, shape (k,)
        Target class mix; zeros allowed (that class gets probability zero). Scaled to sum to one.

    Returns
    -------
    numpy.ndarray, shape (n, k)
        Adjusted posteriors, rows summing to one. A row with zero probability on every class the
        sky prior allows is set to the sky prior.
    """
    p = _proba(proba)
    k = p.shape[1]
    train = _priors(train_priors, k, "train_priors", positive=True)
    sky = _priors(sky_priors, k, "sky_priors", positive=False)
    if train.ndim != 1 or sky.ndim != 1:
        raise ConfigError("train_priors and sky_priors must be one vector of class proportions each")
    return _shift(p, train, sky)


def _em(p: np.ndarray, train: np.ndarray, init: np.ndarray, max_iter: int, tol: float) -> PriorEstimate:
    prior = init.copy()
    post = _shift(p, train, prior)
    for it in range(1, max_iter + 1):
        new = post.mean(axis=0)
        new = new / new.sum()
        post = _shift(p, train, new)
        step = np.max(np.abs(new - prior))
        prior = new
        if step < tol:
            return PriorEstimate(prior, post, it, True)
    return PriorEstimate(prior, post, max_iter, False)


def _check_em_settings(max_iter, tol) -> None:
    if not (isinstance(max_iter, (int, np.integer)) and max_iter >= 1):
        raise ConfigError(f"max_iter must be a positive integer, got {max_iter!r}")
    if not (np.isfinite(tol) and tol > 0):
        raise ConfigError(f"tol must be a positive number, got {tol!r}")


def estimate_priors_em(proba, train_priors, *, max_iter: int = 1000, tol: float = 1e-7,
                       init=None) -> PriorEstimate:
    """Estimate the class mix of unlabelled rows from calibrated posteriors by EM.

    Iterates π^(s+1)_c = mean_i p^(s)(c|x_i), where p^(s) are the posteriors moved to π^(s) by
    :func:`adjust_posteriors`. This is the EM of Saerens, Latinne & Decaestecker 2002 (Neural
    Computation 14, 21); it maximises the likelihood of the unlabelled rows over the mixing
    proportions. It needs well-calibrated posteriors at ``train_priors``: bias in the calibration
    becomes bias in the estimate.

    Parameters
    ----------
    proba : array_like, shape (n, k)
        Calibrated posteriors under the training mix.
    train_priors : array_like, shape (k,)
        Class mix of ``proba`` (see :func:`labelled_priors`); every entry positive.
    max_iter : int
        Upper limit on iterations. EM converges linearly and slowly when a class is very rare, so
        the default is generous; each iteration costs O(n·k).
    tol : float
        Stop when no prior changes by more than this between iterations.
    init : array_like, shape (k,), optional
        Starting prior; default ``train_priors``. A class started at zero stays at zero (EM cannot
        create a class), which is a way to declare a class absent.

    Returns
    -------
    PriorEstimate
        ``(priors, posteriors, n_iter, converged)``; at convergence ``priors`` equals the mean of
        ``posteriors`` over the rows.
    """
    p = _proba(proba)
    k = p.shape[1]
    if len(p) == 0:
        raise InputError("proba has no rows: the class mix of an empty set cannot be estimated")
    _check_em_settings(max_iter, tol)
    train = _priors(train_priors, k, "train_priors", positive=True)
    start = train if init is None else _priors(init, k, "init", positive=False)
    if train.ndim != 1 or start.ndim != 1:
        raise ConfigError("train_priors and init must be one vector of class proportions each")
    return _em(p, train, start, int(max_iter), float(tol))


def estimate_priors_by_bin(proba, train_priors, bin_index, *, n_bins: int | None = None,
                           min_count: int = MIN_BIN_COUNT, max_iter: int = 1000,
                           tol: float = 1e-7) -> BinnedPriors:
    """Estimate the class mix separately in strata (for example magnitude bins) by EM.

    The quasar fraction of the sky changes steeply with magnitude, so one global prior is too low
    at one end and too high at the other. Each bin with at least ``min_count`` rows gets its own EM
    estimate (Saerens, Latinne & Decaestecker 2002, Neural Computation 14, 21); smaller bins, and
    bins where some class has training prior zero, fall back to the global estimate.

    Which training prior goes with a bin: with features that include the binning quantity, the
    model's posterior in a bin refers to the *labelled mix within that bin*, not the global one
    (the bin's share of each class cancels only then). Pass per-bin priors from
    :func:`labelled_priors_by_bin` with shape (bins, k). A single vector (k,) is accepted and used
    for every bin, which is right only if the labelled class mix is the same in every bin.

    Parameters
    ----------
    proba : array_like, shape (n, k)
        Calibrated posteriors under the training mix.
    train_priors : array_like, shape (k,) or (bins, k)
        Global training prior, or one row per bin (zeros allowed there; such bins fall back).
    bin_index : array_like of int, shape (n,)
        Bin of each row, 0 ≤ bin < bins.
    n_bins : int, optional
        Number of bins; default the rows of a 2-D ``train_priors``, else ``max(bin_index) + 1``.
    min_count : int
        Smallest bin with its own estimate. Default 500: the estimate cannot beat the binomial
        error √(π(1−π)/n), so at π = 0.02 a bin of 500 rows gives about ±0.006 (30 %), already
        coarser than the fall of the quasar fraction across a magnitude; fewer rows give noise,
        not structure.
    max_iter, tol :
        As in :func:`estimate_priors_em`.

    Returns
    -------
    BinnedPriors
        ``(posteriors, priors, counts, fallback, global_priors, converged)``.
    """
    p = _proba(proba)
    n, k = p.shape
    _check_em_settings(max_iter, tol)
    if not (isinstance(min_count, (int, np.integer)) and min_count >= 1):
        raise ConfigError(f"min_count must be a positive integer, got {min_count!r}")
    b = np.asarray(bin_index)
    if b.shape != (n,) or not np.issubdtype(b.dtype, np.integer):
        raise InputError(f"bin_index must be {n} integers (one per row), got shape {b.shape} of {b.dtype}")
    if n and b.min() < 0:
        raise InputError(f"bin_index holds negative values (smallest {int(b.min())})")
    q = np.asarray(train_priors, dtype=np.float64)
    if q.ndim == 2:
        bins = q.shape[0] if n_bins is None else int(n_bins)
        if q.shape[0] != bins:
            raise ConfigError(f"train_priors has {q.shape[0]} rows but there are {bins} bins")
    else:
        bins = (int(b.max()) + 1 if n else 0) if n_bins is None else int(n_bins)
    if n and b.max() >= bins:
        raise InputError(f"bin_index holds {int(b.max())}, beyond the {bins} bins")
    if n == 0:
        raise InputError("proba has no rows: the class mix of an empty set cannot be estimated")

    if q.ndim == 2:
        if q.shape[1] != k or np.any(q[np.isfinite(q)] < 0) or np.any(np.isinf(q)):
            raise ConfigError(f"train_priors per bin must be non-negative with {k} columns, got shape {q.shape}")
        # A bin without labels (NaN row from labelled_priors_by_bin) cannot be used on its own.
        usable = np.all(np.isfinite(q), axis=1) & np.all(np.nan_to_num(q) > 0, axis=1)
        per_bin = np.full((bins, k), 1.0 / k)
        per_bin[usable] = _priors(q[usable], k, "train_priors", positive=True)
        global_train = None
    else:
        global_train = _priors(q, k, "train_priors", positive=True)
        per_bin = np.broadcast_to(global_train, (bins, k))
        usable = np.ones(bins, dtype=bool)

    counts = np.bincount(b, minlength=bins)
    if global_train is not None:
        glob = _em(p, global_train, global_train, int(max_iter), float(tol))
        global_priors, global_post, global_conv = glob.priors, glob.posteriors, glob.converged
    else:
        global_priors, global_post, global_conv = _em_mixed_train(p, per_bin, b, usable, max_iter=int(max_iter), tol=float(tol))

    post = global_post.copy()
    priors = np.broadcast_to(global_priors, (bins, k)).copy()
    fallback = ~usable | (counts < min_count)
    converged = np.full(bins, global_conv)
    for j in np.flatnonzero(~fallback):
        rows = b == j
        est = _em(p[rows], per_bin[j], per_bin[j], int(max_iter), float(tol))
        post[rows] = est.posteriors
        priors[j] = est.priors
        converged[j] = est.converged
    return BinnedPriors(post, priors, counts, fallback, global_priors, converged)


def _em_mixed_train(p, per_bin, b, usable, *, max_iter, tol):
    """Global EM when each row's posterior refers to its own bin's training mix.

    The global model is "the same sky mix in every bin": each row is moved from its bin's training
    prior to one shared sky prior, which is what a fallback bin then receives. Rows of bins whose
    training prior is unusable (no labels, or a class without labels) are left out of the
    estimate and moved from a uniform training prior, having no better one.
    """
    k = p.shape[1]
    train_rows = per_bin[b]
    bad = ~usable[b]
    prior = np.full(k, 1.0 / k)

    def shift(sky):
        w = sky / train_rows
        w = w / w.max(axis=1, keepdims=True)
        q = p * w
        t = q.sum(axis=1, keepdims=True)
        return np.divide(q, t, out=np.broadcast_to(sky, q.shape).copy(), where=t > 0)

    post = shift(prior)
    keep = ~bad if np.any(~bad) else np.ones(len(p), dtype=bool)
    for _ in range(max_iter):
        new = post[keep].mean(axis=0)
        new = new / new.sum()
        post = shift(new)
        step = np.max(np.abs(new - prior))
        prior = new
        if step < tol:
            return prior, post, True
    return prior, post, False


# ----------------------------------------------------------------------------------------------
# training priors from labels


def _class_weights(counts: np.ndarray, class_weight) -> np.ndarray:
    k = len(counts)
    if class_weight is None:
        return np.ones(k)
    if isinstance(class_weight, str):
        if class_weight != "balanced":
            raise ConfigError(f"class_weight must be None, 'balanced' or one weight per class, got {class_weight!r}")
        # The rule of scikit-learn's class_weight="balanced": n_rows / (n_classes · n_c).
        present = counts > 0
        w = np.zeros(k)
        w[present] = counts.sum() / (present.sum() * counts[present])
        return w
    w = np.asarray(class_weight, dtype=np.float64)
    if w.shape != (k,) or not np.all(np.isfinite(w)) or np.any(w < 0):
        raise ConfigError(f"class_weight must hold {k} finite non-negative weights, got {np.asarray(class_weight).tolist()}")
    return w


def _labels(labels, n_classes: int) -> np.ndarray:
    y = np.asarray(labels)
    if y.ndim != 1 or not np.issubdtype(y.dtype, np.integer):
        raise InputError(f"labels must be a 1-D array of class indices, got shape {y.shape} of {y.dtype}")
    if len(y) and (y.min() < 0 or y.max() >= n_classes):
        raise InputError(f"labels must lie in 0..{n_classes - 1}, found {int(y.min())}..{int(y.max())}")
    return y


def labelled_priors(labels, n_classes: int, *, class_weight) -> np.ndarray:
    """The effective class mix a model learned from its labels: π_c ∝ n_c·w_c.

    ``class_weight`` is a required keyword because it changes the answer completely: a model
    trained with balanced class weights (w_c = n/(k·n_c), the scikit-learn rule) has an effective
    training prior that is *uniform*, not the label frequencies. What counts is the prior of the
    probabilities you will adjust: if the raw model was trained with balanced weights but its
    calibration map was then fitted on unweighted labels, the calibrated probabilities refer to the
    label frequencies again (pass ``class_weight=None`` for those).

    Parameters
    ----------
    labels : array_like of int, shape (n,)
        Class index of each labelled row, 0..n_classes−1.
    n_classes : int
        Number of classes.
    class_weight : None, "balanced" or array_like of shape (n_classes,)
        Weights the model was fitted with (None: every row weight one).

    Returns
    -------
    numpy.ndarray, shape (n_classes,)
        Class mix summing to one.
    """
    y = _labels(labels, n_classes)
    counts = np.bincount(y, minlength=n_classes).astype(np.float64)
    mix = counts * _class_weights(counts, class_weight)
    if mix.sum() <= 0:
        raise InputError("no labelled rows with positive weight: the training prior is undefined")
    return mix / mix.sum()


def labelled_priors_by_bin(labels, bin_index, n_bins: int, n_classes: int, *, class_weight) -> np.ndarray:
    """The effective labelled class mix within each bin: π_{b,c} ∝ n_{b,c}·w_c.

    Class weights are those of the whole training set (as the model saw them), applied to the
    counts within each bin; see :func:`labelled_priors` for why ``class_weight`` is explicit. A bin
    without labelled rows gets a row of NaN; a class without labelled rows in a bin gets zero
    (:func:`estimate_priors_by_bin` then falls back to the global estimate for that bin).

    Returns
    -------
    numpy.ndarray, shape (n_bins, n_classes)
    """
    y = _labels(labels, n_classes)
    b = np.asarray(bin_index)
    if b.shape != y.shape or not np.issubdtype(b.dtype, np.integer):
        raise InputError(f"bin_index must be {len(y)} integers (one per label), got shape {b.shape}")
    if len(b) and (b.min() < 0 or b.max() >= n_bins):
        raise InputError(f"bin_index must lie in 0..{n_bins - 1}, found {int(b.min())}..{int(b.max())}")
    counts = np.bincount(b * n_classes + y, minlength=n_bins * n_classes).reshape(n_bins, n_classes)
    w = _class_weights(counts.sum(axis=0).astype(np.float64), class_weight)
    mix = counts * w
    total = mix.sum(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(total > 0, mix / total, np.nan)


# ----------------------------------------------------------------------------------------------
# what a list is expected to hold


def expected_purity(p_quasar) -> Expectation:
    """Expected fraction of true quasars in a list, with its standard deviation.

    If each candidate is a quasar independently with (sky-calibrated) probability p_i, the number of
    quasars has a Poisson-binomial distribution with mean Σp_i and variance Σp_i(1−p_i) (common
    practice); the purity is that count over the list length n.

    Parameters
    ----------
    p_quasar : array_like, shape (n,)
        P(quasar) of each listed candidate, after :func:`adjust_posteriors`.

    Returns
    -------
    Expectation
        ``(value, error)`` = (Σp/n, √Σp(1−p)/n); NaN for an empty list.
    """
    p = probabilities_1d(p_quasar, "probabilities")
    if len(p) == 0:
        return Expectation(float("nan"), float("nan"))
    n = len(p)
    return Expectation(float(p.sum() / n), float(np.sqrt(np.sum(p * (1.0 - p))) / n))


def expected_counts(proba) -> Expectation:
    """Expected number of members of each class in a list, with standard deviations.

    Mean Σ_i p_i,c and standard deviation √Σ_i p_i,c(1−p_i,c) per class (Poisson-binomial; common
    practice).

    Parameters
    ----------
    proba : array_like, shape (n, k) or (n,)
        Class probabilities of the listed rows (or one class's probability).

    Returns
    -------
    Expectation
        ``(value, error)``, arrays of shape (k,) (floats for 1-D input).
    """
    a = np.asarray(proba, dtype=np.float64)
    if a.ndim == 1:
        p = probabilities_1d(a, "probabilities")
        return Expectation(float(p.sum()), float(np.sqrt(np.sum(p * (1.0 - p)))))
    p = _proba(a)
    if np.any(p > 1):
        raise InputError(f"proba holds {int(np.sum(p > 1))} values above one")
    return Expectation(p.sum(axis=0), np.sqrt(np.sum(p * (1.0 - p), axis=0)))
