"""Black-hole masses from one spectrum, and what they imply: Eddington ratio and accretion rate.

Single-epoch virial masses combine a broad-line width (the velocity of the gas) with a continuum
luminosity (a proxy for the radius of the broad-line region through the radius–luminosity relation):

    log10(M / M☉) = a + b · log10(λL_λ / 1e44 erg/s) + 2 · log10(FWHM / 1000 km/s)

The coefficients are kept as data in :data:`CALIBRATIONS`. **All coefficients and intrinsic scatters
below are quoted from memory** and should be checked against the papers before publication:

* Hβ with λL5100: a = 6.91, b = 0.50, scatter 0.43 dex (Vestergaard & Peterson 2006, ApJ 641, 689).
* C IV with λL1350: a = 6.66, b = 0.53, scatter 0.36 dex (Vestergaard & Peterson 2006, ApJ 641, 689).
* Mg II with λL3000: a = 6.86, b = 0.50, scatter 0.55 dex (Vestergaard & Osmer 2009, ApJ 699, 800).
* Mg II with λL3000, alternative: a = 6.74, b = 0.62 (Shen et al. 2011, ApJS 194, 45); its scatter
  of 0.4 dex is a remembered typical value for this kind of calibration, not a number from that paper.

Two calibration sets are offered: ``"baseline"`` (the first three) and ``"mgii_2011"`` (the same with
the alternative Mg II calibration, the combination used by Shen et al. 2011).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from selector.errors import InputError

from selector.core import luminosity

__all__ = [
    "CALIBRATIONS",
    "CALIBRATION_SETS",
    "DEFAULT_CALIBRATION_SET",
    "LINES",
    "REASON_FWHM_NOT_FINITE",
    "REASON_FWHM_NOT_POSITIVE",
    "REASON_LINE_MISSING",
    "REASON_LUMINOSITY_MISSING",
    "REASON_LUMINOSITY_NOT_POSITIVE",
    "REASON_OK",
    "REASON_UNKNOWN_LINE",
    "BlackHoleSummary",
    "Calibration",
    "MassUncertainty",
    "calibration_by_name",
    "calibration_for_line",
    "calibration_set",
    "canonical_line",
    "summarise",
    "validate_line_rows",
    "virial_log_mass",
    "virial_log_mass_by_line",
    "virial_mass_uncertainty",
]


class Calibration(NamedTuple):
    """One single-epoch virial-mass calibration.

    Attributes
    ----------
    name : str
        Our identifier of the calibration.
    line : str
        Canonical broad-line name: ``"Hbeta"``, ``"MgII"`` or ``"CIV"``.
    continuum_angstrom : float
        Rest wavelength (Å) of the continuum luminosity λL_λ the calibration expects.
    a, b : float
        Zero point and luminosity slope of the mass relation.
    scatter_dex : float
        Intrinsic scatter of the calibration against reverberation masses (dex).
    reference : str
        Published source (authors, year, journal).
    """

    name: str
    line: str
    continuum_angstrom: float
    a: float
    b: float
    scatter_dex: float
    reference: str


_HBETA_2006 = Calibration("hbeta_5100_2006", "Hbeta", 5100.0, 6.91, 0.50, 0.43,
                          "Vestergaard & Peterson 2006, ApJ 641, 689")
_CIV_2006 = Calibration("civ_1350_2006", "CIV", 1350.0, 6.66, 0.53, 0.36,
                        "Vestergaard & Peterson 2006, ApJ 641, 689")
_MGII_2009 = Calibration("mgii_3000_2009", "MgII", 3000.0, 6.86, 0.50, 0.55,
                         "Vestergaard & Osmer 2009, ApJ 699, 800")
_MGII_2011 = Calibration("mgii_3000_2011", "MgII", 3000.0, 6.74, 0.62, 0.40,
                         "Shen et al. 2011, ApJS 194, 45")

#: Every calibration we know (coefficients from memory; see the module docstring).
CALIBRATIONS: tuple[Calibration, ...] = (_HBETA_2006, _CIV_2006, _MGII_2009, _MGII_2011)

#: Named sets, one calibration per line.
CALIBRATION_SETS: dict[str, tuple[Calibration, ...]] = {
    "baseline": (_HBETA_2006, _CIV_2006, _MGII_2009),
    "mgii_2011": (_HBETA_2006, _CIV_2006, _MGII_2011),
}

DEFAULT_CALIBRATION_SET = "baseline"

#: Canonical line names.
LINES = ("Hbeta", "MgII", "CIV")

# Spellings accepted after lower-casing and removing spaces, hyphens, underscores and dots.
_LINE_ALIASES = {"hbeta": "Hbeta", "hb": "Hbeta", "mgii": "MgII", "civ": "CIV"}

REASON_OK = ""
REASON_LINE_MISSING = "line_missing"
REASON_UNKNOWN_LINE = "line_unknown"
REASON_FWHM_NOT_FINITE = "fwhm_not_finite"
REASON_FWHM_NOT_POSITIVE = "fwhm_not_positive"
REASON_LUMINOSITY_MISSING = "luminosity_missing"
REASON_LUMINOSITY_NOT_POSITIVE = "luminosity_not_positive"
_REASON_DTYPE = "<U24"

_MISSING_SPELLINGS = frozenset({"", "none", "nan", "null", "<na>"})


def _squash(name) -> str:
    text = str(name).strip().lower().replace("β", "beta")
    for ch in " -_.":
        text = text.replace(ch, "")
    return text


def canonical_line(name) -> str | None:
    """Canonical name of a broad line (``"Hbeta"``, ``"MgII"``, ``"CIV"``), or None if unknown.

    Case, spaces, hyphens and underscores are ignored, and ``β`` reads as ``beta``: ``"C IV"``,
    ``"civ"``, ``"Mg II"``, ``"H beta"`` and ``"Hβ"`` are all recognised.
    """
    return _LINE_ALIASES.get(_squash(name))


def calibration_by_name(name: str) -> Calibration:
    """The calibration with identifier ``name`` (see :data:`CALIBRATIONS`).

    Raises
    ------
    InputError
        Unknown identifier; the message lists the known ones.
    """
    for cal in CALIBRATIONS:
        if cal.name == str(name).strip().lower():
            return cal
    raise InputError(f"unknown virial calibration {name!r}; allowed: {', '.join(c.name for c in CALIBRATIONS)}")


def calibration_set(name: str = DEFAULT_CALIBRATION_SET) -> tuple[Calibration, ...]:
    """The calibrations of a named set (case-insensitive).

    Raises
    ------
    InputError
        Unknown set; the message lists the known ones.
    """
    key = str(name).strip().lower()
    if key not in CALIBRATION_SETS:
        raise InputError(f"unknown calibration set {name!r}; allowed: {', '.join(CALIBRATION_SETS)}")
    return CALIBRATION_SETS[key]


def calibration_for_line(line: str, set_name: str = DEFAULT_CALIBRATION_SET) -> Calibration:
    """The calibration for a broad line within a named set.

    Raises
    ------
    InputError
        Unknown line or set; the message lists the allowed names.
    """
    calibrations = calibration_set(set_name)
    canonical = canonical_line(line)
    for cal in calibrations:
        if cal.line == canonical:
            return cal
    raise InputError(f"unknown broad line {line!r}; allowed: {', '.join(c.line for c in calibrations)} "
                     "(case and spaces ignored, e.g. 'C IV', 'Mg II', 'Hβ')")


def virial_log_mass(fwhm_kms, lamL_erg_s, calibration: Calibration) -> np.ndarray:
    """Single-epoch virial mass, ``log10(M/M☉) = a + b·log10(λL_λ/1e44) + 2·log10(FWHM/1000)``.

    Vestergaard & Peterson 2006, ApJ 641, 689 (form and Hβ, C IV coefficients); Vestergaard & Osmer
    2009, ApJ 699, 800 (Mg II); Shen et al. 2011, ApJS 194, 45 (alternative Mg II). Coefficients from
    memory.

    Parameters
    ----------
    fwhm_kms : array_like
        Full width at half maximum of the broad line (km/s).
    lamL_erg_s : array_like
        Continuum ``λL_λ`` (erg/s) at ``calibration.continuum_angstrom``.
    calibration : Calibration

    Returns
    -------
    numpy.ndarray
        ``log10(M/M☉)``; NaN where the width or luminosity is not positive and finite.
    """
    fwhm = np.asarray(fwhm_kms, dtype=np.float64)
    lum = np.asarray(lamL_erg_s, dtype=np.float64)
    ok = np.isfinite(fwhm) & (fwhm > 0.0) & np.isfinite(lum) & (lum > 0.0)
    safe_fwhm = np.where(ok, fwhm, 1000.0)
    safe_lum = np.where(ok, lum, 1e44)
    value = calibration.a + calibration.b * np.log10(safe_lum / 1e44) + 2.0 * np.log10(safe_fwhm / 1000.0)
    return np.where(ok, value, np.nan)


def _canonical_lines(line_names) -> tuple[np.ndarray, np.ndarray]:
    """Canonical line per row ('' when unknown) and a missing-name mask, resolved once per distinct name."""
    names = np.asarray(line_names, dtype=object).astype(str)
    distinct, inverse = np.unique(names, return_inverse=True)
    canon = np.array([canonical_line(n) or "" for n in distinct], dtype="<U8")
    missing = np.array([_squash(n) in _MISSING_SPELLINGS for n in distinct], dtype=bool)
    return canon[inverse].reshape(names.shape), missing[inverse].reshape(names.shape)


def virial_log_mass_by_line(line_names, fwhm_kms, lamL_erg_s,
                            set_name: str = DEFAULT_CALIBRATION_SET) -> np.ndarray:
    """Virial masses for rows measured on different lines, each with its own calibration.

    ``lamL_erg_s`` must hold, row by row, the continuum luminosity at the wavelength that row's
    calibration expects (5100 Å for Hβ, 3000 Å for Mg II, 1350 Å for C IV). Rows with an unknown
    line or unusable inputs get NaN; :func:`validate_line_rows` says why.
    """
    lines, _ = _canonical_lines(line_names)
    fwhm = np.asarray(fwhm_kms, dtype=np.float64)
    lum = np.asarray(lamL_erg_s, dtype=np.float64)
    out = np.full(np.broadcast_shapes(lines.shape, fwhm.shape, lum.shape), np.nan)
    for cal in calibration_set(set_name):
        rows = lines == cal.line
        out = np.where(rows, virial_log_mass(fwhm, lum, cal), out)
    return out


class MassUncertainty(NamedTuple):
    """Uncertainty of a single-epoch ``log10 M`` (dex).

    Attributes
    ----------
    measurement_dex : numpy.ndarray
        From the width and luminosity errors.
    intrinsic_dex : numpy.ndarray
        The calibration's scatter, the same for every row.
    total_dex : numpy.ndarray
        Quadrature sum of the two.
    """

    measurement_dex: np.ndarray
    intrinsic_dex: np.ndarray
    total_dex: np.ndarray


def virial_mass_uncertainty(fwhm_kms, fwhm_err_kms, calibration: Calibration, *, lamL_err_dex=None,
                            lamL_erg_s=None, lamL_err_erg_s=None) -> MassUncertainty:
    """Propagate measurement errors into ``log10 M`` and add the calibration scatter.

    First-order propagation of the mass relation:
    ``σ_logM,meas = sqrt((b·σ_logL)² + (2·σ_FWHM / (FWHM·ln 10))²)``, with
    ``σ_logL = σ_L / (L ln 10)`` when the luminosity error is absolute (relation of Vestergaard &
    Peterson 2006, ApJ 641, 689; independent Gaussian errors to first order, common practice).

    Parameters
    ----------
    fwhm_kms, fwhm_err_kms : array_like
        Line width and its 1σ error (km/s).
    calibration : Calibration
    lamL_err_dex : array_like, optional
        1σ error of ``log10 λL_λ`` (dex). Give this, or both ``lamL_erg_s`` and ``lamL_err_erg_s``.
    lamL_erg_s, lamL_err_erg_s : array_like, optional
        Luminosity and its absolute 1σ error (erg/s).

    Raises
    ------
    InputError
        Neither or both forms of the luminosity error given.
    """
    absolute = lamL_erg_s is not None or lamL_err_erg_s is not None
    if (lamL_err_dex is None) == (not absolute):
        raise InputError("luminosity error: give either lamL_err_dex, or lamL_erg_s with lamL_err_erg_s")
    if absolute:
        if lamL_erg_s is None or lamL_err_erg_s is None:
            raise InputError("luminosity error: an absolute error needs both lamL_erg_s and lamL_err_erg_s")
        with np.errstate(invalid="ignore", divide="ignore"):
            sigma_log_l = (np.asarray(lamL_err_erg_s, dtype=np.float64)
                           / (np.asarray(lamL_erg_s, dtype=np.float64) * np.log(10.0)))
    else:
        sigma_log_l = np.asarray(lamL_err_dex, dtype=np.float64)
    fwhm = np.asarray(fwhm_kms, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        sigma_width = 2.0 * np.asarray(fwhm_err_kms, dtype=np.float64) / (np.where(fwhm > 0.0, fwhm, np.nan)
                                                                        * np.log(10.0))
    measurement = np.hypot(calibration.b * sigma_log_l, sigma_width)
    intrinsic = np.full(measurement.shape, calibration.scatter_dex)
    return MassUncertainty(measurement_dex=measurement, intrinsic_dex=intrinsic,
                           total_dex=np.hypot(measurement, intrinsic))


def validate_line_rows(line_names, fwhm_kms, lamL_erg_s) -> np.ndarray:
    """Reason code per row, ``''`` where the row can get a virial mass.

    One code per row, the first that applies in this order: ``line_missing``, ``line_unknown``,
    ``fwhm_not_finite``, ``fwhm_not_positive``, ``luminosity_missing`` (NaN),
    ``luminosity_not_positive`` (zero, negative or infinite). Meant to feed a rejects table directly.

    Parameters
    ----------
    line_names : array_like of str
        Broad-line name per row (any accepted spelling, see :func:`canonical_line`).
    fwhm_kms : array_like
    lamL_erg_s : array_like

    Returns
    -------
    numpy.ndarray
        Unicode strings, same length as the inputs.
    """
    lines, missing = _canonical_lines(line_names)
    fwhm = np.asarray(fwhm_kms, dtype=np.float64)
    lum = np.asarray(lamL_erg_s, dtype=np.float64)
    shape = np.broadcast_shapes(lines.shape, fwhm.shape, lum.shape)
    reasons = np.full(shape, REASON_OK, dtype=_REASON_DTYPE)
    # Assign from the least to the most important so the first applicable reason wins.
    with np.errstate(invalid="ignore"):
        checks = [
            (~(np.isfinite(lum) & (lum > 0.0)) & ~np.isnan(lum), REASON_LUMINOSITY_NOT_POSITIVE),
            (np.isnan(lum), REASON_LUMINOSITY_MISSING),
            (np.isfinite(fwhm) & (fwhm <= 0.0), REASON_FWHM_NOT_POSITIVE),
            (~np.isfinite(fwhm), REASON_FWHM_NOT_FINITE),
            (lines == "", REASON_UNKNOWN_LINE),
            (missing, REASON_LINE_MISSING),
        ]
    for mask, code in checks:
        reasons = np.where(mask, code, reasons)
    return reasons.astype(_REASON_DTYPE)


class BlackHoleSummary(NamedTuple):
    """What a mass and a bolometric luminosity imply, per source."""

    mass_msun: np.ndarray
    eddington_ratio: np.ndarray
    minimum_mass_msun: np.ndarray
    accretion_low_msun_yr: np.ndarray
    accretion_high_msun_yr: np.ndarray
    accretion_low_msun_day: np.ndarray
    accretion_high_msun_day: np.ndarray


def summarise(log_mass_msun, lbol_erg_s,
              efficiency_range=luminosity.DEFAULT_EFFICIENCY_RANGE) -> BlackHoleSummary:
    """Eddington ratio, Eddington-limited minimum mass and accretion-rate range.

    Uses :func:`selector.core.luminosity.eddington_ratio` (Rybicki & Lightman 1979) and
    :func:`selector.core.luminosity.accretion_rate_range` (``Ṁ = L_bol/(ηc²)``, efficiencies from
    Bardeen, Press & Teukolsky 1972, ApJ 178, 347).

    Parameters
    ----------
    log_mass_msun : array_like
        ``log10(M/M☉)``, e.g. from :func:`virial_log_mass`.
    lbol_erg_s : array_like
        Bolometric luminosity (erg/s).
    efficiency_range : (float, float)
        ``(η_min, η_max)``; default from spin 0 to spin 0.998.
    """
    mass = 10.0 ** np.asarray(log_mass_msun, dtype=np.float64)
    lbol = np.asarray(lbol_erg_s, dtype=np.float64)
    rates = luminosity.accretion_rate_range(lbol, efficiency_range)
    return BlackHoleSummary(
        mass_msun=mass,
        eddington_ratio=luminosity.eddington_ratio(lbol, mass),
        minimum_mass_msun=luminosity.minimum_mass_msun(lbol),
        accretion_low_msun_yr=rates.low_msun_yr,
        accretion_high_msun_yr=rates.high_msun_yr,
        accretion_low_msun_day=rates.low_msun_day,
        accretion_high_msun_day=rates.high_msun_day,
    )
