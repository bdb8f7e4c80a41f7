"""Black-hole physics in ``selector.core`` against published formulas and values.

Sources beside each check: Rybicki & Lightman 1979 (Eddington luminosity, with astropy.constants as
reference numbers); Bardeen, Press & Teukolsky 1972, ApJ 178, 347 (ISCO); Vestergaard & Peterson 2006,
ApJ 641, 689 and Vestergaard & Osmer 2009, ApJ 699, 800 (virial masses; from memory); common practice
for the brightest known quasars. Check values are computed here, not by calling the code twice.
"""

from __future__ import annotations

import math

import astropy.constants as const
import astropy.units as u
import numpy as np
import pytest

from selector.core import blackhole as bh
from selector.core import luminosity as lum
from selector.errors import InputError

# --- Eddington luminosity -------------------------------------------------------------------

def test_eddington_luminosity_per_solar_mass():
    # Rybicki & Lightman 1979: L_Edd = 4π G M m_p c / σ_T, written out with astropy.constants in cgs.
    g, m_p, c = const.G.cgs.value, const.m_p.cgs.value, const.c.cgs.value
    sigma_t, m_sun = const.sigma_T.cgs.value, const.M_sun.cgs.value
    expected = 4 * math.pi * g * m_sun * m_p * c / sigma_t
    assert lum.L_EDD_PER_MSUN_ERG_S == pytest.approx(expected, rel=1e-12)
    assert lum.L_EDD_PER_MSUN_ERG_S == pytest.approx(1.257e38, rel=1e-3)  # textbook value, from memory
    assert lum.eddington_luminosity_erg_s([2e9])[0] == pytest.approx(2e9 * expected, rel=1e-12)
    assert lum.minimum_mass_msun([expected * 3e9])[0] == pytest.approx(3e9, rel=1e-12)


def test_eddington_ratio_worked_example():
    # Design notes (from memory): 4.11e8 M☉ at L_bol = 9.26e45 erg/s → 0.179.
    assert lum.eddington_ratio([9.26e45], [4.11e8])[0] == pytest.approx(0.179, abs=1e-3)
    assert np.isnan(lum.eddington_ratio([1e46], [0.0])[0])


# --- radiative efficiency -------------------------------------------------------------------

def _isco_by_hand(a):
    """Bardeen, Press & Teukolsky 1972, prograde orbit, written out independently."""
    z1 = 1 + (1 - a * a) ** (1 / 3) * ((1 + a) ** (1 / 3) + (1 - a) ** (1 / 3))
    z2 = math.sqrt(3 * a * a + z1 * z1)
    return 3 + z2 - math.sqrt((3 - z1) * (3 + z1 + 2 * z2))


def test_efficiency_of_a_non_spinning_hole():
    # BPT 1972: r_isco = 6 GM/c², η = 1 − sqrt(8/9) ≈ 0.0572.
    assert lum.isco_radius(0.0) == pytest.approx(6.0, abs=1e-12)
    assert lum.radiative_efficiency(0.0) == pytest.approx(1 - math.sqrt(8 / 9), abs=1e-12)
    assert lum.radiative_efficiency(0.0) == pytest.approx(0.0572, abs=5e-5)


def test_efficiency_at_spin_0998_and_at_maximal_spin():
    # BPT 1972 ISCO formula; 0.321 at a = 0.998 (the spin-equilibrium value, from memory).
    r = _isco_by_hand(0.998)
    assert lum.isco_radius(0.998) == pytest.approx(r, rel=1e-10)
    assert lum.radiative_efficiency(0.998) == pytest.approx(1 - math.sqrt(1 - 2 / (3 * r)), rel=1e-10)
    assert lum.radiative_efficiency(0.998) == pytest.approx(0.321, abs=1e-3)
    # Maximal spin: r_isco = GM/c², η = 1 − 1/sqrt(3) ≈ 0.423.
    assert lum.isco_radius(1.0) == pytest.approx(1.0, abs=1e-9)
    assert lum.radiative_efficiency(1.0) == pytest.approx(1 - 1 / math.sqrt(3), abs=1e-9)
    # Retrograde maximal spin: r_isco = 9 GM/c² (BPT 1972).
    assert lum.isco_radius(-1.0) == pytest.approx(9.0, abs=1e-9)
    with pytest.raises(InputError):
        lum.isco_radius([1.2])


# --- accretion rate -------------------------------------------------------------------------

def test_accretion_rate_scaling():
    # Ṁ = L/(ηc²): 1.766 M☉/yr × (L_bol/1e46 erg/s)(0.1/η) (design notes), recomputed with astropy units.
    by_units = (1e46 * u.erg / u.s / (0.1 * const.c**2)).to_value(u.M_sun / u.yr)
    assert by_units == pytest.approx(1.766, abs=1e-3)
    got = lum.accretion_rate([1e46, 3e46], [0.1, 0.2])
    np.testing.assert_allclose(got.msun_yr, [by_units, by_units * 3 * 0.5], rtol=1e-10)
    np.testing.assert_allclose(got.msun_day, got.msun_yr / 365.25, rtol=1e-12)  # Julian year
    rng = lum.accretion_rate_range([1e46], (0.05, 0.4))
    assert rng.high_msun_yr[0] == pytest.approx(by_units * 2.0, rel=1e-10)
    assert rng.low_msun_yr[0] == pytest.approx(by_units * 0.25, rel=1e-10)
    with pytest.raises(InputError):
        lum.accretion_rate_range([1e46], (0.4, 0.05))
    with pytest.raises(InputError):
        lum.accretion_rate([1e46], 0.0)


def test_most_luminous_quasars_sit_near_eddington_and_eat_a_sun_per_day():
    # Common practice: the brightest known quasars, about 5e14 L☉ with ~1.7e10 M☉ holes, radiate near
    # the Eddington limit and at η ≈ 0.1 accrete about one solar mass per day.
    lbol = 5e14 * const.L_sun.cgs.value
    summary = bh.summarise([math.log10(1.7e10)], [lbol], efficiency_range=(0.1, 0.1))
    assert summary.eddington_ratio[0] == pytest.approx(0.9, abs=0.15)
    assert 1 / 1.5 < summary.accretion_low_msun_day[0] < 1.5
    assert summary.minimum_mass_msun[0] < 1.7e10


# --- virial masses --------------------------------------------------------------------------

@pytest.mark.parametrize("line, fwhm, lamL, expected", [
    ("C IV", 5000.0, 1e46, 9.118),   # Vestergaard & Peterson 2006 (from memory)
    ("Hβ", 4000.0, 1e45, 8.614),     # Vestergaard & Peterson 2006 (from memory)
    ("MgII", 3500.0, 1e45, 8.448),   # Vestergaard & Osmer 2009 (from memory)
])
def test_virial_mass_worked_values(line, fwhm, lamL, expected):
    cal = bh.calibration_for_line(line)
    assert bh.virial_log_mass([fwhm], [lamL], cal)[0] == pytest.approx(expected, abs=5e-4)
    assert bh.virial_log_mass_by_line([line], [fwhm], [lamL])[0] == pytest.approx(expected, abs=5e-4)


def test_alternative_mgii_calibration():
    # Shen et al. 2011, ApJS 194, 45 (from memory): a = 6.74, b = 0.62;
    # 3500 km/s at 1e45 → 6.74 + 0.62 + 2 log10(3.5).
    cal = bh.calibration_for_line("mg ii", "mgii_2011")
    expected = 6.74 + 0.62 + 2 * math.log10(3.5)
    assert bh.virial_log_mass([3500.0], [1e45], cal)[0] == pytest.approx(expected, abs=1e-12)


@pytest.mark.parametrize("spelling, line", [
    ("CIV", "CIV"), ("C IV", "CIV"), ("civ", "CIV"), ("c-iv", "CIV"),
    ("MgII", "MgII"), ("Mg II", "MgII"), ("mgii", "MgII"),
    ("Hbeta", "Hbeta"), ("H beta", "Hbeta"), ("Hβ", "Hbeta"), ("hb", "Hbeta"),
])
def test_line_spellings(spelling, line):
    assert bh.calibration_for_line(spelling).line == line


def test_unknown_line_and_set_are_one_line_input_errors():
    with pytest.raises(InputError) as err:
        bh.calibration_for_line("Lyalpha")
    assert "Hbeta" in str(err.value) and "\n" not in str(err.value)
    with pytest.raises(InputError, match="baseline, mgii_2011"):
        bh.calibration_set("newest")
    with pytest.raises(InputError, match="civ_1350_2006"):
        bh.calibration_by_name("nope")


def test_mass_uncertainty_propagation():
    # First-order propagation of log M = a + b log L + 2 log FWHM (common practice).
    cal = bh.calibration_for_line("CIV")
    b = 0.53  # Vestergaard & Peterson 2006 (from memory)
    expected = math.sqrt((b * 0.1) ** 2 + (2 * 500.0 / (5000.0 * math.log(10))) ** 2)
    got = bh.virial_mass_uncertainty([5000.0], [500.0], cal, lamL_err_dex=[0.1])
    assert got.measurement_dex[0] == pytest.approx(expected, rel=1e-12)
    assert got.intrinsic_dex[0] == cal.scatter_dex
    assert got.total_dex[0] == pytest.approx(math.hypot(expected, cal.scatter_dex), rel=1e-12)
    # The same luminosity error given absolutely: σ_L = L·ln10·σ_logL.
    absolute = bh.virial_mass_uncertainty([5000.0], [500.0], cal, lamL_erg_s=[1e46],
                                          lamL_err_erg_s=[1e46 * math.log(10) * 0.1])
    assert absolute.measurement_dex[0] == pytest.approx(expected, rel=1e-12)
    with pytest.raises(InputError):
        bh.virial_mass_uncertainty([5000.0], [500.0], cal)


def test_scatters_are_in_the_remembered_range():
    # Intrinsic scatter of single-epoch calibrations is a few tenths of a dex (from memory).
    assert all(0.3 <= c.scatter_dex <= 0.55 for c in bh.CALIBRATIONS)


def test_bad_rows_get_reason_codes():
    lines = np.array(["CIV", "CIV", "MgII", "Hbeta", "Lyalpha", None, "C IV", "Hβ"], dtype=object)
    fwhm = np.array([-100.0, np.nan, 3000.0, 0.0, 3000.0, 3000.0, 4000.0, 4000.0])
    lamL = np.array([1e45, 1e45, np.nan, 1e45, 1e45, 1e45, -1.0, 1e45])
    reasons = bh.validate_line_rows(lines, fwhm, lamL)
    assert reasons.tolist() == ["fwhm_not_positive", "fwhm_not_finite", "luminosity_missing",
                                "fwhm_not_positive", "line_unknown", "line_missing",
                                "luminosity_not_positive", ""]
    masses = bh.virial_log_mass_by_line(lines, fwhm, lamL)
    np.testing.assert_array_equal(np.isfinite(masses), reasons == "")
