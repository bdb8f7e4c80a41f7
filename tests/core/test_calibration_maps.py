"""Tests of selector.core.calibration: strictly monotone maps, cross-fitting, reliability, ties.

References from outside the module: scikit-learn's LogisticRegression as an independent fit of the
same likelihood (Platt 1999 on the logit; Kull, Silva Filho & Flach 2017, AISTATS, who note that
beta calibration is a logistic regression on ln s and −ln(1−s)), the asymptotic covariance of a
maximum-likelihood fit (common practice), binomial errors, and scikit-learn's IsotonicRegression
as the step-function calibration whose ties these maps avoid.
"""

import json

import numpy as np
import pytest
from scipy.special import expit, logit
from sklearn.isotonic import IsotonicRegression
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import roc_auc_score

from selector.core import calibration as cal
from selector.errors import ConfigError, InputError


def _platt_data(rng, n, a, c):
    s = expit(rng.normal(0.0, 2.0, n))
    y = rng.random(n) < expit(a * logit(s) + c)
    return s, y


def _beta_data(rng, n, a, b, c):
    s = rng.beta(1.2, 1.2, n)
    y = rng.random(n) < expit(a * np.log(s) - b * np.log1p(-s) + c)
    return s, y


def _mle_se(X, theta):
    """Standard errors from the inverse Fisher information of a logistic fit (common practice)."""
    p = expit(X @ theta)
    return np.sqrt(np.diag(np.linalg.inv(X.T @ (X * (p * (1 - p))[:, None]))))


@pytest.mark.parametrize("method", ["logistic", "beta"])
def test_maps_are_strictly_increasing(method):
    # The promise of the module: distinct raw scores stay distinct and in order, from good
    # scores down to useless ones (slope at its floor), including extreme scores.
    rng = np.random.default_rng(0)
    s, y = _platt_data(rng, 4000, 1.3, -0.5)
    grid = np.unique(np.r_[np.linspace(1e-6, 1 - 1e-6, 2001), 1e-15, 1e-9, 1 - 1e-9, 0.3 + 1e-12, 0.3])
    for outcome in (y, rng.random(len(s)) < 0.3):
        m = cal.MonotoneCalibrator(method).fit(s, outcome)
        assert np.all(np.diff(m.decision(grid)) > 0)
        assert np.all(np.diff(m.transform(grid)) > 0)


def test_logistic_map_recovers_known_platt_parameters():
    # Simulated data from q = σ(a·logit s + c); the fit must agree with scikit-learn's unpenalised
    # logistic regression on logit s and lie within 4 standard errors of the truth.
    rng = np.random.default_rng(1999)
    a, c = 1.7, -0.8
    s, y = _platt_data(rng, 20_000, a, c)
    m = cal.MonotoneCalibrator("logistic", l2=0.0).fit(s, y)
    ref = LogisticRegression(C=np.inf, tol=1e-10, max_iter=1000).fit(logit(s)[:, None], y)
    assert m.a == pytest.approx(ref.coef_[0, 0], abs=2e-4)
    assert m.c == pytest.approx(ref.intercept_[0], abs=2e-4)
    se = _mle_se(np.column_stack([logit(s), np.ones_like(s)]), np.array([a, c]))
    assert abs(m.a - a) < 4 * se[0] and abs(m.c - c) < 4 * se[1]
    # The default weak ridge moves the answer much less than the statistical error.
    weak = cal.MonotoneCalibrator("logistic").fit(s, y)
    assert abs(weak.a - m.a) < 0.1 * se[0]


def test_beta_map_recovers_known_parameters():
    # Kull et al. 2017: beta calibration is a logistic regression on (ln s, −ln(1−s)).
    rng = np.random.default_rng(2017)
    a, b, c = 2.0, 0.6, 0.3
    s, y = _beta_data(rng, 20_000, a, b, c)
    m = cal.MonotoneCalibrator("beta", l2=0.0).fit(s, y)
    X = np.column_stack([np.log(s), -np.log1p(-s)])
    ref = LogisticRegression(C=np.inf, tol=1e-10, max_iter=1000).fit(X, y)
    np.testing.assert_allclose([m.a, m.b, m.c], [*ref.coef_[0], ref.intercept_[0]], atol=5e-4)
    se = _mle_se(np.column_stack([X, np.ones_like(s)]), np.array([a, b, c]))
    assert np.all(np.abs(np.array([m.a, m.b, m.c]) - [a, b, c]) < 4 * se)


def test_pure_noise_scores_calibrate_to_the_base_rate_when_cross_fitted():
    # Raw scores unrelated to the outcome: held-out calibrated probabilities sit at the base rate
    # within a few binomial errors and carry no skill (held-out AUC within 4 null standard
    # deviations of 0.5; Mann & Whitney 1947 for the null spread).
    rng = np.random.default_rng(42)
    n, base = 4000, 0.3
    s = rng.random(n)
    y = (rng.random(n) < base).astype(int)
    folds = rng.integers(0, 5, n)
    res = cal.cross_fit_calibration(s, y, folds)
    binom = np.sqrt(base * (1 - base) / n)
    assert abs(res.held_out.mean() - y.mean()) < 3 * binom
    # Each fold's map is fitted on about 4/5 of the rows; under no skill its curve scatters about
    # the base rate with the maximum-likelihood covariance of (slope, intercept), carried to q by
    # the delta method (common practice).
    X = np.column_stack([logit(s), np.ones(n)])
    cov = np.linalg.inv(0.8 * base * (1 - base) * (X.T @ X))
    sd_q = base * (1 - base) * np.sqrt(np.einsum("ij,jk,ik->i", X, cov, X))
    assert np.all(np.abs(res.held_out - base) < 4 * sd_q)
    assert np.ptp(res.held_out) < 0.1  # nearly flat: the scores carry nothing
    n1, n0 = y.sum(), n - y.sum()
    assert abs(roc_auc_score(y, res.held_out) - 0.5) < 4 * np.sqrt((n + 1) / (12 * n1 * n0))


def test_cross_fitting_uses_only_the_other_folds():
    # Definition of cross-fitting (common practice): fold 0 has base rate 0.9, the others 0.1;
    # its held-out probabilities must come from the others (≈ 0.1), not from itself.
    rng = np.random.default_rng(3)
    n = 5000
    folds = np.repeat(np.arange(5), n // 5)
    s = rng.random(n)
    rate = np.where(folds == 0, 0.9, 0.1)
    y = (rng.random(n) < rate).astype(int)
    res = cal.cross_fit_calibration(s, y, folds)
    in0 = folds == 0
    assert abs(res.held_out[in0].mean() - 0.1) < 4 * np.sqrt(0.1 * 0.9 / (0.8 * n))
    # Fold k's map is the one fitted on the other folds.
    k = 2
    own = cal.MonotoneCalibrator().fit(s[folds != k], y[folds != k])
    np.testing.assert_allclose(res.held_out[folds == k], own.transform(s[folds == k]))
    np.testing.assert_allclose(res.final.transform(s), cal.MonotoneCalibrator().fit(s, y).transform(s))


def test_one_vs_rest_maps_renormalise_and_round_trip_through_json():
    rng = np.random.default_rng(4)
    n = 3000
    raw = rng.dirichlet([2, 1, 1], size=n)
    labels = np.array([rng.choice(3, p=r ** 2 / np.sum(r ** 2)) for r in raw])
    folds = rng.integers(0, 4, n)
    res = cal.cross_fit_calibration(raw, labels, folds, method="beta")
    np.testing.assert_allclose(res.held_out.sum(axis=1), 1.0)
    assert len(res.fold_maps) == 4
    record = json.loads(json.dumps(res.final.to_dict()))
    back = cal.OneVsRestCalibrator.from_dict(record)
    np.testing.assert_array_equal(back.transform(raw), res.final.transform(raw))
    # Every stored value is a plain float or string.
    assert all(type(v) in (float, str) for m in record["maps"] for v in m.values())
    with pytest.raises(InputError):
        cal.MonotoneCalibrator.from_dict({"method": "beta", "a": -1.0, "b": 1.0, "c": 0.0})
    with pytest.raises(InputError):
        cal.MonotoneCalibrator.from_dict({"method": "beta", "a": 1.0, "b": 1.0})
    with pytest.raises(InputError):
        cal.OneVsRestCalibrator.from_dict({"maps": "none"})
    with pytest.raises(ConfigError):
        cal.MonotoneCalibrator("isotonic")


def test_calibrated_scores_keep_distinct_values_where_isotonic_ties_them():
    # Step-function calibration (scikit-learn's IsotonicRegression) gives many rows one value;
    # the monotone maps keep the fraction of tied rows at that of the raw scores (zero here).
    rng = np.random.default_rng(8)
    s, y = _platt_data(rng, 5000, 1.0, 0.0)
    iso = IsotonicRegression(out_of_bounds="clip").fit(s, y).predict(s)
    assert cal.tie_fraction(iso) > 0.5
    assert cal.tie_fraction(cal.MonotoneCalibrator("beta").fit(s, y).transform(s)) < 0.01


def test_tie_fraction_on_a_known_array():
    # Counted by hand: 2, 2, 3, 3, 3 share values; 1 and 4 do not → 5 of 7 rows.
    assert cal.tie_fraction([1, 2, 2, 3, 3, 3, 4]) == pytest.approx(5 / 7)
    assert cal.tie_fraction([0.1, 0.2, 0.3]) == 0.0
    assert cal.tie_fraction([]) == 0.0


@pytest.mark.parametrize("strategy", ["quantile", "uniform"])
def test_reliability_table_of_calibrated_data(strategy):
    # Outcomes drawn with the predicted probability: the observed fraction matches the mean
    # prediction within 4 binomial errors in every bin (definition of calibration).
    rng = np.random.default_rng(10)
    p = rng.beta(1.0, 2.0, 20_000)
    y = rng.random(len(p)) < p
    t = cal.reliability_table(p, y, n_bins=10, strategy=strategy)
    assert t.count.sum() == len(p)
    assert np.all(np.abs(t.observed - t.mean_predicted) < 4 * t.error)
    assert np.all((t.mean_predicted >= t.lower) & (t.mean_predicted <= t.upper))
    if strategy == "quantile":
        assert t.count.min() >= 1990 and t.count.max() <= 2010
    # The same check fails for miscalibrated predictions (outcomes drawn with p²).
    bad = cal.reliability_table(p, rng.random(len(p)) < p ** 2, n_bins=10, strategy=strategy)
    assert np.any(np.abs(bad.observed - bad.mean_predicted) > 4 * bad.error)
