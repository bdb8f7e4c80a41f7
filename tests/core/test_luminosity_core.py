"""Redshift → luminosity in ``selector.core.luminosity``, checked against independent computations.

Sources named beside each check: astropy.cosmology (Planck Collaboration 2020, A&A 641, A6 parameters)
and a direct numerical integral of the flat ΛCDM distance; the AB scale of Oke & Gunn 1983
(ApJ 266, 713); the power-law K-correction and z = 2 normalisation of Richards et al. 2006
(AJ 131, 2766; from memory).
"""

from __future__ import annotations

import astropy.units as u
import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM, Planck18
from scipy.integrate import quad

from selector.core import luminosity as lum
from selector.errors import ConfigError, InputError

C_KM_S = 299792.458          # exact by definition of the metre
MPC_CM = 3.0856775814913673e24  # IAU 2015 parsec × 1e6, in cm
C_ANGSTROM_S = 2.99792458e18


# --- cosmology ------------------------------------------------------------------------------

def test_default_cosmology_is_the_bundled_published_one():
    # astropy ships the parameters of Planck Collaboration 2020, A&A 641, A6 as a named realization.
    assert lum.cosmology_from_settings() is Planck18
    assert lum.cosmology_from_settings("Planck18") is Planck18


def test_flat_model_from_plain_numbers():
    cosmo = lum.cosmology_from_settings(h0_km_s_mpc=70.0, omega_m=0.3)
    assert cosmo.H0.to_value(u.km / u.s / u.Mpc) == 70.0
    assert cosmo.Om0 == 0.3
    assert cosmo.Ok0 == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize("kwargs, fragment", [
    ({"name": "NoSuchModel"}, "allowed: "),
    ({"name": "Planck18", "h0_km_s_mpc": 70.0, "omega_m": 0.3}, "not both"),
    ({"h0_km_s_mpc": 70.0}, "needs both"),
    ({"h0_km_s_mpc": -1.0, "omega_m": 0.3}, "positive"),
    ({"h0_km_s_mpc": 70.0, "omega_m": 1.5}, "[0, 1]"),
])
def test_bad_cosmology_settings_are_one_line_config_errors(kwargs, fragment):
    with pytest.raises(ConfigError) as err:
        lum.cosmology_from_settings(**kwargs)
    assert fragment in str(err.value) and "\n" not in str(err.value)


def test_unknown_cosmology_lists_the_bundled_names():
    with pytest.raises(ConfigError, match="Planck18"):
        lum.cosmology_from_settings("planck-2018")


@pytest.mark.parametrize("z", [2.0, 3.0, 6.0])
def test_distance_modulus_matches_astropy_published_cosmology(z):
    # Reference: astropy.cosmology.Planck18.distmod (design notes: distances against Planck18).
    expected = Planck18.distmod(z).to_value(u.mag)
    assert lum.distance_modulus_mag(np.array([z]), Planck18)[0] == pytest.approx(expected, abs=1e-9)


@pytest.mark.parametrize("z", [2.0, 3.0, 6.0])
def test_flat_lcdm_distance_matches_a_direct_integral(z):
    # Independent check: d_L = (1+z) c/H0 ∫0^z dz'/sqrt(Ωm(1+z')³ + 1 − Ωm), no radiation term
    # (astropy's FlatLambdaCDM default has Tcmb0 = 0); cross-checked with astropy's own distmod.
    cosmo = lum.cosmology_from_settings(h0_km_s_mpc=70.0, omega_m=0.3)
    integral, _ = quad(lambda x: 1.0 / np.sqrt(0.3 * (1 + x) ** 3 + 0.7), 0.0, z, epsabs=0, epsrel=1e-12)
    d_l_cm = (1 + z) * C_KM_S / 70.0 * integral * MPC_CM
    assert lum.luminosity_distance_cm([z], cosmo)[0] == pytest.approx(d_l_cm, rel=1e-8)
    dm_by_hand = 5.0 * np.log10(d_l_cm / (10.0 * MPC_CM / 1e6))
    assert lum.distance_modulus_mag([z], cosmo)[0] == pytest.approx(dm_by_hand, abs=1e-7)
    assert lum.distance_modulus_mag([z], cosmo)[0] == pytest.approx(
        FlatLambdaCDM(H0=70, Om0=0.3).distmod(z).to_value(u.mag), abs=1e-9)


def test_distances_are_nan_for_missing_or_non_positive_redshift():
    z = np.array([np.nan, -0.5, 0.0, 1.0])
    d = lum.luminosity_distance_cm(z, Planck18)
    dm = lum.distance_modulus_mag(z, Planck18)
    assert np.isnan(d[:3]).all() and np.isnan(dm[:3]).all()
    assert np.isfinite(d[3]) and np.isfinite(dm[3])


# --- K-correction and absolute magnitudes ----------------------------------------------------

def _observed_ab_mag(lnu_at, band_angstrom, z, cosmo):
    """AB magnitude of a source with rest L_ν given by ``lnu_at(ν)``, written out by hand.

    f_ν(ν_o) = (1+z) L_ν((1+z)ν_o) / (4π d_L²); m = −2.5 log10 f_ν − 48.60 (Oke & Gunn 1983).
    """
    d_cm = cosmo.luminosity_distance(z).to_value(u.cm)
    nu_obs = C_ANGSTROM_S / band_angstrom
    fnu = (1 + z) * lnu_at((1 + z) * nu_obs) / (4 * np.pi * d_cm**2)
    return -2.5 * np.log10(fnu) - 48.60


def test_power_law_source_has_the_same_z2_absolute_magnitude_at_every_redshift():
    # Richards et al. 2006 (AJ 131, 2766): with K normalised at z = 2 a pure power law gives one M(z=2).
    alpha = -0.5
    nu0 = C_ANGSTROM_S / 2500.0
    lnu_at = lambda nu: 1e31 * (nu / nu0) ** alpha
    band = 7600.0
    zs = np.array([0.3, 1.0, 2.0, 3.5, 6.0])
    mags = np.array([_observed_ab_mag(lnu_at, band, z, Planck18) for z in zs])
    m_z2 = lum.absolute_mag_z2(mags, zs, Planck18, alpha)
    # At 10 pc through the band shifted by 3: M = −2.5 log10[3 L_ν(3ν_o) / (4π (10 pc)²)] − 48.60.
    ten_pc_cm = 10 * MPC_CM / 1e6
    expected = -2.5 * np.log10(3 * lnu_at(3 * C_ANGSTROM_S / band) / (4 * np.pi * ten_pc_cm**2)) - 48.60
    np.testing.assert_allclose(m_z2, expected, atol=1e-9)


def test_z2_to_z0_offset_is_0596_for_alpha_minus_half():
    # Richards et al. 2006: M_i(z=0) = M_i(z=2) + 0.596 for α_ν = −0.5 (from memory);
    # the number is 2.5·(1 − 0.5)·log10(3).
    assert 2.5 * 0.5 * np.log10(3.0) == pytest.approx(0.596, abs=5e-4)
    assert lum.absolute_mag_z0_from_z2(-27.0) == pytest.approx(-27.0 + 0.596, abs=5e-4)
    assert lum.k_correction_mag(2.0) == pytest.approx(-0.596, abs=5e-4)


def test_k_correction_vanishes_for_flat_nu_f_nu_slope():
    # f_ν ∝ ν⁻¹ (α_ν = −1): the bandwidth stretch and the colour term cancel, K = 0 (Richards et al. 2006).
    np.testing.assert_allclose(lum.k_correction_mag([0.5, 2.0, 5.0], alpha_nu=-1.0), 0.0, atol=1e-15)


# --- monochromatic and bolometric luminosities ----------------------------------------------

@pytest.mark.parametrize("band", [8000.0, 9000.0, 6500.0])
def test_lambda_l_lambda_round_trip_at_3000_angstrom(band):
    # A power-law source with λL_λ(3000 Å) = 3e46 erg/s at z = 2; its AB magnitude is computed by hand
    # (Oke & Gunn 1983 zero point, astropy luminosity distance) and the code must recover λL_λ.
    alpha, z, target = -0.5, 2.0, 3e46
    nu_t = C_ANGSTROM_S / 3000.0
    lnu_at = lambda nu: (target / nu_t) * (nu / nu_t) ** alpha
    mag = _observed_ab_mag(lnu_at, band, z, Planck18)
    got = lum.monochromatic_luminosity_erg_s([mag], band, [z], 3000.0, cosmology=Planck18, alpha_nu=alpha)
    assert got[0] == pytest.approx(target, rel=1e-10)


def test_monochromatic_luminosity_is_nan_without_redshift():
    got = lum.monochromatic_luminosity_erg_s([19.0, 19.0], 9000.0, [np.nan, 0.0], 3000.0, cosmology=Planck18)
    assert np.isnan(got).all()


def test_nearest_band_by_hand():
    bands = [4800.0, 6200.0, 7600.0, 9000.0, 12500.0]
    # (1+z)·3000 Å: z=2 → 9000 (index 3); z=1 → 6000 (index 1); z=0.6 → 4800 (index 0); z=4 → 15000 (4).
    got = lum.nearest_band([2.0, 1.0, 0.6, 4.0, np.nan], 3000.0, bands)
    np.testing.assert_array_equal(got, [3, 1, 0, 4, -1])
    with pytest.raises(InputError):
        lum.nearest_band([1.0], 3000.0, [])


def test_bolometric_correction_from_the_table():
    # Richards et al. 2006 (AJ 131, 2766; from memory): BC = 3.81, 5.15, 9.26 at 1350, 3000, 5100 Å.
    assert lum.bolometric_luminosity_erg_s(1e45, 5100)[()] == pytest.approx(9.26e45)
    assert lum.bolometric_luminosity_erg_s([1e45], 3000.0)[0] == pytest.approx(5.15e45)
    assert lum.bolometric_luminosity_erg_s([1e45], 1350, {1350: 4.0})[0] == pytest.approx(4e45)
    with pytest.raises(ConfigError, match="1350, 3000, 5100"):
        lum.bolometric_luminosity_erg_s([1e45], 2500)


# --- extinction -----------------------------------------------------------------------------

def test_deredden_subtracts_r_times_ebv_and_flags_missing_reddening():
    # A = R·E(B−V) by definition of the extinction coefficient (common practice).
    coeffs = {"0.62um": 2.3, "0.75um": 1.7}
    mag = np.array([20.0, 20.0, 20.0])
    ebv = np.array([0.1, np.nan, -0.01])
    out = lum.deredden_mag(mag, ebv, "0.62um", coeffs)
    np.testing.assert_allclose(out.mag, [20.0 - 0.23, 20.0, 20.0 + 0.023])
    np.testing.assert_array_equal(out.corrected, [True, False, True])
    with pytest.raises(ConfigError, match="0.62um, 0.75um"):
        lum.deredden_mag(mag, ebv, "0.48um", coeffs)


# --- intervals over redshift ----------------------------------------------------------------

def test_interval_is_ordered_when_the_function_is_not_monotone():
    peaked = lambda z: -(z - 2.0) ** 2
    decreasing = lambda z: 10.0 - z
    z16, z50, z84 = np.array([1.5, 1.0]), np.array([2.0, 1.2]), np.array([2.4, 1.5])
    got = lum.interval_over_redshift(peaked, z16, z50, z84)
    np.testing.assert_allclose(got.median, [0.0, -0.64])
    np.testing.assert_allclose(got.low, [-0.25, -1.0])
    np.testing.assert_allclose(got.high, [0.0, -0.25])
    dec = lum.interval_over_redshift(decreasing, z16, z50, z84)
    np.testing.assert_allclose(dec.low, 10.0 - z84)
    np.testing.assert_allclose(dec.high, 10.0 - z16)
    assert np.all(dec.low <= dec.median) and np.all(dec.median <= dec.high)
