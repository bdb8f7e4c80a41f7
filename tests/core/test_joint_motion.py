"""Joint zero-motion test: χ² with 3 degrees of freedom on parallax and proper motion."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.special import erfc

from selector.core.joint_motion import joint_zero_motion
from selector.errors import ConfigError, InputError

ZP = -0.017


def _random_covariances(rng, n):
    """Random positive-definite 3×3 covariances with strong correlations among them."""
    a = rng.normal(size=(n, 3, 3))
    cov = a @ np.swapaxes(a, 1, 2) + 0.05 * np.eye(3)
    sig = np.sqrt(np.einsum("nii->ni", cov))
    corr = cov / (sig[:, :, None] * sig[:, None, :])
    return cov, sig, corr


def _call(x, sig, corr, **kw):
    return joint_zero_motion(x[:, 0] + ZP, sig[:, 0], x[:, 1], x[:, 2], pmra_error_mas_yr=sig[:, 1], pmdec_error_mas_yr=sig[:, 2],
                             parallax_pmra_corr=corr[:, 0, 1], parallax_pmdec_corr=corr[:, 0, 2],
                             pmra_pmdec_corr=corr[:, 1, 2], parallax_zero_point_mas=ZP, **kw)


def test_chi2_equals_explicit_inverse_per_row():
    rng = np.random.default_rng(11)
    cov, sig, corr = _random_covariances(rng, 300)
    x = rng.normal(scale=2.0, size=(300, 3))
    res = _call(x, sig, corr)
    # reference: numpy's general matrix inverse, row by row
    ref = np.array([x[i] @ np.linalg.inv(cov[i]) @ x[i] for i in range(len(x))])
    np.testing.assert_allclose(res.chi2, ref, rtol=1e-8)
    assert not res.covariance_adjusted.any()


def test_pvalue_is_chi2_three_dof():
    rng = np.random.default_rng(12)
    _, sig, corr = _random_covariances(rng, 200)
    x = rng.normal(scale=3.0, size=(200, 3))
    res = _call(x, sig, corr)
    # reference library: scipy.stats.chi2 with 3 degrees of freedom
    np.testing.assert_allclose(res.pvalue, stats.chi2.sf(res.chi2, 3), rtol=1e-12)
    # and the closed form for 3 dof, Q = erfc(sqrt(x/2)) + sqrt(2x/π) exp(−x/2)
    # (Abramowitz & Stegun 1964, ch. 26, odd-ν series; from memory)
    q = erfc(np.sqrt(res.chi2 / 2)) + np.sqrt(2 * res.chi2 / np.pi) * np.exp(-res.chi2 / 2)
    np.testing.assert_allclose(res.pvalue, q, rtol=1e-9)


def test_zero_motion_population_passes_at_nominal_rate():
    rng = np.random.default_rng(13)
    cov, sig, corr = _random_covariances(rng, 5)
    per = 2000
    chi2s, pvals = [], []
    for i in range(5):
        x = rng.multivariate_normal(np.zeros(3), cov[i], size=per)
        res = _call(x, np.repeat(sig[i:i + 1], per, 0), np.repeat(corr[i:i + 1], per, 0))
        chi2s.append(res.chi2)
        pvals.append(res.pvalue)
    chi2s = np.concatenate(chi2s)
    pvals = np.concatenate(pvals)
    n = chi2s.size
    for alpha in (0.05, 0.01):
        # binomial error of the rejected fraction (common practice)
        frac = np.mean(pvals < alpha)
        assert abs(frac - alpha) < 4 * np.sqrt(alpha * (1 - alpha) / n)
    # the χ² distribution itself, Kolmogorov–Smirnov against scipy's χ²(3)
    assert stats.kstest(chi2s, stats.chi2(3).cdf).pvalue > 1e-3


def test_error_inflation_scales_chi2_and_snr():
    rng = np.random.default_rng(14)
    _, sig, corr = _random_covariances(rng, 50)
    x = rng.normal(size=(50, 3))
    base = _call(x, sig, corr)
    infl = _call(x, sig, corr, error_inflation=2.0)
    np.testing.assert_allclose(infl.chi2, base.chi2 / 4, rtol=1e-12)
    np.testing.assert_allclose(infl.parallax_snr, base.parallax_snr / 2, rtol=1e-12)


def test_none_correlations_mean_zero_and_match_independent_sum():
    plx, pma, pmd = np.array([1.0, -0.5]), np.array([2.0, 0.3]), np.array([-1.0, 0.1])
    e = np.array([0.5, 0.2])
    res = joint_zero_motion(plx, e, pma, pmd, pmra_error_mas_yr=e, pmdec_error_mas_yr=e, parallax_zero_point_mas=0.0)
    # uncorrelated: χ² is the sum of three squared significances (definition of χ²)
    np.testing.assert_allclose(res.chi2, (plx / e) ** 2 + (pma / e) ** 2 + (pmd / e) ** 2)
    res0 = joint_zero_motion(plx, e, pma, pmd, pmra_error_mas_yr=e, pmdec_error_mas_yr=e, parallax_zero_point_mas=0.0,
                             parallax_pmra_corr=[np.nan, 0.0], parallax_pmdec_corr=0.0,
                             pmra_pmdec_corr=np.zeros(2))
    np.testing.assert_array_equal(res.chi2, res0.chi2)


def test_parallax_statistic_and_flags():
    plx = np.array([0.0, 1.0, -1.0, 0.2, np.nan]) + ZP
    e = np.full(5, 0.25)
    res = joint_zero_motion(plx, e, np.zeros(5), np.zeros(5), pmra_error_mas_yr=np.ones(5), pmdec_error_mas_yr=np.ones(5))
    np.testing.assert_allclose(res.parallax_snr[:4], [0.0, 4.0, -4.0, 0.8])
    # one-sided tail of the standard normal, scipy.stats.norm as reference
    np.testing.assert_allclose(res.parallax_pvalue[:4], stats.norm.sf([0.0, 4.0, -4.0, 0.8]))
    assert res.significant_positive_parallax.tolist() == [False, True, False, False, False]
    assert res.significant_negative_parallax.tolist() == [False, False, True, False, False]
    assert np.isnan(res.chi2[4]) and np.isnan(res.pvalue[4]) and np.isnan(res.parallax_snr[4])


def test_nan_and_zero_error_rows_give_nan():
    res = joint_zero_motion([0.1, 0.1, 0.1], [0.1, 0.0, 0.1], [1.0, 1.0, np.nan], [1.0, 1.0, 1.0],
                            pmra_error_mas_yr=[1.0, 1.0, 1.0], pmdec_error_mas_yr=[1.0, 1.0, 1.0])
    assert np.isfinite(res.chi2[0])
    assert np.isnan(res.chi2[1:]).all() and np.isnan(res.pvalue[1:]).all()


def test_non_positive_definite_correlations_are_shrunk():
    # each |ρ| <= 1 but together not positive definite, and one degenerate row with ρ = 1
    a = np.array([0.9, 1.0, 0.3])
    b = np.array([0.9, 0.0, 0.1])
    c = np.array([-0.9, 0.0, 0.2])
    x = np.array([[0.3, 0.2, -0.1], [1.0, -1.0, 0.5], [0.3, 0.2, -0.1]])
    res = joint_zero_motion(x[:, 0], np.ones(3), x[:, 1], x[:, 2], pmra_error_mas_yr=np.ones(3), pmdec_error_mas_yr=np.ones(3),
                            parallax_pmra_corr=a, parallax_pmdec_corr=b, pmra_pmdec_corr=c,
                            parallax_zero_point_mas=0.0)
    assert res.covariance_adjusted.tolist() == [True, True, False]
    assert np.all(np.isfinite(res.chi2)) and np.all(res.chi2 >= 0)
    for i in range(2):
        r = np.array([[1, a[i], b[i]], [a[i], 1, c[i]], [b[i], c[i], 1]])
        assert np.linalg.eigvalsh(r)[0] < 1e-6  # the input really was not positive definite
        # after shrinking R' = sR + (1 − s)I the smallest eigenvalue is the floor (numpy eigvalsh)
        lam = np.linalg.eigvalsh(r)[0]
        s = (1 - 1e-6) / (1 - lam)
        r2 = s * r + (1 - s) * np.eye(3)
        np.testing.assert_allclose(np.linalg.eigvalsh(r2)[0], 1e-6, rtol=1e-6)
        np.testing.assert_allclose(res.chi2[i], x[i] @ np.linalg.inv(r2) @ x[i], rtol=1e-6)
    r = np.array([[1, 0.3, 0.1], [0.3, 1, 0.2], [0.1, 0.2, 1]])
    np.testing.assert_allclose(res.chi2[2], x[2] @ np.linalg.inv(r) @ x[2], rtol=1e-12)


def test_bad_input_names_the_argument():
    one = np.ones(2)
    with pytest.raises(InputError, match="pmdec_error_mas_yr"):
        joint_zero_motion(one, one, one, one, pmra_error_mas_yr=one, pmdec_error_mas_yr=[1.0, -0.1])
    with pytest.raises(InputError, match="parallax_error_mas"):
        joint_zero_motion(one, [-1.0, 1.0], one, one, pmra_error_mas_yr=one, pmdec_error_mas_yr=one)
    with pytest.raises(InputError, match="pmra_pmdec_corr"):
        joint_zero_motion(one, one, one, one, pmra_error_mas_yr=one, pmdec_error_mas_yr=one, pmra_pmdec_corr=[0.2, 1.5])
    with pytest.raises(ConfigError, match="error_inflation"):
        joint_zero_motion(one, one, one, one, pmra_error_mas_yr=one, pmdec_error_mas_yr=one, error_inflation=0.0)


def test_scalars_work():
    res = joint_zero_motion(0.0, 0.1, 0.0, 0.0, pmra_error_mas_yr=0.1, pmdec_error_mas_yr=0.1, pmra_pmdec_corr=1.0,
                            parallax_zero_point_mas=0.0)
    assert res.chi2 == 0.0 and bool(res.covariance_adjusted)
