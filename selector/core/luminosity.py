"""From redshift and magnitude to luminosities, Eddington limits and accretion rates.

Everything here works on float64 arrays, one value per source, and returns NaN where an input is
missing or unphysical (redshift ≤ 0, non-positive luminosity) so that a caller can decide what a
missing value means. Cosmology comes from :mod:`astropy.cosmology` (bundled parameters, no
downloads) and physical constants from :mod:`astropy.constants`.

Conventions
-----------
* Power-law continuum ``f_ν ∝ ν^α_ν`` with ``α_ν = -0.5`` by default (Richards et al. 2006,
  AJ 131, 2766).
* AB magnitudes: ``f_ν = 10^(-0.4 (m + 48.60))`` erg s⁻¹ cm⁻² Hz⁻¹ (Oke & Gunn 1983, ApJ 266, 713).
* Luminosities in erg/s, distances in cm, masses in solar masses, wavelengths in Ångström.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import NamedTuple

import astropy.constants as const
import astropy.units as u
import numpy as np
from astropy.cosmology import FlatLambdaCDM, realizations

from selector.errors import ConfigError, InputError

__all__ = [
    "AB_ZERO_POINT",
    "BOLOMETRIC_CORRECTIONS",
    "DEFAULT_ALPHA_NU",
    "DEFAULT_COSMOLOGY",
    "DEFAULT_EFFICIENCY_RANGE",
    "L_EDD_PER_MSUN_ERG_S",
    "REST_WAVELENGTHS_ANGSTROM",
    "AccretionRange",
    "AccretionRate",
    "Dereddened",
    "Interval",
    "ab_mag_to_fnu",
    "absolute_mag_z0_from_z2",
    "absolute_mag_z2",
    "accretion_rate",
    "accretion_rate_range",
    "bolometric_luminosity_erg_s",
    "cosmology_from_settings",
    "deredden_mag",
    "distance_modulus_mag",
    "eddington_luminosity_erg_s",
    "eddington_ratio",
    "extinction_mag",
    "interval_over_redshift",
    "isco_radius",
    "k_correction_mag",
    "k_correction_z2_mag",
    "luminosity_distance_cm",
    "minimum_mass_msun",
    "monochromatic_luminosity_erg_s",
    "nearest_band",
    "radiative_efficiency",
]

#: Default continuum slope in ``f_ν ∝ ν^α_ν`` (Richards et al. 2006, AJ 131, 2766).
DEFAULT_ALPHA_NU = -0.5

#: Default named cosmology: the parameters of Planck Collaboration 2020, A&A 641, A6, as bundled
#: with astropy.
DEFAULT_COSMOLOGY = "Planck18"

#: Bolometric corrections ``L_bol = BC · λL_λ`` keyed by rest wavelength in Å
#: (Richards et al. 2006, AJ 131, 2766; values from memory).
BOLOMETRIC_CORRECTIONS: Mapping[int, float] = {1350: 3.81, 3000: 5.15, 5100: 9.26}

#: Rest wavelengths (Å) at which monochromatic luminosities are usually quoted.
REST_WAVELENGTHS_ANGSTROM = (1350.0, 3000.0, 5100.0)

#: AB zero point: ``m = -2.5 log10 f_ν - 48.60`` with f_ν in erg s⁻¹ cm⁻² Hz⁻¹ (Oke & Gunn 1983).
AB_ZERO_POINT = 48.60

_C_ANGSTROM_S = const.c.to_value(u.AA / u.s)
_C_CM_S = const.c.cgs.value
_MSUN_G = const.M_sun.cgs.value
_SECONDS_PER_JULIAN_YEAR = (1.0 * u.yr).to_value(u.s)  # astropy's year is the Julian year
_SECONDS_PER_DAY = 86400.0


def _eddington_per_msun() -> float:
    """``4π G m_p c / σ_T`` times one solar mass, in erg/s (Rybicki & Lightman 1979)."""
    value = 4.0 * np.pi * const.G * const.m_p * const.c / const.sigma_T * const.M_sun
    return float(value.to_value(u.erg / u.s))


#: Eddington luminosity of one solar mass for ionised hydrogen, ≈ 1.257e38 erg/s
#: (Rybicki & Lightman 1979, Radiative Processes in Astrophysics).
L_EDD_PER_MSUN_ERG_S = _eddington_per_msun()


def _as_float(x) -> np.ndarray:
    return np.asarray(x, dtype=np.float64)


# --------------------------------------------------------------------------------------------
# Cosmology and distances
# --------------------------------------------------------------------------------------------

def cosmology_from_settings(name: str | None = None, h0_km_s_mpc: float | None = None,
                            omega_m: float | None = None):
    """Build an astropy cosmology from plain settings.

    Parameters
    ----------
    name : str, optional
        A published parameter set shipped with astropy (``astropy.cosmology.realizations``).
        Used when neither ``h0_km_s_mpc`` nor ``omega_m`` is given; defaults to
        :data:`DEFAULT_COSMOLOGY` (Planck Collaboration 2020, A&A 641, A6).
    h0_km_s_mpc, omega_m : float, optional
        Expansion rate today, H0 (km/s/Mpc), and matter density of a flat ΛCDM model; give both, and no name.

    Returns
    -------
    astropy.cosmology.FLRW

    Raises
    ------
    ConfigError
        Unknown name, a name together with flat-model parameters, only one of the two
        parameters, or values outside physical ranges.
    """
    flat_given = h0_km_s_mpc is not None or omega_m is not None
    if flat_given:
        if name is not None:
            raise ConfigError("cosmology: give either a named cosmology or h0_km_s_mpc with omega_m, not both")
        if h0_km_s_mpc is None or omega_m is None:
            raise ConfigError("cosmology: a flat model needs both h0_km_s_mpc and omega_m")
        h0, om = float(h0_km_s_mpc), float(omega_m)
        if not (np.isfinite(h0) and h0 > 0.0):
            raise ConfigError(f"cosmology: h0_km_s_mpc must be a positive number, got {h0_km_s_mpc!r}")
        if not (np.isfinite(om) and 0.0 <= om <= 1.0):
            raise ConfigError(f"cosmology: omega_m must lie in [0, 1], got {omega_m!r}")
        return FlatLambdaCDM(H0=h0, Om0=om)
    chosen = DEFAULT_COSMOLOGY if name is None else str(name)
    allowed = tuple(realizations.available)
    if chosen not in allowed:
        raise ConfigError(f"cosmology: unknown name {chosen!r}; allowed: {', '.join(allowed)}, "
                          "or give h0_km_s_mpc and omega_m for a flat model")
    return getattr(realizations, chosen)


def _valid_redshift(z: np.ndarray) -> np.ndarray:
    return np.isfinite(z) & (z > 0.0)


def luminosity_distance_cm(z, cosmology) -> np.ndarray:
    """Luminosity distance in cm, NaN where ``z`` is not a positive finite number.

    Parameters
    ----------
    z : array_like
        Redshifts.
    cosmology : astropy.cosmology.FLRW

    Returns
    -------
    numpy.ndarray
        float64, same shape as ``z``.
    """
    z = _as_float(z)
    out = np.full(z.shape, np.nan)
    ok = _valid_redshift(z)
    if ok.any():
        out[ok] = cosmology.luminosity_distance(z[ok]).to_value(u.cm)
    return out


def distance_modulus_mag(z, cosmology) -> np.ndarray:
    """Distance modulus ``5 log10(d_L / 10 pc)`` in mag, NaN where ``z`` is not positive and finite."""
    d_cm = luminosity_distance_cm(z, cosmology)
    ten_pc_cm = (10.0 * u.pc).to_value(u.cm)
    with np.errstate(invalid="ignore", divide="ignore"):
        return 5.0 * np.log10(d_cm / ten_pc_cm)


# --------------------------------------------------------------------------------------------
# K-correction and absolute magnitudes
# --------------------------------------------------------------------------------------------

def k_correction_mag(z, alpha_nu: float = DEFAULT_ALPHA_NU) -> np.ndarray:
    """K-correction of a power-law source, ``K(z) = -2.5 (1 + α_ν) log10(1 + z)``.

    Derivation: with ``m = M + DM + K``, the observed band at ν samples the rest-frame spectrum at
    ``(1+z)ν`` and the bandwidth is compressed by ``(1+z)``; for ``f_ν ∝ ν^α_ν`` the two factors
    give a flux ratio ``(1+z)^(1+α_ν)`` relative to a source observed at rest, hence
    ``K = -2.5 (1+α_ν) log10(1+z)`` (Richards et al. 2006, AJ 131, 2766).

    NaN where ``z`` is not finite or ``1 + z ≤ 0``.
    """
    z = _as_float(z)
    with np.errstate(invalid="ignore", divide="ignore"):
        return -2.5 * (1.0 + alpha_nu) * np.log10(1.0 + z)


def k_correction_z2_mag(z, alpha_nu: float = DEFAULT_ALPHA_NU) -> np.ndarray:
    """K-correction relative to redshift 2, ``K(z) - K(2) = -2.5 (1 + α_ν) log10((1 + z) / 3)``.

    Normalising at ``z = 2`` keeps the correction small for typical luminous quasars and makes the
    absolute magnitude refer to a bandpass blue-shifted by a factor 3 (Richards et al. 2006,
    AJ 131, 2766).
    """
    z = _as_float(z)
    with np.errstate(invalid="ignore", divide="ignore"):
        return -2.5 * (1.0 + alpha_nu) * np.log10((1.0 + z) / 3.0)


def absolute_mag_z2(mag, z, cosmology, alpha_nu: float = DEFAULT_ALPHA_NU) -> np.ndarray:
    """Absolute magnitude normalised at ``z = 2``: ``M(z=2) = m - DM(z) - [K(z) - K(2)]``.

    Derivation: the ordinary absolute magnitude is ``M(z=0) = m - DM - K(z)``. Richards et al. 2006
    (AJ 131, 2766) quote instead the magnitude the source would have through the bandpass shifted to
    ``z = 2``, which replaces ``K(z)`` by ``K(z) - K(2)``. A pure power-law source therefore has the
    same ``M(z=2)`` at every redshift.

    Parameters
    ----------
    mag : array_like
        Observed magnitudes (already corrected for Galactic extinction).
    z : array_like
        Redshifts; NaN results where not positive and finite.
    cosmology : astropy.cosmology.FLRW
    alpha_nu : float
        Continuum slope of ``f_ν ∝ ν^α_ν``.
    """
    return _as_float(mag) - distance_modulus_mag(z, cosmology) - k_correction_z2_mag(z, alpha_nu)


def absolute_mag_z0_from_z2(abs_mag_z2, alpha_nu: float = DEFAULT_ALPHA_NU) -> np.ndarray:
    """Convert ``M(z=2)`` to ``M(z=0)``: ``M(z=0) = M(z=2) - K(2) = M(z=2) + 2.5 (1+α_ν) log10 3``.

    For ``α_ν = -0.5`` the offset is ``1.25 log10 3 = 0.596`` mag (Richards et al. 2006, AJ 131,
    2766; from memory).
    """
    return _as_float(abs_mag_z2) - k_correction_mag(2.0, alpha_nu)


# --------------------------------------------------------------------------------------------
# Monochromatic and bolometric luminosities
# --------------------------------------------------------------------------------------------

def ab_mag_to_fnu(mag) -> np.ndarray:
    """AB magnitude to ``f_ν`` in erg s⁻¹ cm⁻² Hz⁻¹ (Oke & Gunn 1983, ApJ 266, 713)."""
    return 10.0 ** (-0.4 * (_as_float(mag) + AB_ZERO_POINT))


def nearest_band(z, rest_wavelength_angstrom: float, band_wavelengths_angstrom) -> np.ndarray:
    """Index of the band whose effective wavelength lies closest to ``(1+z)·λ_rest``.

    Closeness is measured in ``|log λ|`` because the power-law extrapolation error grows with the
    logarithm of the frequency ratio, not with its difference.

    Parameters
    ----------
    z : array_like
        Redshifts.
    rest_wavelength_angstrom : float
        Target rest wavelength (Å).
    band_wavelengths_angstrom : sequence of float
        Effective observed wavelengths of the available bands (Å), all positive.

    Returns
    -------
    numpy.ndarray
        int64 indices into ``band_wavelengths_angstrom``; -1 where ``z`` is not finite or ``1+z ≤ 0``.
        Ties go to the band listed first.
    """
    z = _as_float(z)
    bands = _as_float(band_wavelengths_angstrom).ravel()
    if bands.size == 0 or not np.all(np.isfinite(bands) & (bands > 0.0)):
        raise InputError("band wavelengths must be a non-empty list of positive numbers (Å)")
    if not (np.isfinite(rest_wavelength_angstrom) and rest_wavelength_angstrom > 0.0):
        raise InputError(f"rest wavelength must be a positive number of Å, got {rest_wavelength_angstrom!r}")
    ok = np.isfinite(z) & (z > -1.0)
    target = np.log(np.where(ok, 1.0 + z, 1.0) * rest_wavelength_angstrom)
    distance = np.abs(target[..., None] - np.log(bands))
    return np.where(ok, np.argmin(distance, axis=-1), -1).astype(np.int64)


def monochromatic_luminosity_erg_s(mag_ab, band_wavelength_angstrom, z, rest_wavelength_angstrom: float,
                                   *, cosmology, alpha_nu: float = DEFAULT_ALPHA_NU) -> np.ndarray:
    """Rest-frame ``λL_λ`` (erg/s) at ``rest_wavelength_angstrom`` from one observed AB magnitude.

    The band of observed effective wavelength ``λ_o`` (frequency ``ν_o = c/λ_o``) samples the rest
    frequency ``ν_e = (1+z) ν_o``, where ``L_ν(ν_e) = 4π d_L² f_ν(ν_o) / (1+z)``. The power law
    ``L_ν ∝ ν^α_ν`` carries it to the target rest frequency ``ν_t = c/λ_rest``:
    ``L_ν(ν_t) = L_ν(ν_e) (ν_t/ν_e)^α_ν``, and ``λL_λ = ν_t L_ν(ν_t)`` (e.g. Richards et al. 2006,
    AJ 131, 2766; AB scale of Oke & Gunn 1983, ApJ 266, 713).

    Parameters
    ----------
    mag_ab : array_like
        Observed AB magnitudes, corrected for Galactic extinction.
    band_wavelength_angstrom : float or array_like
        Effective observed wavelength of the band used for each source (Å); choose it with
        :func:`nearest_band` to keep the extrapolation short.
    z : array_like
        Redshifts; NaN results where not positive and finite.
    rest_wavelength_angstrom : float
        Target rest wavelength (Å), e.g. 1350, 3000 or 5100.
    cosmology : astropy.cosmology.FLRW
    alpha_nu : float

    Returns
    -------
    numpy.ndarray
        ``λL_λ`` in erg/s.
    """
    z = _as_float(z)
    lam_obs = _as_float(band_wavelength_angstrom)
    d_cm = luminosity_distance_cm(z, cosmology)
    nu_emit = (1.0 + z) * _C_ANGSTROM_S / lam_obs
    nu_target = _C_ANGSTROM_S / float(rest_wavelength_angstrom)
    with np.errstate(invalid="ignore", over="ignore"):
        lnu_emit = 4.0 * np.pi * d_cm**2 * ab_mag_to_fnu(mag_ab) / (1.0 + z)
        lnu_target = lnu_emit * (nu_target / nu_emit) ** alpha_nu
    return nu_target * lnu_target


def bolometric_luminosity_erg_s(lamL_erg_s, rest_wavelength_angstrom: float,
                                corrections: Mapping[float, float] = BOLOMETRIC_CORRECTIONS) -> np.ndarray:
    """``L_bol = BC · λL_λ`` with the correction for the given rest wavelength.

    Parameters
    ----------
    lamL_erg_s : array_like
        Monochromatic luminosity ``λL_λ`` (erg/s) at ``rest_wavelength_angstrom``.
    rest_wavelength_angstrom : float
        Must be a key of ``corrections``.
    corrections : mapping
        Rest wavelength (Å) → bolometric correction; default :data:`BOLOMETRIC_CORRECTIONS`
        (Richards et al. 2006, AJ 131, 2766; from memory).

    Raises
    ------
    ConfigError
        No correction for that wavelength.
    """
    by_wavelength = {float(k): float(v) for k, v in corrections.items()}
    key = float(rest_wavelength_angstrom)
    if key not in by_wavelength:
        allowed = ", ".join(f"{k:g}" for k in sorted(by_wavelength))
        raise ConfigError(f"bolometric correction: no value for {key:g} Å; allowed rest wavelengths: {allowed}")
    return by_wavelength[key] * _as_float(lamL_erg_s)


# --------------------------------------------------------------------------------------------
# Galactic extinction
# --------------------------------------------------------------------------------------------

class Dereddened(NamedTuple):
    """Magnitudes after extinction correction.

    Attributes
    ----------
    mag : numpy.ndarray
        Corrected magnitude where ``corrected`` is True, the input magnitude elsewhere.
    corrected : numpy.ndarray
        bool; False where the reddening was missing (NaN), so the magnitude is uncorrected.
    """

    mag: np.ndarray
    corrected: np.ndarray


def _coefficient(band: str, coefficients: Mapping[str, float]) -> float:
    if band not in coefficients:
        allowed = ", ".join(str(k) for k in coefficients) or "(none given)"
        raise ConfigError(f"extinction: no coefficient for band {band!r}; bands with coefficients: {allowed}")
    return float(coefficients[band])


def extinction_mag(ebv, band: str, coefficients: Mapping[str, float]) -> np.ndarray:
    """Extinction ``A_band = R_band · E(B-V)`` in mag (NaN where ``E(B-V)`` is NaN).

    Parameters
    ----------
    ebv : array_like
        Colour excess ``E(B-V)`` per source (mag), e.g. read from a dust map.
    band : str
        Band name as used in ``coefficients`` (named by wavelength in this project).
    coefficients : mapping
        Band → ``R_band = A_band / E(B-V)``, supplied as data by the caller.
    """
    return _coefficient(band, coefficients) * _as_float(ebv)


def deredden_mag(mag, ebv, band: str, coefficients: Mapping[str, float]) -> Dereddened:
    """Correct magnitudes for Galactic extinction, ``m₀ = m - R_band · E(B-V)``.

    A missing reddening (NaN) is neither treated as zero nor propagated as NaN: the magnitude is
    returned uncorrected and flagged, so that the photometry stays usable while a caller can see (and
    report) that the correction was not applied. Silently using zero would hide the gap; NaN would
    throw away a good measurement. Negative ``E(B-V)`` values, which dust maps contain as noise near
    zero, are applied as given so that averages over many sources stay unbiased.

    Returns
    -------
    Dereddened
    """
    mag = _as_float(mag)
    a = extinction_mag(ebv, band, coefficients)
    corrected = np.broadcast_to(np.isfinite(a), np.broadcast_shapes(mag.shape, a.shape)).copy()
    return Dereddened(mag=np.where(corrected, mag - np.where(corrected, a, 0.0), mag), corrected=corrected)


# --------------------------------------------------------------------------------------------
# Eddington limit
# --------------------------------------------------------------------------------------------

def eddington_luminosity_erg_s(mass_msun) -> np.ndarray:
    """``L_Edd = 4π G M m_p c / σ_T`` ≈ 1.257e38 (M/M☉) erg/s (Rybicki & Lightman 1979)."""
    return L_EDD_PER_MSUN_ERG_S * _as_float(mass_msun)


def minimum_mass_msun(lbol_erg_s) -> np.ndarray:
    """Smallest black-hole mass (M☉) keeping a source at or below its Eddington limit,
    ``M_min = L_bol / L_Edd,1`` with ``L_Edd,1`` the Eddington luminosity of one solar mass
    (Rybicki & Lightman 1979)."""
    return _as_float(lbol_erg_s) / L_EDD_PER_MSUN_ERG_S


def eddington_ratio(lbol_erg_s, mass_msun) -> np.ndarray:
    """Eddington ratio ``L_bol / L_Edd(M)``; NaN where the mass is not positive."""
    mass = _as_float(mass_msun)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(mass > 0.0, _as_float(lbol_erg_s) / eddington_luminosity_erg_s(mass), np.nan)


# --------------------------------------------------------------------------------------------
# Radiative efficiency and accretion rate
# --------------------------------------------------------------------------------------------

def isco_radius(spin) -> np.ndarray:
    """Radius of the innermost stable circular orbit in units of ``GM/c²``.

    Bardeen, Press & Teukolsky 1972, ApJ 178, 347:
    ``Z1 = 1 + (1-a²)^(1/3) [(1+a)^(1/3) + (1-a)^(1/3)]``, ``Z2 = sqrt(3a² + Z1²)``,
    ``r = 3 + Z2 ∓ sqrt((3-Z1)(3+Z1+2 Z2))`` with the upper sign for prograde orbits.
    Positive spin means a prograde disc, negative spin a retrograde one; ``r(0) = 6``, ``r(1) = 1``,
    ``r(-1) = 9``.

    Raises
    ------
    InputError
        A spin outside [-1, 1].
    """
    a = _as_float(spin)
    finite = np.isfinite(a)
    if np.any(np.abs(a[finite]) > 1.0):
        raise InputError("black-hole spin must lie in [-1, 1] (negative for a retrograde disc)")
    z1 = 1.0 + np.cbrt(1.0 - a * a) * (np.cbrt(1.0 + a) + np.cbrt(1.0 - a))
    z2 = np.sqrt(3.0 * a * a + z1 * z1)
    # (3 - Z1) can round to a tiny negative number at |a| = 1; clip so the root stays real.
    root = np.sqrt(np.clip((3.0 - z1) * (3.0 + z1 + 2.0 * z2), 0.0, None))
    return 3.0 + z2 - np.sign(a) * root


def radiative_efficiency(spin) -> np.ndarray:
    """Radiative efficiency of a thin disc, ``η = 1 - sqrt(1 - 2/(3 r_isco))``.

    The binding energy per unit rest mass at the ISCO (Bardeen, Press & Teukolsky 1972, ApJ 178, 347):
    ``η(0) = 1 - sqrt(8/9) ≈ 0.0572``, ``η(0.998) ≈ 0.321``, ``η(1) = 1 - 1/sqrt(3) ≈ 0.423``.
    """
    return 1.0 - np.sqrt(1.0 - 2.0 / (3.0 * isco_radius(spin)))


class AccretionRate(NamedTuple):
    """Mass accretion rate ``Ṁ = L_bol / (η c²)``."""

    msun_yr: np.ndarray
    msun_day: np.ndarray


class AccretionRange(NamedTuple):
    """Accretion rates for an efficiency range; ``low`` uses the largest η, ``high`` the smallest."""

    low_msun_yr: np.ndarray
    high_msun_yr: np.ndarray
    low_msun_day: np.ndarray
    high_msun_day: np.ndarray


def _check_efficiency(eta: np.ndarray) -> None:
    finite = eta[np.isfinite(eta)]
    if np.any((finite <= 0.0) | (finite >= 1.0)):
        raise InputError("radiative efficiency must lie strictly between 0 and 1")


def accretion_rate(lbol_erg_s, efficiency=0.1) -> AccretionRate:
    """Mass accretion rate ``Ṁ = L_bol / (η c²)`` in M☉ per Julian year and per day.

    ``Ṁ = 1.766 M☉/yr × (L_bol / 1e46 erg/s)(0.1/η)`` (e.g. Frank, King & Raine 2002, Accretion
    Power in Astrophysics, for the relation ``L = η Ṁ c²``).

    Parameters
    ----------
    lbol_erg_s : array_like
        Bolometric luminosity (erg/s).
    efficiency : float or array_like
        Radiative efficiency η in (0, 1); see :func:`radiative_efficiency`.
    """
    eta = _as_float(efficiency)
    _check_efficiency(eta)
    grams_per_s = _as_float(lbol_erg_s) / (eta * _C_CM_S**2)
    msun_per_s = grams_per_s / _MSUN_G
    return AccretionRate(msun_yr=msun_per_s * _SECONDS_PER_JULIAN_YEAR, msun_day=msun_per_s * _SECONDS_PER_DAY)


#: Efficiency range from a non-spinning hole to the spin-equilibrium value a = 0.998
#: (Bardeen, Press & Teukolsky 1972; Thorne 1974, ApJ 191, 507).
DEFAULT_EFFICIENCY_RANGE = (float(radiative_efficiency(0.0)), float(radiative_efficiency(0.998)))


def accretion_rate_range(lbol_erg_s, efficiency_range=DEFAULT_EFFICIENCY_RANGE) -> AccretionRange:
    """Accretion rates bracketing an efficiency range ``(η_min, η_max)``.

    The rate scales as 1/η, so ``η_max`` gives the low end and ``η_min`` the high end.

    Raises
    ------
    InputError
        ``η_min > η_max`` or a value outside (0, 1).
    """
    eta_min, eta_max = (float(v) for v in efficiency_range)
    if eta_min > eta_max:
        raise InputError(f"efficiency range must be (low, high), got ({eta_min:g}, {eta_max:g})")
    low = accretion_rate(lbol_erg_s, eta_max)
    high = accretion_rate(lbol_erg_s, eta_min)
    return AccretionRange(low_msun_yr=low.msun_yr, high_msun_yr=high.msun_yr,
                          low_msun_day=low.msun_day, high_msun_day=high.msun_day)


# --------------------------------------------------------------------------------------------
# Intervals over a redshift posterior
# --------------------------------------------------------------------------------------------

class Interval(NamedTuple):
    """A quantity at the median redshift with the spread over the redshift interval."""

    low: np.ndarray
    median: np.ndarray
    high: np.ndarray


def interval_over_redshift(func: Callable[[np.ndarray], np.ndarray], z16, z50, z84) -> Interval:
    """Evaluate ``func`` at the 16th, 50th and 84th redshift percentiles and order the result.

    A luminosity need not grow with redshift (a band crossing, a K-correction), so ``func(z16)`` is
    not always the low end. ``median`` stays the value at ``z50``; ``low`` and ``high`` are the
    smallest and largest of the three values per row, ignoring NaN, which guarantees
    ``low ≤ median ≤ high`` wherever all three are finite.

    Parameters
    ----------
    func : callable
        Vectorised function of a redshift array (extra arguments bound by the caller).
    z16, z50, z84 : array_like
        Redshift percentiles per source.
    """
    values = [_as_float(func(_as_float(z))) for z in (z16, z50, z84)]
    low = np.fmin(np.fmin(values[0], values[1]), values[2])
    high = np.fmax(np.fmax(values[0], values[1]), values[2])
    return Interval(low=low, median=values[1], high=high)
