"""Luminosity columns of the candidate list against reference libraries and published relations.

Each check computes its value independently (astropy's cosmology, units and constants) and names the
source beside it.
"""

import astropy.constants as const
import astropy.units as u
import numpy as np
import pyarrow as pa
import pytest
from astropy.cosmology import FlatLambdaCDM, Planck18

from selector.core import candidate_physics as cp

from conftest import base_config, build


def _config(tmp_path, **physics):
    data = base_config()
    data["astrometric"]["magnitudes"][0]["wavelength_angstrom"] = 6200.0
    if physics:
        data["physics"] = physics
    return build(data, tmp_path)


def _table(z, mag=18.0):
    n = len(z)
    t = pa.table({"astro_id": np.arange(1, n + 1, dtype=np.int64), "opt_broad_abmag": np.full(n, mag),
                  "ir_3p4_vegamag": np.full(n, np.nan), "ir_4p6_vegamag": np.full(n, np.nan),
                  "p_quasar": np.full(n, 0.9)})
    z = np.asarray(z, float)
    return t, cp.Redshifts(z, z, z, np.full(n, "spec"))


def _columns(tmp_path, z, mag=18.0, **physics):
    cfg = _config(tmp_path, **physics)
    t, zs = _table(z, mag)
    return cp.candidate_columns(t, zs, cfg)


def test_distance_moduli_through_the_candidate_table_match_astropy(tmp_path):
    # reference: astropy.cosmology.Planck18 (Planck Collaboration 2020, A&A 641, A6) at z = 2, 3, 6
    t = _columns(tmp_path, [2.0, 3.0, 6.0])
    np.testing.assert_allclose(t.column("distance_modulus_mag").to_numpy(), Planck18.distmod([2.0, 3.0, 6.0]).value,
                               atol=1e-4)
    # and a flat model given by H0 and Omega_m
    t = _columns(tmp_path, [2.0, 3.0, 6.0], cosmology="flat", h0_km_s_mpc=70.0, omega_m=0.3)
    np.testing.assert_allclose(t.column("distance_modulus_mag").to_numpy(),
                               FlatLambdaCDM(H0=70.0, Om0=0.3).distmod([2.0, 3.0, 6.0]).value, atol=1e-4)


def test_lbol_of_a_candidate_row_is_bc_times_lamL_computed_independently(tmp_path):
    # one band, broad at 6200 Å, AB 18, z = 2: every rest wavelength is extrapolated from it.
    # lamL at rest λ: L_nu(nu_e) = 4 pi d_L^2 f_nu / (1+z) at nu_e = (1+z) c / 6200 Å, carried along
    # f_nu ∝ nu^-0.5 (Richards et al. 2006, AJ 131, 2766) to nu_t = c / λ; BC 3.81, 5.15, 9.26 at
    # 1350, 3000, 5100 Å (same paper, from memory). Distances from astropy's Planck18.
    z = 2.0
    t = _columns(tmp_path, [z])
    f_nu = (18.0 * u.ABmag).to(u.erg / u.s / u.cm**2 / u.Hz)
    d_l = Planck18.luminosity_distance(z)
    nu_e = (1 + z) * const.c / (6200 * u.AA)
    for rest, bc in ((1350, 3.81), (3000, 5.15), (5100, 9.26)):
        nu_t = const.c / (rest * u.AA)
        lam_l = (nu_t * 4 * np.pi * d_l**2 * f_nu / (1 + z) * (nu_t / nu_e) ** -0.5).to_value(u.erg / u.s)
        assert t.column(f"lamL{rest}_erg_s")[0].as_py() == pytest.approx(lam_l, rel=1e-5)
    used = t.column("lbol_from_angstrom")[0].as_py()
    # 6200/(1+z) = 2067 Å sits nearest 3000 Å in log wavelength (|ln(3000/2067)| < |ln(2067/1350)|)
    assert used == 3000.0
    assert t.column("lbol_erg_s")[0].as_py() == pytest.approx(5.15 * t.column("lamL3000_erg_s")[0].as_py(),
                                                               rel=1e-12)


def test_minimum_mass_and_accretion_rates_per_row(tmp_path):
    t = _columns(tmp_path, [2.5], mag=16.0)
    lbol = t.column("lbol_erg_s")[0].as_py() * u.erg / u.s
    # Eddington luminosity per solar mass 4 pi G m_p c / sigma_T (Rybicki & Lightman 1979), astropy constants
    l_edd = (4 * np.pi * const.G * const.M_sun * const.m_p * const.c / const.sigma_T).to(u.erg / u.s)
    assert l_edd.value == pytest.approx(1.257e38, rel=2e-3)   # design notes, from memory
    assert t.column("min_bh_mass_msun")[0].as_py() == pytest.approx((lbol / l_edd).decompose().value, rel=1e-9)
    # Mdot = L / (eta c^2) = 1.766 Msun/yr (L/1e46 erg/s)(0.1/eta) (design notes), at the default range
    # 0.057 (non-spinning hole) to 0.32 (spin 0.998; Bardeen, Press & Teukolsky 1972)
    for col, eta in (("mdot_high_msun_yr", 0.057), ("mdot_low_msun_yr", 0.32)):
        expected = 1.766 * (lbol.value / 1e46) * (0.1 / eta)
        assert t.column(col)[0].as_py() == pytest.approx(expected, rel=1e-3)
    assert t.column("mdot_high_msun_day")[0].as_py() == pytest.approx(
        t.column("mdot_high_msun_yr")[0].as_py() / 365.25, rel=1e-12)


def test_absolute_magnitude_at_z2_follows_the_k_correction_convention(tmp_path):
    # M(z=2) = m - DM(z) + 2.5 (1 + alpha) log10((1+z)/3) (Richards et al. 2006, AJ 131, 2766): at
    # z = 2 it is m - DM, and a power-law source of fixed M(z=2) moved to z = 3 keeps it.
    t = _columns(tmp_path, [2.0])
    assert t.column("absmag_z2_abmag")[0].as_py() == pytest.approx(18.0 - Planck18.distmod(2.0).value, abs=1e-4)
    m3 = 18.0 + (Planck18.distmod(3.0).value - Planck18.distmod(2.0).value) - 1.25 * np.log10(4 / 3)
    t3 = _columns(tmp_path, [3.0], mag=m3)
    assert t3.column("absmag_z2_abmag")[0].as_py() == pytest.approx(t.column("absmag_z2_abmag")[0].as_py(),
                                                                    abs=1e-4)


def test_dereddening_before_luminosities(tmp_path):
    # A_band = R E(B-V): a source behind E(B-V) = 0.1 with R = 2.7 is 0.27 mag brighter intrinsically,
    # so its luminosity is 10^(0.4 x 0.27) times larger
    data = base_config()
    data["astrometric"]["magnitudes"][0]["wavelength_angstrom"] = 6200.0
    data["astrometric"]["columns"]["ebv"] = "ebv"
    data["physics"] = {"extinction": {"broad": 2.7}}
    cfg = build(data, tmp_path)
    t, zs = _table([2.0])
    plain = cp.candidate_columns(t, zs, cfg)
    red = cp.candidate_columns(t.append_column("ebv_mag", pa.array([0.1])), zs, cfg)
    assert red.column("lbol_erg_s")[0].as_py() / plain.column("lbol_erg_s")[0].as_py() == pytest.approx(
        10 ** (0.4 * 0.27), rel=1e-9)
