"""The sky's class proportions: how a model's probabilities are moved from the labelled mix to the sky.

Which mix the calibrated probabilities refer to. The boosting model is fitted with balanced class
weights (``classifier.class_weight``), so its *raw* probabilities refer to a uniform class mix; the
calibration maps are then fitted on the unweighted out-of-fold predictions, so the *calibrated*
probabilities refer to the labels' own class frequencies,
π_c = n_c / n (:func:`selector.core.priors.labelled_priors` with ``class_weight=None``).

Which population the sky proportions π′ describe. A run scores every usable feature-cache row that
passes the zero-motion test, tile by tile; π′ is the class mix of exactly those rows. It is
estimated once, at ``selector train``, over every such row of every tile (the expectation–
maximisation of Saerens, Latinne & Decaestecker 2002, Neural Computation 14, 21), or taken from
``classifier.sky_priors``, and stored in the model file; a run then moves each row by the fixed
factors w_c = π′_c/π_c,

    p′(c|x) = p(c|x)·w_c / Σ_j p(j|x)·w_j,

which needs no other row, so tiles stay independent and the result deterministic. Training again
estimates π′ again. With ``classifier.sky_prior_bins`` the same is done per magnitude bin, with the
labelled mix *within* the bin as π (the magnitude is a model input, so the posterior in a bin refers
to the labelled mix there).

The estimate needs posteriors that did not see the row's own label: labelled rows enter the EM with
their held-out (cross-fitted) probabilities, the other rows with the final model's.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.special import logsumexp

from selector.core import schema
from selector.core.priors import (estimate_priors_by_bin, estimate_priors_em, expected_purity,
                                  labelled_priors, labelled_priors_by_bin)
from selector.errors import SelectorError

__all__ = ["PriorAdjustment", "ScoredPopulation", "band_column", "estimate_adjustment", "identity", "list_expectation",
           "log_posteriors", "move_proba", "sky_weights"]

#: EM settings: the iteration converges linearly and slowly when a class is rare, so the limit is
#: generous (each iteration costs one pass over the posteriors).
_EM_MAX_ITER = 5000
_EM_TOL = 1e-9


def band_column(band: str) -> str:
    """The feature-cache column of a binning band: an infrared label (Vega) or ``opt_<band>`` (AB)."""
    if band.startswith("opt_"):
        return schema.optical_mag_column(band[4:])
    return schema.infrared_mag_column(band)


def log_posteriors(decisions: np.ndarray, log_weights: np.ndarray | None = None) -> np.ndarray:
    """Log class probabilities from one-vs-rest calibrated log-odds, optionally moved by log weights.

    The one-vs-rest maps give q_j = σ(d_j); the class probabilities are q_j / Σ q (the
    renormalisation of :class:`selector.core.calibration.OneVsRestCalibrator`), and moved to another
    mix p′_j ∝ q_j·w_j (Saerens et al. 2002). Working with logarithms keeps distinct log-odds
    distinct where σ would round to one, so the ranking never meets floating-point ties there.

    Parameters
    ----------
    decisions : numpy.ndarray, shape (n, k)
        Calibrated log-odds d_j of every class.
    log_weights : numpy.ndarray, shape (n, k) or (k,), optional
        ln(π′_j/π_j); −inf for a class the sky mix excludes.

    Returns
    -------
    numpy.ndarray, shape (n, k)
    """
    logq = -np.logaddexp(0.0, -decisions)
    if log_weights is not None:
        logq = logq + log_weights
    with np.errstate(invalid="ignore"):
        return logq - logsumexp(logq, axis=1, keepdims=True)


@dataclass(frozen=True)
class PriorAdjustment:
    """The fixed move from the labelled mix to the sky mix, per magnitude bin.

    Attributes
    ----------
    classes : tuple of str
        The model's classes, in column order.
    train : numpy.ndarray, shape (bins, k)
        Class mix the calibrated probabilities refer to, in each bin.
    sky : numpy.ndarray, shape (bins, k)
        Class mix on the sky in each bin.
    band : str
        Binning band ("" without bins: one bin).
    edges_mag : numpy.ndarray
        Bin edges; bins are ``< e0``, ``[e0, e1)``, ..., ``≥ e_last`` and one for a missing magnitude.
    method : str
        ``"em"`` (estimated), ``"config"`` (classifier.sky_priors) or ``"labelled"`` (no estimate yet:
        the identity).
    fallback : numpy.ndarray of bool, shape (bins,)
        Bins that use the all-sky estimate.
    counts : numpy.ndarray of int, shape (bins,)
        Scored rows per bin at training.
    converged : bool
    """

    classes: tuple
    train: np.ndarray
    sky: np.ndarray
    band: str = ""
    edges_mag: np.ndarray = field(default_factory=lambda: np.zeros(0))
    method: str = "labelled"
    fallback: np.ndarray = field(default_factory=lambda: np.zeros(1, bool))
    counts: np.ndarray = field(default_factory=lambda: np.zeros(1, np.int64))
    converged: bool = True

    @property
    def n_bins(self) -> int:
        return len(self.train)

    def bin_index(self, mags) -> np.ndarray:
        """Bin of each magnitude (the last bin for a missing one); zeros without bins."""
        m = np.asarray(mags, np.float64)
        if not self.band:
            return np.zeros(len(m), np.int64)
        idx = np.digitize(np.where(np.isfinite(m), m, 0.0), self.edges_mag).astype(np.int64)
        return np.where(np.isfinite(m), idx, len(self.edges_mag) + 1)

    def log_weights(self, bins: np.ndarray) -> np.ndarray:
        """ln(π′/π) of each row's bin, shape (n, k); −inf where the sky mix excludes a class."""
        with np.errstate(divide="ignore"):
            lw = np.log(self.sky) - np.log(self.train)
        return lw[np.asarray(bins, np.int64)]

    def to_arrays(self) -> dict:
        """Plain numpy arrays for the model file (no objects of our own inside it)."""
        return {"classes": np.array(self.classes, dtype=str), "train": self.train.copy(), "sky": self.sky.copy(),
                "band": np.array(self.band, dtype=str), "edges_mag": np.asarray(self.edges_mag, np.float64).copy(),
                "method": np.array(self.method, dtype=str), "fallback": self.fallback.copy(),
                "counts": self.counts.copy(), "converged": np.array(bool(self.converged))}

    @classmethod
    def from_arrays(cls, a: dict) -> PriorAdjustment:
        """Rebuild from :meth:`to_arrays`."""
        return cls(tuple(str(x) for x in a["classes"]), np.asarray(a["train"], np.float64),
                   np.asarray(a["sky"], np.float64), str(a["band"]), np.asarray(a["edges_mag"], np.float64),
                   str(a["method"]), np.asarray(a["fallback"], bool), np.asarray(a["counts"], np.int64),
                   bool(a["converged"]))

    def to_card(self) -> dict:
        """JSON content for the model card."""
        def mix(row):
            return {c: float(v) for c, v in zip(self.classes, row)}

        out = {"method": self.method, "converged": bool(self.converged)}
        if self.band:
            labels = ([f"< {self.edges_mag[0]:g}"]
                      + [f"{a:g} to {b:g}" for a, b in zip(self.edges_mag, self.edges_mag[1:])]
                      + [f">= {self.edges_mag[-1]:g}", "missing"])
            out["band"] = self.band
            out["bins"] = [{"magnitudes": lab, "scored_rows": int(n), "uses_all_sky_estimate": bool(f),
                            "labelled_mix": mix(t), "sky": mix(s)}
                           for lab, n, f, t, s in zip(labels, self.counts, self.fallback, self.train, self.sky)]
        else:
            out["labelled_mix"] = mix(self.train[0])
            out["sky"] = mix(self.sky[0])
            out["scored_rows"] = int(self.counts[0])
        return out


def identity(classes, train_priors) -> PriorAdjustment:
    """No move: the sky mix taken equal to the labelled one (before the sky is estimated)."""
    t = np.asarray(train_priors, np.float64)[None, :]
    return PriorAdjustment(tuple(classes), t, t.copy())


@dataclass
class ScoredPopulation:
    """Every row a run scores, as the sky estimate needs it (collected by :func:`selector.jobs.train.model.score_population`).

    Attributes
    ----------
    decisions : numpy.ndarray, shape (n, k)
        The final model's calibrated log-odds (exactly what a run computes).
    em_proba : numpy.ndarray, shape (n, k)
        Labelled-mix probabilities for the estimate: held out for labelled rows, else the final model's.
    mags : numpy.ndarray, shape (n,)
        The binning band's magnitude (NaN without bins).
    other_cuts : numpy.ndarray of bool, shape (n,)
        Passes every cut of the run except the classifier threshold.
    sample : numpy.ndarray, shape (m, features)
        A seeded random sample of the rows' features, for the coverage test.
    """

    decisions: np.ndarray
    em_proba: np.ndarray
    mags: np.ndarray
    other_cuts: np.ndarray
    sample: np.ndarray

    @property
    def rows(self) -> int:
        return len(self.decisions)


def _sky_from_config(classes, given: dict, log) -> np.ndarray:
    missing = [c for c in classes if c not in given]
    if missing:
        raise SelectorError(f"classifier.sky_priors has no proportion for the model's class {missing[0]}; give one "
                            f"for each of {', '.join(classes)}")
    unused = [c for c in given if c not in classes]
    if unused:
        log(f"classifier.sky_priors: {', '.join(unused)} left out (not a class of this model); the others rescaled "
            "to sum to one")
    v = np.array([given[c] for c in classes], np.float64)
    return v / v.sum()


def estimate_adjustment(cfg, classes, y, labelled_mags, population: ScoredPopulation, *, log=print) -> PriorAdjustment:
    """The move to the sky mix: from ``classifier.sky_priors``, or estimated over the scored rows by EM.

    Parameters
    ----------
    cfg : Config
        ``classifier.sky_priors`` and ``classifier.sky_prior_bins``.
    classes : sequence of str
        The model's classes.
    y : numpy.ndarray of int
        Class index of every labelled training row.
    labelled_mags : numpy.ndarray
        The binning band's magnitude of every labelled row (ignored without bins).
    population : ScoredPopulation
    log : callable

    Returns
    -------
    PriorAdjustment
    """
    c = cfg.classifier
    k = len(classes)
    # the calibration maps are fitted on unweighted labels: the calibrated probabilities refer to the
    # label frequencies whatever the boosting's class weights were
    train = labelled_priors(y, k, class_weight=None)
    if population.rows == 0:
        raise SelectorError("no source of the feature cache passes the zero-motion test, so the sky's class "
                            "proportions cannot be estimated; check the [motion] settings")
    if c.sky_priors is not None:
        sky = _sky_from_config(classes, c.sky_priors, log)
        return PriorAdjustment(tuple(classes), train[None, :], sky[None, :], method="config",
                               counts=np.array([population.rows]))
    if c.sky_prior_bins is None:
        est = estimate_priors_em(population.em_proba, train, max_iter=_EM_MAX_ITER, tol=_EM_TOL)
        return PriorAdjustment(tuple(classes), train[None, :], est.priors[None, :], method="em",
                               counts=np.array([population.rows]), converged=bool(est.converged))
    b = c.sky_prior_bins
    edges = np.asarray(b.edges_mag, np.float64)
    shell = PriorAdjustment(tuple(classes), train[None, :], train[None, :], band=b.band, edges_mag=edges)
    n_bins = len(edges) + 2
    lab_bins = shell.bin_index(labelled_mags)
    per_bin = labelled_priors_by_bin(y, lab_bins, n_bins, k, class_weight=None)
    pop_bins = shell.bin_index(population.mags)
    est = estimate_priors_by_bin(population.em_proba, per_bin, pop_bins, n_bins=n_bins, min_count=b.min_rows,
                                 max_iter=_EM_MAX_ITER, tol=_EM_TOL)
    # the training mix each bin's posteriors are moved from, as the estimate used it: a bin without
    # every class among its labels has no usable mix of its own and is moved from a uniform one
    usable = np.all(np.isfinite(per_bin), axis=1) & np.all(np.nan_to_num(per_bin) > 0, axis=1)
    train_bins = np.where(usable[:, None], np.nan_to_num(per_bin), 1.0 / k)
    return PriorAdjustment(tuple(classes), train_bins, est.priors, band=b.band, edges_mag=edges, method="em",
                           fallback=est.fallback, counts=est.counts, converged=bool(np.all(est.converged)))


def move_proba(proba: np.ndarray, adjustment: PriorAdjustment, bins: np.ndarray) -> np.ndarray:
    """Probabilities at the labelled mix moved to the sky mix of each row's bin: p′ ∝ p·π′/π (Saerens et al. 2002)."""
    with np.errstate(divide="ignore"):
        logp = np.log(np.asarray(proba, np.float64))
    return np.exp(log_posteriors_from_logs(logp + adjustment.log_weights(bins)))


def log_posteriors_from_logs(logs: np.ndarray) -> np.ndarray:
    """Rows of log-weights normalised to log-probabilities."""
    with np.errstate(invalid="ignore"):
        return logs - logsumexp(logs, axis=1, keepdims=True)


def sky_weights(adjustment: PriorAdjustment, y: np.ndarray, labelled_bins: np.ndarray,
                population_bins: np.ndarray) -> np.ndarray:
    """Weights that make labelled rows stand for the sky: (share of the bin on the sky × π′_{b,y}) / (share among labels × π_{b,y}).

    Under a prior shift within each bin (the class-conditional feature distributions alike), these
    importance weights turn sums over labelled rows into sky averages (common practice; the
    reweighting behind Saerens et al. 2002). Without bins they are π′_y/π_y.

    Returns
    -------
    numpy.ndarray, shape (len(y),)
    """
    nb = adjustment.n_bins
    lab_share = np.bincount(labelled_bins, minlength=nb) / max(len(labelled_bins), 1)
    sky_share = np.bincount(population_bins, minlength=nb) / max(len(population_bins), 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        w = (sky_share[labelled_bins] * adjustment.sky[labelled_bins, y]) / (
            lab_share[labelled_bins] * adjustment.train[labelled_bins, y])
    return np.where(np.isfinite(w), w, 0.0)


def list_expectation(adjustment: PriorAdjustment, population: ScoredPopulation, threshold: float, quasar: int):
    """Expected purity of the default list on the sky (mean sky P(quasar) over it) and its length.

    Returns
    -------
    (selector.core.priors.Expectation, int)
    """
    bins = adjustment.bin_index(population.mags)
    logp = log_posteriors(population.decisions, adjustment.log_weights(bins))
    p = np.exp(logp[:, quasar])
    listed = population.other_cuts & (p >= threshold)
    return expected_purity(p[listed]), int(listed.sum())

