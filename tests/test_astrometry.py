"""selector.astrometry against astropy's space motion, scipy's χ² and a simulated population."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord
from astropy.time import Time
from erfa import ErfaWarning
from scipy import stats

from selector.core import astrometry as am


def _sky(rng, n):
    ra = rng.uniform(0.0, 360.0, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n)))
    # a tenth of the sources within 0.1 deg of a pole, and some exactly on it
    m = n // 10
    dec[:m] = rng.uniform(89.9, 90.0, m) * rng.choice([-1.0, 1.0], m)
    dec[m:m + 4] = [90.0, -90.0, 90.0, -90.0]
    return ra, dec


def _motions(rng, n, pm_max_mas_yr):
    # uniform in the disc |μ| <= pm_max, so every direction and size occurs
    size = pm_max_mas_yr * np.sqrt(rng.uniform(0.0, 1.0, n))
    angle = rng.uniform(0.0, 2.0 * np.pi, n)
    return size * np.sin(angle), size * np.cos(angle)


def _separation_mas(ra1, dec1, ra2, dec2):
    # reference: astropy SkyCoord.separation
    return SkyCoord(ra1 * u.deg, dec1 * u.deg).separation(SkyCoord(ra2 * u.deg, dec2 * u.deg)).to_value(u.mas)


def _reference_motion(ra, dec, pmra, pmdec, dt_yr, distance):
    """reference: astropy SkyCoord.apply_space_motion, zero radial velocity."""
    coord = SkyCoord(ra=ra * u.deg, dec=dec * u.deg, pm_ra_cosdec=pmra * u.mas / u.yr,
                     pm_dec=pmdec * u.mas / u.yr, radial_velocity=0.0 * u.km / u.s, distance=distance,
                     obstime=Time(2016.0, format="jyear", scale="tdb"), frame="icrs")
    with warnings.catch_warnings():
        # For a very distant source the underlying routine (pmsafe)
        # lowers the distance until the transverse speed is about 1 % of c, and warns that it did.
        # Position change on the sky is unaffected (the direction of rectilinear motion does not
        # depend on distance) and the light-time terms it keeps are < 1e-6 mas here (measured).
        warnings.simplefilter("ignore", ErfaWarning)
        moved = coord.apply_space_motion(dt=dt_yr * u.yr)
    return moved.ra.deg, moved.dec.deg


# ---- propagation ----------------------------------------------------------------------------


@pytest.mark.parametrize("dt_yr", [-10.0, -3.7, 0.5, 10.0])
@pytest.mark.parametrize("distance", [1e6 * u.pc, 10 * u.pc], ids=["1Mpc", "10pc"])
def test_propagation_matches_reference_space_motion(dt_yr, distance):
    rng = np.random.default_rng(11)
    ra, dec = _sky(rng, 3000)
    pmra, pmdec = _motions(rng, ra.size, 5000.0)  # up to 5 arcsec/yr
    ours = am.propagate(ra, dec, pmra, pmdec, dt_yr)
    ref_ra, ref_dec = _reference_motion(ra, dec, pmra, pmdec, dt_yr, distance)
    off = _separation_mas(ours.ra_deg, ours.dec_deg, ref_ra, ref_dec)
    # required: 1 mas; the two agree to rounding (~1e-6 mas), so a far tighter bound is safe
    assert off.max() < 1e-3
    assert np.all((ours.ra_deg >= 0.0) & (ours.ra_deg < 360.0))
    assert np.all(np.abs(ours.dec_deg) <= 90.0)
    # the sources did move by about μ·dt, so the comparison is not trivially passed
    moved = _separation_mas(ra, dec, ours.ra_deg, ours.dec_deg)
    np.testing.assert_allclose(moved, np.hypot(pmra, pmdec) * abs(dt_yr), rtol=1e-6, atol=1e-6)


def test_propagation_with_per_source_epoch_differences():
    rng = np.random.default_rng(12)
    ra, dec = _sky(rng, 500)
    pmra, pmdec = _motions(rng, ra.size, 5000.0)
    dt = rng.uniform(-10.0, 10.0, ra.size)
    ours = am.propagate(ra, dec, pmra, pmdec, dt)
    # an array of epoch differences must act row by row, exactly as scalar calls do
    for i in range(0, ra.size, 97):
        one = am.propagate(ra[i], dec[i], pmra[i], pmdec[i], dt[i])
        assert one.ra_deg == ours.ra_deg[i] and one.dec_deg == ours.dec_deg[i]
    ref_ra, ref_dec = _reference_motion(ra, dec, pmra, pmdec, dt, 1e6 * u.pc)  # reference: astropy
    assert _separation_mas(ours.ra_deg, ours.dec_deg, ref_ra, ref_dec).max() < 1e-3


def test_propagation_across_the_pole():
    # 1 arcsec/yr due north from 0.5 arcsec short of the north pole: after 1 yr, 0.5 arcsec beyond
    # it, on the opposite meridian (geometry of the great circle; common practice)
    p = am.propagate([30.0], [90.0 - 0.5 / 3600.0], [0.0], [1000.0], 1.0)
    assert abs(p.ra_deg[0] - 210.0) < 1e-6
    assert abs((90.0 - p.dec_deg[0]) * 3600.0 - 0.5) < 1e-9


def test_propagation_keeps_resting_sources_and_propagates_nan():
    ra = np.array([10.0, 359.5, 0.0, 123.0, 45.0])
    dec = np.array([-30.0, 89.99, 90.0, 0.0, 10.0])
    pmra = np.array([0.0, 0.0, 0.0, np.nan, 5.0])
    pmdec = np.array([0.0, 0.0, 0.0, 1.0, np.nan])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        p = am.propagate(ra, dec, pmra, pmdec, 7.5)
        q = am.propagate(ra, dec, np.full(5, 3.0), np.full(5, 3.0), 0.0)
    np.testing.assert_array_equal(p.ra_deg[:3], ra[:3])
    np.testing.assert_array_equal(p.dec_deg[:3], dec[:3])
    assert np.isnan(p.ra_deg[3:]).all() and np.isnan(p.dec_deg[3:]).all()
    np.testing.assert_array_equal(q.ra_deg, ra)
    np.testing.assert_array_equal(q.dec_deg, dec)
    with pytest.raises(ValueError, match="dec_deg"):
        am.propagate([0.0], [90.5], [0.0], [0.0], 1.0)


def test_max_shift_bounds_every_propagation():
    rng = np.random.default_rng(13)
    ra, dec = _sky(rng, 2000)
    pmra, pmdec = _motions(rng, ra.size, 8000.0)
    for dt in (-12.0, 6.0):
        p = am.propagate(ra, dec, pmra, pmdec, dt)
        shift_arcsec = _separation_mas(ra, dec, p.ra_deg, p.dec_deg) / 1000.0
        assert shift_arcsec.max() <= am.max_shift_arcsec(8000.0, dt) * (1 + 1e-9)
    assert am.max_shift_arcsec(2000.0, -6.5) == 13.0
    with pytest.raises(ValueError, match="pm_total_mas_yr_max"):
        am.max_shift_arcsec(-1.0, 1.0)
    with pytest.raises(ValueError, match="dt_yr"):
        am.max_shift_arcsec(1.0, np.nan)


# ---- zero-motion statistics --------------------------------------------------------------------


def test_pvalue_is_the_two_degree_of_freedom_survival_function():
    chi2 = np.concatenate([[0.0], np.logspace(-8, 2.5, 400)])
    # pm_chi2 = x² for a pure RA motion of x standard errors
    zm = am.zero_motion(np.zeros_like(chi2), np.ones_like(chi2), np.sqrt(chi2), np.zeros_like(chi2),
                        pmra_error_mas_yr=np.ones_like(chi2), pmdec_error_mas_yr=np.ones_like(chi2))
    np.testing.assert_allclose(zm.pm_chi2, chi2, rtol=1e-14)
    # reference: scipy.stats.chi2(2).sf
    np.testing.assert_allclose(zm.pm_pvalue, stats.chi2(2).sf(chi2), rtol=1e-12, atol=0)


def test_chi2_with_correlation_equals_explicit_solve():
    rng = np.random.default_rng(14)
    n = 400
    mu = rng.normal(0.0, 2.0, (n, 2))
    sig = rng.uniform(0.05, 3.0, (n, 2))
    rho = rng.uniform(-0.98, 0.98, n)
    k = 1.3
    zm = am.zero_motion(np.zeros(n), np.ones(n), mu[:, 0], mu[:, 1],
                        pmra_error_mas_yr=sig[:, 0], pmdec_error_mas_yr=sig[:, 1], pmra_pmdec_corr=rho,
                        error_inflation=k)
    for i in range(n):
        off = rho[i] * sig[i, 0] * sig[i, 1]
        cov = k * k * np.array([[sig[i, 0] ** 2, off], [off, sig[i, 1] ** 2]])
        # reference: numpy.linalg.solve of the 2x2 system C y = μ, then χ² = μ·y
        want = mu[i] @ np.linalg.solve(cov, mu[i])
        assert zm.pm_chi2[i] == pytest.approx(want, rel=1e-10)


def test_parallax_snr_uses_zero_point_and_inflation():
    # zero point −0.017 mas for quasars: Lindegren et al. 2021, A&A 649, A4 (from memory);
    # expected values by hand: (0.083 + 0.017) / (2 × 0.05) = 1, (−0.117 + 0.017) / (2 × 0.1) = −0.5
    zm = am.zero_motion([0.083, -0.117], [0.05, 0.1], [0.0, 0.0], [0.0, 0.0],
                        pmra_error_mas_yr=[1.0, 1.0], pmdec_error_mas_yr=[1.0, 1.0],
                        parallax_zero_point_mas=-0.017, error_inflation=2.0)
    np.testing.assert_allclose(zm.parallax_snr, [1.0, -0.5], rtol=1e-12)
    zero = am.zero_motion([0.3], [0.1], [0.0], [0.0],
                          pmra_error_mas_yr=[1.0], pmdec_error_mas_yr=[1.0], parallax_zero_point_mas=0.0)
    np.testing.assert_allclose(zero.parallax_snr, [3.0], rtol=1e-12)


def test_simulated_population_at_rest_passes_at_the_nominal_rate():
    # sources at rest: measured parallax and proper motion are pure noise with the stated (inflated)
    # errors and correlation, so the tests must accept them at exactly the nominal rates
    rng = np.random.default_rng(20240612)
    n = 100_000
    k = 1.2
    zp = -0.017
    e_plx = rng.uniform(0.02, 1.5, n)
    s_a = rng.uniform(0.02, 2.0, n)
    s_d = rng.uniform(0.02, 2.0, n)
    rho = rng.uniform(-0.9, 0.9, n)
    z1, z2, z3 = rng.standard_normal((3, n))
    mu_a = k * s_a * z1
    mu_d = k * s_d * (rho * z1 + np.sqrt(1.0 - rho * rho) * z2)
    plx = zp + k * e_plx * z3
    zm = am.zero_motion(plx, e_plx, mu_a, mu_d,
                        pmra_error_mas_yr=s_a, pmdec_error_mas_yr=s_d, pmra_pmdec_corr=rho,
                        parallax_zero_point_mas=zp, error_inflation=k)
    for alpha in (0.01, 0.05, 0.3):
        rate = np.mean(zm.pm_pvalue >= alpha)
        se = np.sqrt(alpha * (1 - alpha) / n)
        assert abs(rate - (1 - alpha)) < 4 * se, (alpha, rate)
    # reference: scipy.stats.norm for the fraction of a unit normal within ±3
    nominal = stats.norm.cdf(3.0) - stats.norm.cdf(-3.0)
    rate = np.mean(np.abs(zm.parallax_snr) < 3.0)
    assert abs(rate - nominal) < 4 * np.sqrt(nominal * (1 - nominal) / n)
    # leaving out the correlation is measurably wrong on the same data, so the test has teeth
    naive = am.zero_motion(plx, e_plx, mu_a, mu_d,
                           pmra_error_mas_yr=s_a, pmdec_error_mas_yr=s_d, pmra_pmdec_corr=None,
                           parallax_zero_point_mas=zp, error_inflation=k)
    assert abs(np.mean(naive.pm_pvalue >= 0.01) - 0.99) > 4 * np.sqrt(0.01 * 0.99 / n)


def test_missing_or_invalid_astrometry_gives_nan_without_warnings():
    nan = np.nan
    plx = np.array([0.1, nan, 0.1, 0.1, 0.1, 0.1, 0.1, 0.1])
    e_plx = np.array([0.1, 0.1, nan, 0.0, 0.1, 0.1, 0.1, 0.1])
    mu_a = np.array([1.0, 1.0, 1.0, 1.0, nan, 1.0, 1.0, 1.0])
    mu_d = np.array([1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0])
    s_a = np.array([0.5, 0.5, 0.5, 0.5, 0.5, -0.5, 0.5, 0.5])
    s_d = np.full(8, 0.5)
    rho = np.array([nan, 0.0, 0.0, 0.0, 0.0, 0.0, 1.0, 0.2])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        zm = am.zero_motion(plx, e_plx, mu_a, mu_d,
                            pmra_error_mas_yr=s_a, pmdec_error_mas_yr=s_d, pmra_pmdec_corr=rho)
    snr_nan = np.isnan(zm.parallax_snr)
    chi_nan = np.isnan(zm.pm_chi2)
    np.testing.assert_array_equal(snr_nan, [False, True, True, True, False, False, False, False])
    np.testing.assert_array_equal(chi_nan, [False, False, False, False, True, True, True, False])
    np.testing.assert_array_equal(np.isnan(zm.pm_pvalue), chi_nan)
    # a NaN correlation counts as zero
    plain = am.zero_motion(plx[:1], e_plx[:1], mu_a[:1], mu_d[:1],
                           pmra_error_mas_yr=s_a[:1], pmdec_error_mas_yr=s_d[:1], pmra_pmdec_corr=None)
    assert zm.pm_chi2[0] == plain.pm_chi2[0] == pytest.approx(8.0)


@pytest.mark.parametrize("bad", [0.0, -1.0, np.nan, np.inf])
def test_error_inflation_must_be_positive(bad):
    with pytest.raises(ValueError, match="error_inflation"):
        am.zero_motion([0.0], [1.0], [0.0], [0.0],
                       pmra_error_mas_yr=[1.0], pmdec_error_mas_yr=[1.0], error_inflation=bad)


def test_zero_point_must_be_finite():
    with pytest.raises(ValueError, match="parallax_zero_point_mas"):
        am.zero_motion([0.0], [1.0], [0.0], [0.0],
                       pmra_error_mas_yr=[1.0], pmdec_error_mas_yr=[1.0], parallax_zero_point_mas=np.nan)
