"""Probabilistic counterparts between the astrometric and the infrared catalogue.

Array-level building blocks, in the order a pipeline uses them:

1. positional covariances of both sides at the infrared epoch (:func:`astrometric_covariance`,
   :func:`infrared_covariance`, :func:`rotate_covariance`, :func:`combine_covariances`);
2. tangent-plane offsets between two positions (:func:`tangent_offset`, :func:`tangent_offset_xyz`);
3. the Bayes factor of Budavári & Szalay (2008, ApJ 679, 301) in its circular and its elliptical
   form (:func:`bayes_factor_circular`, :func:`bayes_factor`), always with its logarithm;
4. the prior from the local infrared source density and the posterior probability
   (:func:`local_density_per_sr`, :func:`prior_from_density`, :func:`posterior_log_odds`,
   :func:`posterior_probability`);
5. one-to-one assignment of candidate pairs (:func:`assign_one_to_one`, :func:`search_radius_arcsec`);
6. the chance-match rate from shifted positions (:func:`shift_positions`, :func:`chance_counterparts`).

Units: positions in degrees (ICRS) or as 3-D unit vectors; offsets and standard deviations in arcsec
unless a name says mas; variances in arcsec²; proper motions in mas/yr with the RA component
multiplied by cos δ (μα*); epoch differences in Julian years; densities in sources per steradian.
The local tangent plane at a position has axes east (increasing RA) and north (increasing Dec).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from scipy.spatial import cKDTree
from scipy.special import expit

from selector.core.frames import SkyPositions
from selector.errors import ConfigError, InputError

__all__ = [
    "Assignment", "BayesFactor", "ChanceCounterparts", "PositionCovariance", "Positions",
    "TangentOffset", "assign_one_to_one", "astrometric_covariance", "bayes_factor",
    "bayes_factor_circular", "chance_counterparts", "combine_covariances", "infrared_covariance",
    "local_density_per_sr", "major_sigma_arcsec", "posterior_log_odds", "posterior_probability",
    "prior_from_density", "rotate_covariance", "search_radius_arcsec", "shift_positions",
    "tangent_offset", "tangent_offset_xyz", "unit_vectors",
]

_ARCSEC_PER_RAD = 648_000.0 / np.pi
_RAD_PER_ARCSEC = np.pi / 648_000.0
_ARCSEC2_PER_MAS2 = 1.0e-6
_LN2 = np.log(2.0)


# ---------------------------------------------------------------------------------------------------
# Named results
# ---------------------------------------------------------------------------------------------------

class PositionCovariance(NamedTuple):
    """A 2×2 positional covariance in the local tangent plane, one per source or pair.

    Attributes
    ----------
    var_east_arcsec2 : numpy.ndarray
        Variance along east (arcsec²).
    var_north_arcsec2 : numpy.ndarray
        Variance along north (arcsec²).
    cov_en_arcsec2 : numpy.ndarray
        Covariance of the east and north components (arcsec²).
    """

    var_east_arcsec2: np.ndarray
    var_north_arcsec2: np.ndarray
    cov_en_arcsec2: np.ndarray


class TangentOffset(NamedTuple):
    """Position b seen from position a, in a's tangent plane.

    Attributes
    ----------
    east_arcsec, north_arcsec : numpy.ndarray
        Offset of b from a along a's east and north axes (arcsec).
    separation_arcsec : numpy.ndarray
        Great-circle separation (arcsec), exact for any distance.
    rotation_rad : numpy.ndarray
        Position angle (from north through east, radians) of b's north axis as seen in a's tangent
        plane. Pass it to :func:`rotate_covariance` to express b's covariance on a's axes; it is
        about Δα·sin δ, negligible except within a few search radii of a pole.
    """

    east_arcsec: np.ndarray
    north_arcsec: np.ndarray
    separation_arcsec: np.ndarray
    rotation_rad: np.ndarray


class BayesFactor(NamedTuple):
    """The Bayes factor of two positions and its natural logarithm.

    Attributes
    ----------
    ln_b : numpy.ndarray
        ln B, finite where B itself underflows to 0; use it for everything numerical.
    b : numpy.ndarray
        B = exp(ln B), for display.
    """

    ln_b: np.ndarray
    b: np.ndarray


class Assignment(NamedTuple):
    """One-to-one counterparts, one row per astrometric source.

    Attributes
    ----------
    pair_index : numpy.ndarray of int64
        Index into the input pair arrays of the chosen pair, −1 if none.
    ib : numpy.ndarray of int64
        Infrared index of the chosen counterpart, −1 if none.
    probability : numpy.ndarray
        Posterior probability of the chosen pair; 0 where there is none.
    ln_b : numpy.ndarray
        ln B of the chosen pair; NaN where there is none.
    ln_odds : numpy.ndarray
        Posterior log-odds ln B + ln P0 − ln(1 − P0) of the chosen pair; NaN where there is none.
    separation_arcsec : numpy.ndarray
        Separation of the chosen pair (arcsec); NaN where there is none.
    n_candidates : numpy.ndarray of int64
        Candidate pairs of this astrometric source (usable ones: finite ln B and prior).
    n_rivals : numpy.ndarray of int64
        Other astrometric sources that have a candidate pair with the chosen infrared source; 0 where
        nothing was chosen.
    n_competitors : numpy.ndarray of int64
        Sources that competed with the chosen pair: the other candidate infrared sources of this
        astrometric source (``n_candidates − 1``; all ``n_candidates`` when nothing was chosen) plus
        ``n_rivals``.
    runner_up_ratio : numpy.ndarray
        P(runner-up) / P(chosen), where the runner-up is the most probable candidate pair, other than
        the chosen one, that shares either this astrometric source or the chosen infrared source. It
        exceeds 1 when the source lost a more probable counterpart to another astrometric source.
        NaN when nothing was chosen or there is no other pair.
    ambiguous : numpy.ndarray of bool
        ``runner_up_ratio > ambiguity_ratio``.
    """

    pair_index: np.ndarray
    ib: np.ndarray
    probability: np.ndarray
    ln_b: np.ndarray
    ln_odds: np.ndarray
    separation_arcsec: np.ndarray
    n_candidates: np.ndarray
    n_rivals: np.ndarray
    n_competitors: np.ndarray
    runner_up_ratio: np.ndarray
    ambiguous: np.ndarray


# Shifted positions come back in the package's one sky-position type.
Positions = SkyPositions


class ChanceCounterparts(NamedTuple):
    """Expected number of chance counterparts estimated from shifted positions.

    Attributes
    ----------
    expected : float
        Expected number of accepted pairs in the real match that are chance coincidences.
    error : float
        Its standard error from the counting statistics of the shifted matches (binomial). The count
        in one realisation scatters further around ``expected`` by about ``sqrt(expected)``.
    rate : float
        Fraction of shifted astrometric sources that were given an accepted (chance) counterpart.
    rate_error : float
        Binomial standard error of ``rate``.
    n_shifted_matches : int
        Accepted pairs counted in the shifted matches.
    """

    expected: float
    error: float
    rate: float
    rate_error: float
    n_shifted_matches: int


# ---------------------------------------------------------------------------------------------------
# Validation
# ---------------------------------------------------------------------------------------------------

def _f64(x) -> np.ndarray:
    return np.asarray(x, dtype=np.float64)


def _nonnegative(values, name: str) -> np.ndarray:
    """Errors may be NaN (missing: the result is NaN) but never negative."""
    v = _f64(values)
    with np.errstate(invalid="ignore"):
        bad = v < 0.0
    if np.any(bad):
        first = int(np.flatnonzero(bad.ravel())[0])
        raise InputError(f"{name} has {int(bad.sum())} negative value(s) (first at index {first}); "
                         "standard errors must be >= 0: check the error column and its units")
    return v


def _correlation(values, name: str):
    """None or NaN means uncorrelated; |ρ| > 1 is not a correlation."""
    if values is None:
        return 0.0
    v = _f64(values)
    with np.errstate(invalid="ignore"):
        bad = np.abs(v) > 1.0
    if np.any(bad):
        first = int(np.flatnonzero(bad.ravel())[0])
        raise InputError(f"{name} has {int(bad.sum())} value(s) outside [-1, 1] (first at index "
                         f"{first}); a correlation coefficient must lie in [-1, 1]")
    return np.where(np.isnan(v), 0.0, v)


def _config_nonnegative(value, name: str) -> np.ndarray:
    v = _f64(value)
    if not np.all(np.isfinite(v)) or np.any(v < 0.0):
        raise ConfigError(f"{name} = {value!r} is not allowed; it must be a finite number >= 0")
    return v


def _config_positive(value, name: str) -> np.ndarray:
    v = _f64(value)
    if not np.all(np.isfinite(v)) or np.any(v <= 0.0):
        raise ConfigError(f"{name} = {value!r} is not allowed; it must be a finite number > 0")
    return v


def _finish(var_e, var_n, cov_en, inflation, systematic_arcsec) -> PositionCovariance:
    # the inflation scales the statistical error (so the covariance by k²); the floor is an
    # independent isotropic error added in quadrature
    k2 = inflation * inflation
    s2 = systematic_arcsec * systematic_arcsec
    return PositionCovariance(np.asarray(k2 * var_e + s2, np.float64),
                              np.asarray(k2 * var_n + s2, np.float64),
                              np.asarray(k2 * cov_en, np.float64))


# ---------------------------------------------------------------------------------------------------
# 1. Positional covariances
# ---------------------------------------------------------------------------------------------------

def astrometric_covariance(sigma_ra_mas, sigma_dec_mas, dt_yr=0.0, pmra_error_mas_yr=None,
                           pmdec_error_mas_yr=None, *, ra_dec_corr=None, pmra_pmdec_corr=None,
                           ra_pmra_corr=None, dec_pmdec_corr=None, ra_pmdec_corr=None,
                           dec_pmra_corr=None, systematic_arcsec=0.0,
                           inflation=1.0) -> PositionCovariance:
    """Positional covariance of astrometric sources carried to another epoch.

    Parameters
    ----------
    sigma_ra_mas, sigma_dec_mas : array_like of float
        Standard errors of the position at the catalogue epoch along east (σα* = σα cos δ) and north
        (σδ), in mas. Must be >= 0; NaN gives NaN.
    dt_yr : float or array_like of float, optional
        Target epoch (the infrared epoch) minus the astrometric epoch (Julian years). Only its
        magnitude matters unless position–motion correlations are given.
    pmra_error_mas_yr, pmdec_error_mas_yr : array_like of float, optional
        Standard errors of μα* and μδ (mas/yr). None: no motion term (both must then be None).
    ra_dec_corr, pmra_pmdec_corr : array_like of float, optional
        Correlation of the two position components, and of the two motion components.
    ra_pmra_corr, dec_pmdec_corr, ra_pmdec_corr, dec_pmra_corr : array_like of float, optional
        Correlations between a position component and a motion component. Every correlation that is
        None or NaN counts as 0; values outside [−1, 1] raise :class:`~selector.errors.InputError`.
    systematic_arcsec : float or array_like of float, optional
        Systematic floor σ_sys (arcsec) added in quadrature to each axis.
    inflation : float or array_like of float, optional
        Factor k > 0 multiplying the statistical standard errors.

    Returns
    -------
    PositionCovariance
        Components in arcsec².

    Notes
    -----
    The position at the target epoch is x(t) = x0 + t μ for each axis, a linear function of the
    four astrometric parameters, so its covariance is J C Jᵀ with J = [I, t I] (linear propagation of
    a Gaussian covariance, common practice):

        var_e = σα*² + 2t ρ(α*, μα*) σα* σμα* + t² σμα*²
        var_n = σδ² + 2t ρ(δ, μδ) σδ σμδ + t² σμδ²
        cov_en = ρ(α*, δ) σα* σδ + t [ρ(α*, μδ) σα* σμδ + ρ(δ, μα*) σδ σμα*] + t² ρ(μα*, μδ) σμα* σμδ

    then ``C = k² C_stat + σ_sys² I``. Parallax is neglected (a few mas at most, against infrared
    errors of tenths of an arcsec). If the correlations given are mutually inconsistent the result
    may not be positive definite; :func:`bayes_factor` then returns NaN.
    """
    s_a = _nonnegative(sigma_ra_mas, "sigma_ra_mas")
    s_d = _nonnegative(sigma_dec_mas, "sigma_dec_mas")
    k = _config_positive(inflation, "inflation")
    sys = _config_nonnegative(systematic_arcsec, "systematic_arcsec")
    var_e = s_a * s_a
    var_n = s_d * s_d
    cov = _correlation(ra_dec_corr, "ra_dec_corr") * s_a * s_d
    if (pmra_error_mas_yr is None) != (pmdec_error_mas_yr is None):
        raise InputError("give both pmra_error_mas_yr and pmdec_error_mas_yr, or neither")
    if pmra_error_mas_yr is not None:
        t = _f64(dt_yr)
        if not np.all(np.isfinite(t)):
            raise InputError("dt_yr must be finite; check both catalogue epochs")
        m_a = _nonnegative(pmra_error_mas_yr, "pmra_error_mas_yr")
        m_d = _nonnegative(pmdec_error_mas_yr, "pmdec_error_mas_yr")
        rho_e = _correlation(ra_pmra_corr, "ra_pmra_corr")
        rho_n = _correlation(dec_pmdec_corr, "dec_pmdec_corr")
        var_e = var_e + 2.0 * t * rho_e * s_a * m_a + t * t * m_a * m_a
        var_n = var_n + 2.0 * t * rho_n * s_d * m_d + t * t * m_d * m_d
        cov = (cov
               + t * (_correlation(ra_pmdec_corr, "ra_pmdec_corr") * s_a * m_d
                      + _correlation(dec_pmra_corr, "dec_pmra_corr") * s_d * m_a)
               + t * t * _correlation(pmra_pmdec_corr, "pmra_pmdec_corr") * m_a * m_d)
    var_e, var_n, cov = np.broadcast_arrays(var_e, var_n, cov)
    return _finish(var_e * _ARCSEC2_PER_MAS2, var_n * _ARCSEC2_PER_MAS2, cov * _ARCSEC2_PER_MAS2,
                   k, sys)


def infrared_covariance(sigma_ra_arcsec, sigma_dec_arcsec=None, ra_dec_corr=None, *,
                        systematic_arcsec=0.0, inflation=1.0) -> PositionCovariance:
    """Positional covariance of infrared sources.

    Parameters
    ----------
    sigma_ra_arcsec : array_like of float
        Standard error along east, σα* (arcsec); with ``sigma_dec_arcsec`` None it is the one-axis
        error of a circular error distribution (not a radial error: for a radial rms σ_r pass
        σ_r/√2).
    sigma_dec_arcsec : array_like of float, optional
        Standard error along north (arcsec).
    ra_dec_corr : array_like of float, optional
        Correlation of the two components; None or NaN count as 0.
    systematic_arcsec : float or array_like of float, optional
        Systematic floor (arcsec) added in quadrature to each axis.
    inflation : float or array_like of float, optional
        Factor k > 0 multiplying the statistical standard errors.

    Returns
    -------
    PositionCovariance
        ``k² [[σα*², ρσα*σδ], [ρσα*σδ, σδ²]] + σ_sys² I`` in arcsec².
    """
    s_a = _nonnegative(sigma_ra_arcsec, "sigma_ra_arcsec")
    s_d = s_a if sigma_dec_arcsec is None else _nonnegative(sigma_dec_arcsec, "sigma_dec_arcsec")
    k = _config_positive(inflation, "inflation")
    sys = _config_nonnegative(systematic_arcsec, "systematic_arcsec")
    cov = _correlation(ra_dec_corr, "ra_dec_corr") * s_a * s_d
    var_e, var_n, cov = np.broadcast_arrays(s_a * s_a, s_d * s_d, cov)
    return _finish(var_e, var_n, cov, k, sys)


def rotate_covariance(covariance: PositionCovariance, rotation_rad) -> PositionCovariance:
    """Express a covariance on tangent-plane axes turned by an angle.

    Parameters
    ----------
    covariance : PositionCovariance
        Covariance on its own (east, north) axes (arcsec²).
    rotation_rad : array_like of float
        Position angle (from north through east) of those north axes on the target axes, as given by
        :attr:`TangentOffset.rotation_rad`.

    Returns
    -------
    PositionCovariance
        ``J C Jᵀ`` with ``J = [[cos θ, sin θ], [−sin θ, cos θ]]``, which maps (east, north) components
        on the source axes to the target axes (a rotation, common practice).
    """
    v_e, v_n, c_en = (_f64(x) for x in covariance)
    theta = _f64(rotation_rad)
    c, s = np.cos(theta), np.sin(theta)
    cs = c * s
    return PositionCovariance(c * c * v_e + 2.0 * cs * c_en + s * s * v_n,
                              s * s * v_e - 2.0 * cs * c_en + c * c * v_n,
                              cs * (v_n - v_e) + (c * c - s * s) * c_en)


def combine_covariances(*covariances: PositionCovariance) -> PositionCovariance:
    """Sum covariances on the same axes: the covariance of the difference of independent positions."""
    if not covariances:
        raise ValueError("combine_covariances needs at least one covariance")
    parts = [tuple(_f64(x) for x in c) for c in covariances]
    return PositionCovariance(*(np.asarray(sum(p[i] for p in parts), np.float64) for i in range(3)))


def major_sigma_arcsec(covariance: PositionCovariance) -> np.ndarray:
    """Standard deviation along the major axis of an error ellipse (arcsec).

    The square root of the larger eigenvalue of the 2×2 covariance,
    ``(a + d)/2 + sqrt(((a − d)/2)² + c²)`` (common practice).
    """
    v_e, v_n, c_en = (_f64(x) for x in covariance)
    half_sum = 0.5 * (v_e + v_n)
    return np.sqrt(half_sum + np.hypot(0.5 * (v_e - v_n), c_en))


# ---------------------------------------------------------------------------------------------------
# 2. Offsets on the sphere
# ---------------------------------------------------------------------------------------------------

def unit_vectors(ra_deg, dec_deg) -> np.ndarray:
    """ICRS degrees to 3-D unit vectors, shape ``(n, 3)``."""
    a = np.radians(_f64(ra_deg))
    d = np.radians(_f64(dec_deg))
    cos_d = np.cos(d)
    return np.stack([cos_d * np.cos(a), cos_d * np.sin(a), np.sin(d)], axis=-1)


def _triad(ra_rad, dec_rad):
    """Unit vectors r (position), p (east) and q (north) at a position (Murray 1983, from memory)."""
    sin_a, cos_a = np.sin(ra_rad), np.cos(ra_rad)
    sin_d, cos_d = np.sin(dec_rad), np.cos(dec_rad)
    r = (cos_d * cos_a, cos_d * sin_a, sin_d)
    p = (-sin_a, cos_a, np.zeros_like(sin_a))
    q = (-sin_d * cos_a, -sin_d * sin_a, cos_d)
    return r, p, q


def _dot(u, v):
    return u[0] * v[0] + u[1] * v[1] + u[2] * v[2]


def _offset(ra_a, dec_a, ra_b, dec_b, projection: str) -> TangentOffset:
    if projection not in ("equidistant", "gnomonic"):
        raise ValueError(f"projection = {projection!r}; use 'equidistant' or 'gnomonic'")
    r_a, p_a, q_a = _triad(ra_a, dec_a)
    r_b, _, q_b = _triad(ra_b, dec_b)
    e = _dot(r_b, p_a)
    n = _dot(r_b, q_a)
    w = _dot(r_b, r_a)
    chord_perp = np.hypot(e, n)
    # atan2 of the two components stays accurate at tiny and at large separations alike
    psi = np.arctan2(chord_perp, w)
    with np.errstate(invalid="ignore", divide="ignore"):
        if projection == "equidistant":
            scale = np.where(chord_perp > 0.0, psi / chord_perp, 1.0)
        else:
            scale = np.where(w > 0.0, 1.0 / w, np.nan)
    rotation = np.arctan2(_dot(q_b, p_a), _dot(q_b, q_a))
    return TangentOffset(np.asarray(e * scale * _ARCSEC_PER_RAD, np.float64),
                         np.asarray(n * scale * _ARCSEC_PER_RAD, np.float64),
                         np.asarray(psi * _ARCSEC_PER_RAD, np.float64),
                         np.asarray(rotation, np.float64))


def tangent_offset(ra_a_deg, dec_a_deg, ra_b_deg, dec_b_deg, *,
                   projection: str = "equidistant") -> TangentOffset:
    """Offset of position b from position a, on a's east and north axes.

    Parameters
    ----------
    ra_a_deg, dec_a_deg, ra_b_deg, dec_b_deg : array_like of float
        Positions (ICRS degrees), broadcast against each other (one row per pair).
    projection : {'equidistant', 'gnomonic'}, optional
        'equidistant' (default): the azimuthal equidistant projection around a, whose offset length is
        exactly the great-circle separation ψ, so that the elliptical Bayes factor reduces exactly to
        the circular one of Budavári & Szalay (2008, ApJ 679, 301). 'gnomonic': the tangent-plane
        (standard) coordinates ξ = (u·p)/(u·r), η = (u·q)/(u·r), of length tan ψ; the two differ by a
        relative ψ²/3, below 1e-7 for ψ < 1 arcmin.

    Returns
    -------
    TangentOffset
        Offsets, separation and the turn between the two positions' north axes.

    Notes
    -----
    With r, p, q the unit vectors towards a, east and north at a, and u the unit vector towards b,
    the direction of b from a has components (u·p, u·q) and the separation is
    ψ = atan2(|(u·p, u·q)|, u·r). Vectors make the poles ordinary places; the east axis at a pole
    is the one of RA = the given RA.
    """
    ra_a, dec_a, ra_b, dec_b = np.broadcast_arrays(*(np.radians(_f64(x)) for x in
                                                     (ra_a_deg, dec_a_deg, ra_b_deg, dec_b_deg)))
    return _offset(ra_a, dec_a, ra_b, dec_b, projection)


def _radec_rad_from_xyz(xyz):
    xyz = _f64(xyz)
    x, y, z = xyz[..., 0], xyz[..., 1], xyz[..., 2]
    return np.arctan2(y, x), np.arctan2(z, np.hypot(x, y))


def tangent_offset_xyz(xyz_a, xyz_b, *, projection: str = "equidistant") -> TangentOffset:
    """:func:`tangent_offset` for positions given as 3-D vectors, shape ``(n, 3)`` each.

    The vectors need not be normalised. At a pole (x = y = 0) the east axis is that of RA = 0.
    """
    ra_a, dec_a = _radec_rad_from_xyz(xyz_a)
    ra_b, dec_b = _radec_rad_from_xyz(xyz_b)
    return _offset(*np.broadcast_arrays(ra_a, dec_a, ra_b, dec_b), projection)


# ---------------------------------------------------------------------------------------------------
# 3. Bayes factor
# ---------------------------------------------------------------------------------------------------

def bayes_factor_circular(separation_arcsec, sigma_a_arcsec, sigma_b_arcsec) -> BayesFactor:
    """Bayes factor for two positions with circular Gaussian errors.

    Parameters
    ----------
    separation_arcsec : array_like of float
        Angular separation ψ (arcsec).
    sigma_a_arcsec, sigma_b_arcsec : array_like of float
        One-axis standard errors σ1, σ2 of the two positions (arcsec), >= 0.

    Returns
    -------
    BayesFactor
        ``B = 2/(σ1² + σ2²) · exp[−ψ²/(2(σ1² + σ2²))]`` with σ in radians (Budavári & Szalay 2008,
        ApJ 679, 301, the two-catalogue case in the small-error limit; from memory), computed as
        ``ln B = ln 2 − ln s² − ψ²/(2s²)``. NaN where σ1² + σ2² = 0.
    """
    psi = _f64(separation_arcsec)
    s1 = _nonnegative(sigma_a_arcsec, "sigma_a_arcsec")
    s2 = _nonnegative(sigma_b_arcsec, "sigma_b_arcsec")
    var_arcsec2 = s1 * s1 + s2 * s2
    with np.errstate(invalid="ignore", divide="ignore"):
        var_arcsec2 = np.where(var_arcsec2 > 0.0, var_arcsec2, np.nan)
        ln_b = _LN2 - np.log(var_arcsec2 * _RAD_PER_ARCSEC ** 2) - 0.5 * psi * psi / var_arcsec2
    ln_b = np.asarray(ln_b, np.float64)
    return BayesFactor(ln_b, np.exp(ln_b))


def bayes_factor(east_arcsec, north_arcsec, covariance: PositionCovariance) -> BayesFactor:
    """Bayes factor for two positions with elliptical Gaussian errors.

    Parameters
    ----------
    east_arcsec, north_arcsec : array_like of float
        Offset Δ between the two positions on common tangent-plane axes (arcsec), for example from
        :func:`tangent_offset`.
    covariance : PositionCovariance
        Covariance Σ = Σ1 + Σ2 of the offset, the sum of both positions' covariances on the same axes
        (arcsec²; :func:`combine_covariances`, with :func:`rotate_covariance` where the axes differ).

    Returns
    -------
    BayesFactor
        ``B = 4π N(Δ; 0, Σ) = 2/sqrt(det Σ) · exp(−½ ΔᵀΣ⁻¹Δ)`` with Σ in steradians, as
        ``ln B = ln 2 − ½ ln det Σ − ½ ΔᵀΣ⁻¹Δ``. NaN where Σ is not positive definite or any input
        is NaN.

    Notes
    -----
    Budavári & Szalay (2008, ApJ 679, 301) define B as the likelihood that both positions come
    from one direction m over the likelihood that they come from two independent directions, with
    every direction equally likely on the sphere (prior density 1/4π). With Gaussian position
    densities f1, f2 this is ``B = 4π ∫ f1(m) f2(m) dm``; in the tangent plane the integral of the
    product of two Gaussians is the Gaussian of their difference with the summed covariance,
    N(Δ; 0, Σ1 + Σ2). For Σ = s² I it is the circular form of :func:`bayes_factor_circular`.
    """
    de = _f64(east_arcsec)
    dn = _f64(north_arcsec)
    v_e, v_n, c_en = (_f64(x) for x in covariance)
    det = v_e * v_n - c_en * c_en
    with np.errstate(invalid="ignore", divide="ignore"):
        ok = (det > 0.0) & (v_e > 0.0)
        det = np.where(ok, det, np.nan)
        chi2 = (v_n * de * de - 2.0 * c_en * de * dn + v_e * dn * dn) / det
        ln_b = _LN2 - 0.5 * np.log(det * _RAD_PER_ARCSEC ** 4) - 0.5 * chi2
    ln_b = np.asarray(ln_b, np.float64)
    return BayesFactor(ln_b, np.exp(ln_b))


# ---------------------------------------------------------------------------------------------------
# 4. Prior and posterior
# ---------------------------------------------------------------------------------------------------

def local_density_per_sr(query_xyz, catalogue_xyz, radius_arcsec, *, area_fraction=None) -> np.ndarray:
    """Surface density of catalogue sources around each query position.

    Parameters
    ----------
    query_xyz : array_like of float, shape (n, 3)
        Unit vectors of the positions where the density is wanted (for the counterpart prior: the
        astrometric sources).
    catalogue_xyz : array_like of float, shape (m, 3)
        Unit vectors of the sources to count (the infrared catalogue). It must cover every cap
        completely: include a margin of at least ``radius_arcsec`` around the query positions.
    radius_arcsec : float
        Cap radius r (arcsec); 1–3 arcmin balances noise (about sqrt(N) in N counts) against
        following real density changes.
    area_fraction : array_like of float, optional
        Fraction in (0, 1] of each cap that lies inside the catalogue's footprint, for caps that cross
        the edge of the data; None means 1 (the caller guarantees full caps).

    Returns
    -------
    numpy.ndarray
        ``N(< r) / (Ω · f)`` in sources per steradian, with Ω = 2π(1 − cos r) = 4π sin²(r/2) the cap's
        solid angle (common practice). Query rows that are not finite give NaN.
    """
    r = float(_config_positive(radius_arcsec, "radius_arcsec"))
    if r >= 180.0 * 3600.0:
        raise ConfigError(f"radius_arcsec = {radius_arcsec!r} must be below 648000 (half a great circle)")
    q = np.atleast_2d(_f64(query_xyz))
    c = np.atleast_2d(_f64(catalogue_xyz))
    finite_c = np.all(np.isfinite(c), axis=1)
    half = 0.5 * r * _RAD_PER_ARCSEC
    chord = 2.0 * np.sin(half)
    finite_q = np.all(np.isfinite(q), axis=1)
    counts = np.zeros(len(q), np.float64)
    if finite_c.any() and finite_q.any():
        tree = cKDTree(c[finite_c])
        # a hair more than the chord so that a source exactly on the rim is counted whatever the
        # rounding of the vectors
        counts[finite_q] = tree.query_ball_point(q[finite_q], chord * (1.0 + 1e-12), return_length=True)
    counts[~finite_q] = np.nan
    solid_angle = 4.0 * np.pi * np.sin(half) ** 2
    if area_fraction is not None:
        f = _f64(area_fraction)
        with np.errstate(invalid="ignore"):
            if np.any((f <= 0.0) | (f > 1.0)):
                raise InputError("area_fraction must lie in (0, 1] for every position")
        solid_angle = solid_angle * f
    return counts / solid_angle


def prior_from_density(density_per_sr, completeness=1.0) -> np.ndarray:
    """Prior probability that one given infrared source is an astrometric source's counterpart.

    Parameters
    ----------
    density_per_sr : array_like of float
        Local surface density ρ of infrared sources around the astrometric source (per steradian),
        for example from :func:`local_density_per_sr`.
    completeness : float or array_like of float, optional
        Fraction c in (0, 1] of astrometric sources that have a counterpart in the infrared
        catalogue at all.

    Returns
    -------
    numpy.ndarray
        ``P0 = c / (4π ρ)``, capped at 1. NaN where ρ is NaN, 1 where ρ <= 1/(4π) (no source about).

    Notes
    -----
    The Bayes factor (:func:`bayes_factor`) weighs "one direction" against "two independent
    directions anywhere on the whole sphere", so the prior must be the probability of a match
    before the positions are looked at, for catalogues spread over the whole sphere. Budavári &
    Szalay (2008, ApJ 679, 301) give it as P0 = N*/(N1 N2) for N* true pairs among N1 × N2 possible
    ones. Per astrometric source, N*/N1 = c, and the infrared catalogue would hold N2 = 4πρ sources
    on the whole sphere at the local density, so P0 = c/(4πρ). Using the local ρ makes the prior
    follow crowding (low P0 in dense fields, where chance coincidences are common).
    """
    rho = _f64(density_per_sr)
    c = _f64(completeness)
    if not np.all(np.isfinite(c)) or np.any((c <= 0.0) | (c > 1.0)):
        raise ConfigError(f"completeness = {completeness!r} is not allowed; it must lie in (0, 1]")
    with np.errstate(invalid="ignore", divide="ignore"):
        if np.any(rho < 0.0):
            raise InputError("density_per_sr has negative values; a surface density is >= 0")
        p0 = np.minimum(c / (4.0 * np.pi * rho), 1.0)
    return np.asarray(p0, np.float64)


def posterior_log_odds(ln_b, prior) -> np.ndarray:
    """Posterior log-odds ``ln B + ln P0 − ln(1 − P0)`` of a pair being the same source.

    Parameters
    ----------
    ln_b : array_like of float
        ln B from :func:`bayes_factor`.
    prior : array_like of float
        P0 in [0, 1] from :func:`prior_from_density`.

    Returns
    -------
    numpy.ndarray
        ln[P / (1 − P)]; +inf for P0 = 1, −inf for P0 = 0. Unlike P it does not round to a constant
        for very likely pairs, which is why :func:`assign_one_to_one` ranks on it.
    """
    lb = _f64(ln_b)
    p0 = _f64(prior)
    with np.errstate(invalid="ignore"):
        if np.any((p0 < 0.0) | (p0 > 1.0)):
            raise InputError("prior must lie in [0, 1]")
    with np.errstate(divide="ignore"):
        return np.asarray(lb + np.log(p0) - np.log1p(-p0), np.float64)


def posterior_probability(ln_b, prior) -> np.ndarray:
    """Posterior probability that two positions belong to one source.

    Parameters are those of :func:`posterior_log_odds`.

    Returns
    -------
    numpy.ndarray
        ``P = [1 + (1 − P0)/(B P0)]⁻¹`` (Budavári & Szalay 2008, ApJ 679, 301; from memory),
        evaluated as the logistic function of :func:`posterior_log_odds`, which neither overflows
        nor underflows for any ln B.
    """
    return np.asarray(expit(posterior_log_odds(ln_b, prior)), np.float64)


# ---------------------------------------------------------------------------------------------------
# 5. One-to-one assignment
# ---------------------------------------------------------------------------------------------------

def search_radius_arcsec(sigma_combined_arcsec, n_sigma, max_radius_arcsec) -> np.ndarray:
    """Pair-search radius: n combined standard deviations, never more than a configured maximum.

    Parameters
    ----------
    sigma_combined_arcsec : array_like of float
        Combined one-axis standard deviation of a pair's offset (arcsec), for example
        :func:`major_sigma_arcsec` of the summed covariance. NaN gives the maximum.
    n_sigma : float
        Safety factor n > 0. For a circular Gaussian offset P(ψ > nσ) = exp(−n²/2) (the Rayleigh
        distribution, common practice): 3.7e-6 at n = 5.
    max_radius_arcsec : float
        Upper bound (arcsec) > 0; it also bounds the work of the pair search.

    Returns
    -------
    numpy.ndarray
        ``min(n σ, max)`` (arcsec).
    """
    n = float(_config_positive(n_sigma, "n_sigma"))
    top = float(_config_positive(max_radius_arcsec, "max_radius_arcsec"))
    sigma = _nonnegative(sigma_combined_arcsec, "sigma_combined_arcsec")
    return np.asarray(np.fmin(n * sigma, top), np.float64)


def _log_expit(x):
    return -np.logaddexp(0.0, -x)


def assign_one_to_one(ia, ib, ln_b, prior, separation_arcsec, *, n_astrometric, 
                      ambiguity_ratio=0.5) -> Assignment:
    """Choose at most one counterpart per source on both sides, most probable pairs first.

    Parameters
    ----------
    ia, ib : array_like of int
        Astrometric and infrared index of every candidate pair (from a search within
        :func:`search_radius_arcsec`). A pair (ia, ib) may appear only once.
    ln_b : array_like of float
        ln B of every pair (:func:`bayes_factor`).
    prior : float or array_like of float
        P0 of every pair (:func:`prior_from_density`, usually that of the pair's astrometric source).
    separation_arcsec : array_like of float
        Separation of every pair (arcsec), the first tie-breaker.
    n_astrometric : int
        Number of astrometric sources; ``0 <= ia < n_astrometric``.
    ambiguity_ratio : float, optional
        A choice is flagged ambiguous when its runner-up has more than this fraction of its
        probability. With the default 0.5, a flagged choice is less than twice as probable as its
        best alternative: were those two the only possibilities, the choice would be right with less
        than 2/3 probability.

    Returns
    -------
    Assignment
        One row per astrometric source.

    Notes
    -----
    The result is the greedy matching: walk through all pairs in order of decreasing posterior
    probability and accept a pair when neither of its sources is taken yet (common practice for
    one-to-one cross-matching). An astrometric source whose best infrared source goes to a more
    probable partner keeps its next-best free candidate. Pairs are ordered by posterior log-odds
    descending (the same order as the probability, without the ties of probabilities rounded to
    1.0), then separation ascending, then ia, then ib: a strict total order, so the result does not
    depend on the order of the input pairs.

    It is computed in vectorised rounds: a pair that ranks first among the remaining pairs of both
    its astrometric and its infrared source is accepted by the greedy walk too (everything before it
    in the walk touches neither of its sources), so every such pair is accepted at once, pairs that
    share a source with them are dropped, and the rounds repeat until no pair remains. Each round
    accepts at least the best remaining pair; in practice a handful of rounds suffice.

    Pairs whose ln B or prior is NaN are ignored altogether (they are not candidates).
    """
    ia = np.asarray(ia)
    ib = np.asarray(ib)
    if ia.ndim != 1 or ib.shape != ia.shape:
        raise ValueError("ia and ib must be 1-D arrays of equal length")
    if ia.size and not (np.issubdtype(ia.dtype, np.integer) and np.issubdtype(ib.dtype, np.integer)):
        raise ValueError("ia and ib must be integer arrays")
    ia = ia.astype(np.int64, copy=False)
    ib = ib.astype(np.int64, copy=False)
    n_a = int(n_astrometric)
    if n_a < 0:
        raise ValueError("n_astrometric must be >= 0")
    if ia.size and (ia.min() < 0 or ia.max() >= n_a or ib.min() < 0):
        raise ValueError("ia must lie in [0, n_astrometric) and ib must be >= 0")
    ratio_limit = float(_config_nonnegative(ambiguity_ratio, "ambiguity_ratio"))
    m_all = ia.size
    ln_b_all = np.broadcast_to(_f64(ln_b), (m_all,))
    sep_all = np.broadcast_to(_f64(separation_arcsec), (m_all,))
    odds_all = np.broadcast_to(posterior_log_odds(ln_b_all, np.broadcast_to(_f64(prior), (m_all,))),
                               (m_all,))

    usable = ~np.isnan(odds_all)
    keep = np.flatnonzero(usable)
    pa, pb, odds, sep = ia[keep], ib[keep], odds_all[keep], sep_all[keep]
    m = keep.size

    order = np.lexsort((pb, pa, sep, -odds))
    if m > 1:
        by_pair = np.lexsort((pb, pa))
        dup = (pa[by_pair][1:] == pa[by_pair][:-1]) & (pb[by_pair][1:] == pb[by_pair][:-1])
        if dup.any():
            raise ValueError("the same (ia, ib) pair appears more than once")
    rank = np.empty(m, np.int64)
    rank[order] = np.arange(m, dtype=np.int64)
    b_ids, pb_c = np.unique(pb, return_inverse=True)
    pb_c = pb_c.astype(np.int64, copy=False).reshape(-1)
    n_b = b_ids.size

    accepted = np.zeros(m, bool)
    taken_a = np.zeros(n_a, bool)
    taken_b = np.zeros(n_b, bool)
    best_a = np.full(n_a, m, np.int64)
    best_b = np.full(n_b, m, np.int64)
    live = np.arange(m, dtype=np.int64)
    while live.size:
        r, a, b = rank[live], pa[live], pb_c[live]
        best_a[a] = m
        best_b[b] = m
        np.minimum.at(best_a, a, r)
        np.minimum.at(best_b, b, r)
        win = live[(best_a[a] == r) & (best_b[b] == r)]
        accepted[win] = True
        taken_a[pa[win]] = True
        taken_b[pb_c[win]] = True
        live = live[~(taken_a[pa[live]] | taken_b[pb_c[live]])]

    n_candidates = np.bincount(pa, minlength=n_a).astype(np.int64)
    count_b = np.bincount(pb_c, minlength=n_b).astype(np.int64)
    pair_index = np.full(n_a, -1, np.int64)
    chosen_ib = np.full(n_a, -1, np.int64)
    probability = np.zeros(n_a)
    ln_b_out = np.full(n_a, np.nan)
    odds_out = np.full(n_a, np.nan)
    sep_out = np.full(n_a, np.nan)
    n_rivals = np.zeros(n_a, np.int64)
    ratio = np.full(n_a, np.nan)

    w = np.flatnonzero(accepted)
    wa = pa[w]
    pair_index[wa] = keep[w]
    chosen_ib[wa] = pb[w]
    probability[wa] = expit(odds[w])
    ln_b_out[wa] = ln_b_all[keep[w]]
    odds_out[wa] = odds[w]
    sep_out[wa] = sep[w]
    n_rivals[wa] = count_b[pb_c[w]] - 1

    # runner-up: best pair other than the chosen one that shares its astrometric or infrared source;
    # each source has at most one accepted pair, so masking all accepted pairs masks exactly that one
    others = np.where(accepted, -np.inf, odds)
    best_other_a = np.full(n_a, -np.inf)
    best_other_b = np.full(n_b, -np.inf)
    np.maximum.at(best_other_a, pa, others)
    np.maximum.at(best_other_b, pb_c, others)
    runner = np.maximum(best_other_a[wa], best_other_b[pb_c[w]])
    has_runner = runner > -np.inf
    with np.errstate(invalid="ignore", over="ignore"):
        ratio_w = np.exp(_log_expit(runner) - _log_expit(odds[w]))
    ratio[wa] = np.where(has_runner, ratio_w, np.nan)
    with np.errstate(invalid="ignore"):
        ambiguous = ratio > ratio_limit

    n_competitors = n_candidates - (pair_index >= 0) + n_rivals
    return Assignment(pair_index, chosen_ib, probability, ln_b_out, odds_out, sep_out, n_candidates,
                      n_rivals, n_competitors.astype(np.int64), ratio, ambiguous)


# ---------------------------------------------------------------------------------------------------
# 6. Chance matches from shifted positions
# ---------------------------------------------------------------------------------------------------

def shift_positions(ra_deg, dec_deg, shift_arcsec, position_angle_deg) -> Positions:
    """Move positions along great circles by a fixed distance in a fixed direction.

    Parameters
    ----------
    ra_deg, dec_deg : array_like of float
        Positions (ICRS degrees).
    shift_arcsec : float or array_like of float
        Distance s along the great circle (arcsec).
    position_angle_deg : float or array_like of float
        Direction of departure θ, from north through east (deg).

    Returns
    -------
    Positions
        ``u' = r cos s + (p sin θ + q cos θ) sin s`` with r, p, q the position, east and north unit
        vectors (spherical trigonometry in vector form, common practice; astropy's
        ``SkyCoord.directional_offset_by`` is the reference in the tests).

    Notes
    -----
    Matching a catalogue shifted by a few arcminutes against the other gives only chance
    coincidences, with the same densities and errors as the real match (common practice); see
    :func:`chance_counterparts`. Keep the shift larger than any search radius and smaller than the
    scale on which density changes.
    """
    a = np.radians(_f64(ra_deg))
    d = np.radians(_f64(dec_deg))
    s = _f64(shift_arcsec) * _RAD_PER_ARCSEC
    theta = np.radians(_f64(position_angle_deg))
    a, d, s, theta = np.broadcast_arrays(a, d, s, theta)
    r, p, q = _triad(a, d)
    cs, ss = np.cos(s), np.sin(s)
    st, ct = np.sin(theta), np.cos(theta)
    x, y, z = (r[i] * cs + (p[i] * st + q[i] * ct) * ss for i in range(3))
    ra_new = np.mod(np.degrees(np.arctan2(y, x)), 360.0)
    ra_new = np.where(ra_new >= 360.0, 0.0, ra_new)
    dec_new = np.degrees(np.arctan2(z, np.hypot(x, y)))
    return Positions(np.asarray(ra_new, np.float64), np.asarray(dec_new, np.float64))


def chance_counterparts(shifted_probability, n_shifted_sources, n_sources, n_accepted=None, *,
                        threshold=0.5) -> ChanceCounterparts:
    """Expected number of chance counterparts among the accepted pairs of a real match.

    Parameters
    ----------
    shifted_probability : array_like of float
        Posterior probabilities of the pairs chosen by :func:`assign_one_to_one` in one or several
        matches of shifted positions (:func:`shift_positions`), concatenated. All are chance pairs.
    n_shifted_sources : int
        Astrometric sources that took part in those shifted matches, summed over the shifts.
    n_sources : int
        Astrometric sources in the real match.
    n_accepted : int, optional
        Pairs accepted (P > threshold) in the real match. None: assume no astrometric source has a
        true counterpart, which gives an upper bound ``rate × n_sources``.
    threshold : float, optional
        A pair is accepted when P > threshold, in the shifted and the real match alike.

    Returns
    -------
    ChanceCounterparts
        With rate f = k/n for k accepted shifted pairs among n shifted sources and binomial error
        ``sqrt(k' (1 − f))/n`` (k' = max(k, 1), so that zero counts do not claim zero error), the
        expected number is ``F = f (N − A)/(1 − f)`` for N sources and A accepted pairs.

    Notes
    -----
    A shifted source can only find chance partners (common practice for the false-match rate). In
    the real match, a source whose true counterpart is accepted is no longer open to a chance
    match; the sources open to one are those without an accepted true counterpart,
    N − (A − F). Each of them gets an accepted chance partner with probability f, so
    F = f (N − A + F), which gives the formula above. It neglects sources whose true counterpart
    loses to a closer chance source, a small fraction when the errors are small against the mean
    distance between infrared sources.
    """
    p = _f64(shifted_probability).ravel()
    n = int(n_shifted_sources)
    if n <= 0:
        raise ValueError("n_shifted_sources must be > 0")
    if p.size > n:
        raise ValueError("more shifted pairs than shifted sources: one pair per source at most")
    thr = float(threshold)
    if not 0.0 <= thr < 1.0:
        raise ConfigError(f"threshold = {threshold!r} must lie in [0, 1)")
    k = int(np.count_nonzero(p > thr))
    rate = k / n
    rate_error = float(np.sqrt(max(k, 1) * (1.0 - rate)) / n)
    n_total = int(n_sources)
    if n_accepted is None:
        expected = rate * n_total
        error = rate_error * n_total
    else:
        open_sources = n_total - int(n_accepted)
        if open_sources < 0:
            raise ValueError("n_accepted cannot exceed n_sources")
        if rate >= 1.0:
            return ChanceCounterparts(float(n_accepted), float("nan"), rate, rate_error, k)
        expected = rate * open_sources / (1.0 - rate)
        error = rate_error * open_sources / (1.0 - rate) ** 2
    return ChanceCounterparts(float(expected), float(error), float(rate), rate_error, k)
