"""Joint zero-motion test: parallax and both proper-motion components as one χ² with 3 degrees of freedom.

A source far outside the Galaxy has, within its errors, zero proper motion and a parallax equal to the
catalogue's parallax zero point. Testing the three together with their full covariance uses the
correlations between them, which a separate parallax cut and proper-motion cut ignore.

Units: parallaxes in mas, proper motions in mas/yr with the RA component multiplied by cos δ (μα*),
correlations dimensionless. Pure functions on float64 arrays, vectorised over rows.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from scipy.special import ndtr
from scipy.stats import chi2 as _chi2

from selector.errors import ConfigError, InputError

__all__ = ["JointMotion", "joint_zero_motion"]


class JointMotion(NamedTuple):
    """Result of :func:`joint_zero_motion`, one value per source.

    Attributes
    ----------
    chi2 : numpy.ndarray
        ``xᵀ C⁻¹ x`` for x = (ϖ − ϖ0, μα*, μδ) and its 3×3 covariance C; NaN for unusable rows.
    pvalue : numpy.ndarray
        Probability that a source with zero motion and parallax ϖ0 shows a χ² at least this large
        (3 degrees of freedom); small values reject the zero-motion hypothesis.
    parallax_snr : numpy.ndarray
        ``(ϖ − ϖ0)/(k σϖ)``, signed.
    parallax_pvalue : numpy.ndarray
        One-sided probability of a parallax at least this large for a source at infinite distance,
        ``1 − Φ(parallax_snr)``: small values mean a significantly positive parallax, as stars show.
    significant_positive_parallax : numpy.ndarray of bool
        ``parallax_snr > parallax_n_sigma``: measurably nearby, hence a star (the stellar-side cut).
    significant_negative_parallax : numpy.ndarray of bool
        ``parallax_snr < −parallax_n_sigma``: impossible for any real source, so a sign of a bad
        astrometric solution (a quality flag, not evidence of a star).
    covariance_adjusted : numpy.ndarray of bool
        The correlations of the row did not form a positive-definite matrix and were shrunk (see
        :func:`joint_zero_motion`).

    Both flags are False where the parallax or its error is NaN; check ``np.isnan(parallax_snr)``.
    """

    chi2: np.ndarray
    pvalue: np.ndarray
    parallax_snr: np.ndarray
    parallax_pvalue: np.ndarray
    significant_positive_parallax: np.ndarray
    significant_negative_parallax: np.ndarray
    covariance_adjusted: np.ndarray


def _f64(x) -> np.ndarray:
    return np.asarray(x, dtype=np.float64)


def _error(values, name: str) -> np.ndarray:
    v = _f64(values)
    with np.errstate(invalid="ignore"):
        if np.any(v < 0.0):
            first = int(np.flatnonzero((v < 0.0).ravel())[0])
            raise InputError(f"{name} has {int(np.sum(v < 0.0))} negative value(s) (first at index "
                             f"{first}); standard errors must be >= 0")
        # a zero error leaves the χ² undefined: the row has no usable solution
        return np.where(v > 0.0, v, np.nan)


def _corr(values, name: str):
    if values is None:
        return 0.0
    v = _f64(values)
    with np.errstate(invalid="ignore"):
        if np.any(np.abs(v) > 1.0):
            first = int(np.flatnonzero((np.abs(v) > 1.0).ravel())[0])
            raise InputError(f"{name} has {int(np.sum(np.abs(v) > 1.0))} value(s) outside [-1, 1] "
                             f"(first at index {first}); a correlation coefficient lies in [-1, 1]")
    return np.where(np.isnan(v), 0.0, v)


def joint_zero_motion(parallax_mas, parallax_error_mas, pmra_mas_yr, pmdec_mas_yr, *, pmra_error_mas_yr,
                      pmdec_error_mas_yr, parallax_pmra_corr=None, parallax_pmdec_corr=None,
                      pmra_pmdec_corr=None, parallax_zero_point_mas=-0.017, error_inflation=1.0,
                      parallax_n_sigma=3.0, min_eigenvalue=1e-6) -> JointMotion:
    """Test parallax and proper motion against zero together, with their full covariance.

    Parameters
    ----------
    parallax_mas, parallax_error_mas, pmra_mas_yr, pmdec_mas_yr : array_like of float
        As in :func:`selector.core.astrometry.zero_motion`.
    pmra_error_mas_yr, pmdec_error_mas_yr : array_like of float
        Standard errors of the proper motion (mas/yr). Negative errors raise
        :class:`~selector.errors.InputError`; zero or NaN errors give NaN for the row.
    parallax_pmra_corr, parallax_pmdec_corr, pmra_pmdec_corr : array_like of float, optional
        Correlation coefficients ρϖα, ρϖδ, ραδ. None or NaN count as 0; values outside [−1, 1] raise
        :class:`~selector.errors.InputError`.
    parallax_zero_point_mas : float, optional
        As in :func:`selector.core.astrometry.zero_motion`.
    error_inflation : float or array_like of float, optional
        Factor k > 0 multiplying the three standard errors (so C by k²), for catalogues whose formal
        errors are too small. Correlations are unchanged.
    parallax_n_sigma : float, optional
        Threshold in units of k σϖ for the two parallax flags.
    min_eigenvalue : float, optional
        Smallest eigenvalue, in (0, 1), allowed for the correlation matrix (see Notes).

    Returns
    -------
    JointMotion
        χ², p-value, the parallax statistic and flags; NaN where any of the six measurements is NaN
        or an error is zero.

    Notes
    -----
    With z = (ϖ − ϖ0, μα*, μδ) / (k σ) component by component and the correlation matrix
    R = [[1, a, b], [a, 1, c], [b, c, 1]] (a = ρϖα, b = ρϖδ, c = ραδ), the statistic is
    χ² = zᵀ R⁻¹ z = xᵀ C⁻¹ x, evaluated with the closed-form inverse of a symmetric 3×3 matrix,
    R⁻¹ = adj(R)/det R, where det R = 1 + 2abc − a² − b² − c² and the adjugate has diagonal
    (1 − c², 1 − b², 1 − a²) and off-diagonal entries bc − a, ac − b, ab − c. For Gaussian errors
    and a source at rest χ² follows the χ² distribution with 3 degrees of freedom (a quadratic form
    in Gaussian variables with its own inverse covariance; common practice), so the p-value is
    ``scipy.stats.chi2.sf(χ², 3)``.

    Correlations that are each valid but together not positive definite (for example |ρ| → 1, or
    stored values rounded inconsistently) make χ² meaningless or negative. Such rows have their
    off-diagonal correlations multiplied by the one factor s = (1 − ε)/(1 − λmin) that raises the
    smallest eigenvalue λmin of R to ε = ``min_eigenvalue`` (R' = sR + (1 − s)I has eigenvalues
    1 − s(1 − λ)); they are marked in ``covariance_adjusted``. A nearly degenerate direction keeps a
    tiny variance, so motion along it still gives a large χ²: the test stays conservative.
    """
    k = _f64(error_inflation)
    if not np.all(np.isfinite(k)) or np.any(k <= 0.0):
        raise ConfigError(f"error_inflation = {error_inflation!r} is not allowed; it must be a finite "
                          "number > 0")
    zp = float(parallax_zero_point_mas)
    if not np.isfinite(zp):
        raise ConfigError(f"parallax_zero_point_mas = {parallax_zero_point_mas!r} must be a finite number")
    n_sig = float(parallax_n_sigma)
    if not np.isfinite(n_sig) or n_sig <= 0.0:
        raise ConfigError(f"parallax_n_sigma = {parallax_n_sigma!r} must be a finite number > 0")
    eps = float(min_eigenvalue)
    if not 0.0 < eps < 1.0:
        raise ConfigError(f"min_eigenvalue = {min_eigenvalue!r} must lie in (0, 1)")

    s_p = _error(parallax_error_mas, "parallax_error_mas")
    s_a = _error(pmra_error_mas_yr, "pmra_error_mas_yr")
    s_d = _error(pmdec_error_mas_yr, "pmdec_error_mas_yr")
    a = _corr(parallax_pmra_corr, "parallax_pmra_corr")
    b = _corr(parallax_pmdec_corr, "parallax_pmdec_corr")
    c = _corr(pmra_pmdec_corr, "pmra_pmdec_corr")
    z1 = (_f64(parallax_mas) - zp) / (k * s_p)
    z2 = _f64(pmra_mas_yr) / (k * s_a)
    z3 = _f64(pmdec_mas_yr) / (k * s_d)
    z1, z2, z3, a, b, c = np.broadcast_arrays(z1, z2, z3, a, b, c)
    a, b, c = (np.array(x, np.float64) for x in (a, b, c))

    det = 1.0 + 2.0 * a * b * c - a * a - b * b - c * c
    # the eigenvalues of R sum to 3, so λmin < ε forces det R < ε (3/2)²: only those rows need them
    suspect = np.flatnonzero(det < 2.25 * eps)
    adjusted = np.zeros(det.shape, bool)
    if suspect.size:
        sa, sb, sc = a.flat[suspect], b.flat[suspect], c.flat[suspect]
        ones = np.ones_like(sa)
        mats = np.stack([np.stack([ones, sa, sb], -1), np.stack([sa, ones, sc], -1),
                         np.stack([sb, sc, ones], -1)], -2)
        lam_min = np.linalg.eigvalsh(mats)[:, 0]
        low = lam_min < eps
        shrink = np.where(low, (1.0 - eps) / (1.0 - np.minimum(lam_min, eps)), 1.0)
        rows = suspect[low]
        adjusted.flat[rows] = True
        a.flat[suspect] = sa * shrink
        b.flat[suspect] = sb * shrink
        c.flat[suspect] = sc * shrink
        det = 1.0 + 2.0 * a * b * c - a * a - b * b - c * c

    quad = ((1.0 - c * c) * z1 * z1 + (1.0 - b * b) * z2 * z2 + (1.0 - a * a) * z3 * z3
            + 2.0 * ((b * c - a) * z1 * z2 + (a * c - b) * z1 * z3 + (a * b - c) * z2 * z3))
    chi2 = np.asarray(quad / det, np.float64)
    pvalue = np.asarray(_chi2.sf(chi2, 3), np.float64)
    snr = np.asarray(z1, np.float64)
    with np.errstate(invalid="ignore"):
        positive = snr > n_sig
        negative = snr < -n_sig
    return JointMotion(chi2, pvalue, snr, np.asarray(ndtr(-snr), np.float64), positive, negative,
                       adjusted)
