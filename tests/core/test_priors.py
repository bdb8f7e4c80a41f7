"""Tests of selector.core.priors: prior shift of posteriors and EM estimates of the sky's class mix.

The reference values come from outside the module: Gaussian mixtures whose posteriors follow from
Bayes' theorem with scipy.stats.norm densities, the prior-shift formula and EM of Saerens,
Latinne & Decaestecker 2002 (Neural Computation 14, 21), the Cramér–Rao bound of a mixture
weight computed by quadrature (common practice), and scikit-learn's balanced class weights.
"""

import numpy as np
import pytest
from scipy import integrate
from scipy.stats import norm
from sklearn.utils.class_weight import compute_class_weight

from selector.core import priors
from selector.errors import ConfigError, InputError

# Class-conditional densities (mean, sd) of invented one-feature mixtures.
TWO = [(3.0, 1.0), (0.0, 1.0)]
THREE = [(3.0, 1.0), (0.0, 1.5), (-2.0, 0.7)]


def _posterior(x, comps, mix):
    """Bayes' theorem with scipy.stats.norm class densities: the exact posterior at class mix ``mix``."""
    like = np.column_stack([norm.pdf(x, m, s) for m, s in comps]) * np.asarray(mix)
    return like / like.sum(axis=1, keepdims=True)


def _draw(rng, n, comps, mix):
    y = rng.choice(len(comps), size=n, p=mix)
    mean = np.array([m for m, _ in comps])[y]
    sd = np.array([s for _, s in comps])[y]
    return rng.normal(mean, sd), y


def _mixture_weight_crb(comps, pi, n):
    """Standard deviation bound for the weight of class 0 in a two-class mixture (Cramér–Rao; common practice)."""
    (m1, s1), (m0, s0) = comps

    def integrand(x):
        f1, f0 = norm.pdf(x, m1, s1), norm.pdf(x, m0, s0)
        return (f1 - f0) ** 2 / (pi * f1 + (1 - pi) * f0)

    info, _ = integrate.quad(integrand, -15, 20, limit=200)
    return 1.0 / np.sqrt(n * info)


@pytest.mark.parametrize("comps, train, sky", [
    (TWO, [0.5, 0.5], [0.02, 0.98]),
    (TWO, [0.3, 0.7], [1e-4, 1 - 1e-4]),
    (THREE, [1 / 3, 1 / 3, 1 / 3], [0.02, 0.7, 0.28]),
    (THREE, [0.3, 0.5, 0.2], [1e-4, 0.9, 0.0999]),
])
def test_adjusted_posterior_equals_bayes_at_the_new_mix(comps, train, sky):
    # Saerens et al. 2002: p'(c|x) ∝ p(c|x)·π'_c/π_c equals the posterior computed directly at π'.
    x = np.linspace(-6, 8, 301)
    got = priors.adjust_posteriors(_posterior(x, comps, train), train, sky)
    np.testing.assert_allclose(got, _posterior(x, comps, sky), rtol=1e-10, atol=1e-15)


def test_zeros_are_handled_without_nan():
    # Definition (Saerens et al. 2002 formula): a class with sky prior zero gets zero; zeros in
    # proba stay zero; a row with all mass on an excluded class falls back to the sky prior
    # (documented choice).
    proba = np.array([[0.0, 1.0, 0.0], [0.2, 0.3, 0.5], [0.0, 0.0, 1.0], [1.0, 0.0, 0.0]])
    sky = np.array([0.1, 0.9, 0.0])
    got = priors.adjust_posteriors(proba, [0.3, 0.3, 0.4], sky)
    assert np.all(np.isfinite(got))
    np.testing.assert_allclose(got.sum(axis=1), 1.0)
    np.testing.assert_array_equal(got[:, 2], 0.0)
    np.testing.assert_allclose(got[0], [0.0, 1.0, 0.0])
    np.testing.assert_allclose(got[2], sky)
    np.testing.assert_allclose(got[3], [1.0, 0.0, 0.0])
    # Very unequal weights neither overflow nor underflow.
    tiny = priors.adjust_posteriors([[1e-300, 1.0]], [1e-12, 1.0 - 1e-12], [0.5, 0.5])
    assert np.all(np.isfinite(tiny)) and tiny[0, 0] > 0


def test_same_prior_is_the_identity():
    # From the formula: π' = π gives weights one.
    p = np.random.default_rng(3).dirichlet([1, 1, 1], size=50)
    np.testing.assert_allclose(priors.adjust_posteriors(p, [0.2, 0.3, 0.5], [0.2, 0.3, 0.5]), p)


def test_bad_arguments_raise_one_line_errors():
    with pytest.raises(InputError):
        priors.adjust_posteriors([[0.5, -0.1]], [0.5, 0.5], [0.5, 0.5])
    with pytest.raises(InputError):
        priors.adjust_posteriors([[0.5, np.nan]], [0.5, 0.5], [0.5, 0.5])
    with pytest.raises(ConfigError):
        priors.adjust_posteriors([[0.5, 0.5]], [0.0, 1.0], [0.5, 0.5])
    with pytest.raises(ConfigError):
        priors.adjust_posteriors([[0.5, 0.5]], [0.5, 0.5], [0.2, 0.3, 0.5])
    with pytest.raises(ConfigError):
        priors.estimate_priors_em([[0.5, 0.5]], [0.5, 0.5], max_iter=0)


def test_em_recovers_a_rare_class_prior():
    # Saerens et al. 2002 EM on a mixture with true sky prior 0.02 for class 0, 20 000 rows,
    # posteriors computed analytically at the training prior 1/2. The estimate is a maximum
    # likelihood one, so it scatters about the truth by the Cramér–Rao bound, which exceeds the
    # binomial error √(π(1−π)/n) because the classes overlap.
    rng = np.random.default_rng(20020101)
    n, true = 20_000, 0.02
    x, _ = _draw(rng, n, TWO, [true, 1 - true])
    est = priors.estimate_priors_em(_posterior(x, TWO, [0.5, 0.5]), [0.5, 0.5])
    sigma = _mixture_weight_crb(TWO, true, n)
    binomial = np.sqrt(true * (1 - true) / n)
    assert sigma >= binomial
    assert est.converged
    assert abs(est.priors[0] - true) < 4 * sigma
    # Fixed point of the EM (Saerens et al. 2002): prior = mean adjusted posterior.
    np.testing.assert_allclose(est.posteriors.mean(axis=0), est.priors, atol=1e-6)
    # The adjusted posteriors are the Bayes posteriors at the estimated mix.
    np.testing.assert_allclose(est.posteriors, _posterior(x, TWO, est.priors), atol=1e-9)


def test_em_recovers_a_three_class_prior():
    rng = np.random.default_rng(7)
    n, true = 20_000, np.array([0.02, 0.7, 0.28])
    x, _ = _draw(rng, n, THREE, true)
    est = priors.estimate_priors_em(_posterior(x, THREE, [1 / 3] * 3), [1 / 3] * 3)
    assert est.converged
    # Five binomial errors each: the overlap of the classes widens the scatter somewhat (bound
    # checked in the two-class test).
    np.testing.assert_array_less(np.abs(est.priors - true), 5 * np.sqrt(true * (1 - true) / n) + 0.003)


def test_em_stays_at_an_already_correct_prior():
    # When the unlabelled rows have the training mix, the EM answer is that mix within the
    # Cramér–Rao scatter, from the training prior and from the true prior as starting points.
    rng = np.random.default_rng(11)
    n = 20_000
    x, _ = _draw(rng, n, TWO, [0.5, 0.5])
    p = _posterior(x, TWO, [0.5, 0.5])
    sigma = _mixture_weight_crb(TWO, 0.5, n)
    for init in (None, [0.5, 0.5]):
        est = priors.estimate_priors_em(p, [0.5, 0.5], init=init)
        assert est.converged
        assert abs(est.priors[0] - 0.5) < 4 * sigma
    # Starting on the answer, EM stops at once.
    again = priors.estimate_priors_em(p, [0.5, 0.5], init=est.priors)
    assert again.converged and again.n_iter <= 2


def test_em_reports_non_convergence():
    rng = np.random.default_rng(1)
    x, _ = _draw(rng, 2000, TWO, [0.02, 0.98])
    est = priors.estimate_priors_em(_posterior(x, TWO, [0.5, 0.5]), [0.5, 0.5], max_iter=2, tol=1e-12)
    assert not est.converged and est.n_iter == 2


def test_binned_estimates_follow_each_bin_and_tiny_bins_fall_back():
    # Two bins with different sky mixes; each is recovered within its Cramér–Rao scatter
    # (Saerens et al. 2002 EM per stratum). A third bin of 50 rows (< min_count) gets the
    # global estimate.
    rng = np.random.default_rng(5)
    sizes, truths = [12_000, 12_000, 50], [0.01, 0.05, 0.3]
    xs, bins = [], []
    for j, (n, t) in enumerate(zip(sizes, truths)):
        x, _ = _draw(rng, n, TWO, [t, 1 - t])
        xs.append(x)
        bins.append(np.full(n, j))
    x, b = np.concatenate(xs), np.concatenate(bins)
    p = _posterior(x, TWO, [0.5, 0.5])
    res = priors.estimate_priors_by_bin(p, [0.5, 0.5], b, min_count=500)
    np.testing.assert_array_equal(res.counts, sizes)
    np.testing.assert_array_equal(res.fallback, [False, False, True])
    for j in (0, 1):
        assert abs(res.priors[j, 0] - truths[j]) < 4 * _mixture_weight_crb(TWO, truths[j], sizes[j])
    np.testing.assert_allclose(res.priors[2], res.global_priors)
    glob = priors.estimate_priors_em(p, [0.5, 0.5])
    np.testing.assert_allclose(res.global_priors, glob.priors)
    np.testing.assert_allclose(res.posteriors[b == 2], glob.posteriors[b == 2])
    np.testing.assert_allclose(res.posteriors[b == 0], _posterior(x[b == 0], TWO, res.priors[0]), atol=1e-9)


def test_binned_estimates_with_per_bin_training_mix():
    # When the labelled mix differs between bins, the posterior in a bin refers to that bin's
    # labelled mix; adjusting from it gives the Bayes posterior at the bin's sky mix.
    rng = np.random.default_rng(9)
    train = np.array([[0.5, 0.5], [0.2, 0.8]])
    truths = [0.02, 0.08]
    xs, ps, bins = [], [], []
    for j, t in enumerate(truths):
        x, _ = _draw(rng, 15_000, TWO, [t, 1 - t])
        xs.append(x)
        ps.append(_posterior(x, TWO, train[j]))
        bins.append(np.full(len(x), j))
    x, p, b = np.concatenate(xs), np.vstack(ps), np.concatenate(bins)
    res = priors.estimate_priors_by_bin(p, train, b)
    assert not res.fallback.any()
    for j, t in enumerate(truths):
        assert abs(res.priors[j, 0] - t) < 4 * _mixture_weight_crb(TWO, t, 15_000)
    # A bin whose labels lack a class falls back.
    bad = priors.estimate_priors_by_bin(p, np.array([[0.5, 0.5], [0.0, 1.0]]), b)
    np.testing.assert_array_equal(bad.fallback, [False, True])


def test_labelled_priors_with_and_without_balanced_weights():
    labels = np.repeat([0, 1, 2], [300, 600, 100])
    np.testing.assert_allclose(priors.labelled_priors(labels, 3, class_weight=None), [0.3, 0.6, 0.1])
    # scikit-learn's "balanced" weights make every class weigh the same in total: uniform prior.
    w = compute_class_weight("balanced", classes=np.arange(3), y=labels)
    np.testing.assert_allclose(priors.labelled_priors(labels, 3, class_weight=w), [1 / 3] * 3)
    np.testing.assert_allclose(priors.labelled_priors(labels, 3, class_weight="balanced"), [1 / 3] * 3)
    np.testing.assert_allclose(priors.labelled_priors(labels, 3, class_weight=[2.0, 1.0, 1.0]),
                               np.array([600, 600, 100]) / 1300)
    with pytest.raises(ConfigError):
        priors.labelled_priors(labels, 3, class_weight="even")


def test_labelled_priors_by_bin_use_global_weights():
    labels = np.array([0, 0, 1, 1, 1, 1, 2, 0, 1])
    bins = np.array([0, 0, 0, 0, 0, 0, 0, 1, 1])
    # Counts per bin: bin 0 (2, 4, 1), bin 1 (1, 1, 0); overall (3, 5, 1); bin 2 empty.
    got = priors.labelled_priors_by_bin(labels, bins, 3, 3, class_weight=None)
    np.testing.assert_allclose(got[0], np.array([2, 4, 1]) / 7)
    np.testing.assert_allclose(got[1], [0.5, 0.5, 0.0])
    assert np.all(np.isnan(got[2]))
    w = compute_class_weight("balanced", classes=np.arange(3), y=labels)
    bal = priors.labelled_priors_by_bin(labels, bins, 3, 3, class_weight="balanced")
    expect = np.array([2, 4, 1]) * w
    np.testing.assert_allclose(bal[0], expect / expect.sum())


def test_expected_purity_and_counts_match_simulated_lists():
    # Poisson-binomial mean Σp and variance Σp(1−p) (common practice), checked by drawing the
    # list's outcomes 4000 times.
    rng = np.random.default_rng(2)
    p = rng.beta(5, 1.5, size=300)
    purity = priors.expected_purity(p)
    draws = rng.random((4000, len(p))) < p
    frac = draws.mean(axis=1)
    assert abs(purity.value - frac.mean()) < 4 * purity.error / np.sqrt(4000)
    assert abs(purity.error / frac.std() - 1) < 0.06  # sampling error of a standard deviation ≈ 1/√(2·4000)
    counts = priors.expected_counts(np.column_stack([p, 1 - p]))
    np.testing.assert_allclose(counts.value, [p.sum(), (1 - p).sum()])
    np.testing.assert_allclose(counts.error, np.sqrt(np.sum(p * (1 - p))))
    assert np.isnan(priors.expected_purity([]).value)
    with pytest.raises(InputError):
        priors.expected_purity([0.5, 1.5])
