"""Magnitude systems, infrared colours and published infrared colour criteria.

Bands are labelled by wavelength in micrometres, as the configuration writes them: ``"3.4"``,
``"4.6"``, ``"12"`` and ``"22"`` (the keys of :data:`selector.core.schema.INFRARED_BANDS`; the
column-name form ``3p4`` is derived there, and only there, by :func:`~selector.core.schema.band_suffix`).
Internal infrared magnitudes are in the Vega system; the AB system is used only at the edges (input
conversion) and to turn magnitudes into flux-density ratios.

Every function here is a pure, vectorised operation on float64 arrays.  A missing
measurement is NaN; a criterion that needs a missing band evaluates to ``False`` for
that source (with a NaN margin) instead of raising.

In the formulas below ``m1`` and ``m2`` are the Vega magnitudes at 3.4 µm and 4.6 µm
and ``m3`` the Vega magnitude at 12 µm.

All coefficients are from memory, as given in the project design notes; they have
been checked for internal consistency (continuity of the piecewise boundaries, the
wedge corners, agreement of the AB offsets with the zero-point flux densities) but
not against the printed papers.  Equation numbers are not quoted because they have
not been verified.

References
----------
.. [J11] Jarrett, T. H., et al. 2011, ApJ 735, 112.
.. [S12] Stern, D., et al. 2012, ApJ 753, 30.
.. [M12] Mateos, S., et al. 2012, MNRAS 426, 3271.
.. [A13] Assef, R. J., et al. 2013, ApJ 772, 26.
.. [A18] Assef, R. J., et al. 2018, ApJS 234, 23.
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass
from functools import partial
from typing import Callable, Iterable, Mapping, NamedTuple

import numpy as np

from selector.core.schema import INFRARED_BANDS, band_suffix

__all__ = [
    "BANDS",
    "MAG_SYSTEMS",
    "VEGA_TO_AB_MAG",
    "CriterionResult",
    "AssefCoefficients",
    "ASSEF2013_R90",
    "ASSEF2018_R90",
    "ASSEF2018_R75",
    "ASSEF2018_C75_COLOUR_MIN_VEGA",
    "STERN2012_COLOUR_MIN_VEGA",
    "STERN2012_MAG_4P6_MAX_VEGA",
    "MATEOS2012_WEDGE",
    "CRITERIA",
    "Criterion",
    "Curve",
    "LineStyle",
    "Plane",
    "LinearCut",
    "band_label",
    "vega_to_ab",
    "ab_to_vega",
    "to_vega",
    "flux_ratio_log10",
    "colour",
    "assef_boundary_colour_vega",
    "stern2012",
    "assef2013_r90",
    "assef2018_r90",
    "assef2018_r75",
    "assef2018_c75",
    "mateos2012_wedge",
    "criterion_names",
    "apply_criteria",
    "apply_linear_cut",
]

BANDS: tuple[str, ...] = tuple(INFRARED_BANDS)
"""Infrared band labels (wavelength in µm): ``"3.4"``, ``"4.6"``, ``"12"``, ``"22"``."""

MAG_SYSTEMS: tuple[str, ...] = ("vega", "ab")
"""Magnitude systems accepted by :func:`to_vega` (case-insensitive)."""

VEGA_TO_AB_MAG: dict[str, float] = {"3.4": 2.699, "4.6": 3.339, "12": 5.174, "22": 6.620}
"""Offsets ``m_AB - m_Vega`` in mag per band (Jarrett et al. 2011, ApJ 735, 112 [J11];
from memory, as given in the project design notes).

These offsets are about 0.026 mag larger, in every band alike, than
``2.5 log10(3631 Jy / F0)`` computed from the zero-point flux densities
F0 = 309.540, 171.787, 31.674, 8.363 Jy that the same paper quotes (also from memory).
Because the difference is common to all bands it cancels in flux-density ratios to
better than 1e-3 dex, so the choice of convention does not move the
Mateos et al. 2012 wedge.
"""


class CriterionResult(NamedTuple):
    """Outcome of a colour criterion for every source.

    Attributes
    ----------
    passed : numpy.ndarray of bool
        True where the source satisfies the criterion.  False where it does not, or
        where a band the criterion needs is missing (NaN).
    excess_mag : numpy.ndarray of float64
        Signed margin of the source with respect to the selection boundary, positive
        inside the selection and negative outside; NaN where a needed band is missing.
        For magnitude-colour criteria it is in mag (see each criterion for how a
        magnitude limit enters).  For the three-band wedge of Mateos et al. 2012 it is
        in dex of flux-density ratio, measured along the y axis.  On a boundary it is
        zero, whether or not that boundary is itself included.
    """

    passed: np.ndarray
    excess_mag: np.ndarray


class AssefCoefficients(NamedTuple):
    """Coefficients of the magnitude-dependent colour boundary of Assef et al.

    The boundary (Assef et al. 2013, ApJ 772, 26; Assef et al. 2018, ApJS 234, 23) is
    ``m1 - m2 > alpha * exp[beta * (m2 - gamma)**2]`` for ``m2 > gamma`` and
    ``m1 - m2 > alpha`` otherwise, with Vega magnitudes.

    Attributes
    ----------
    alpha : float
        Colour threshold (mag) on the bright side of ``gamma``.
    beta : float
        Curvature of the faint-side boundary (mag**-2).
    gamma : float
        4.6 µm Vega magnitude at which the boundary starts to rise.
    mag_4p6_max_vega : float
        Sources must have ``m2`` strictly below this; ``inf`` for no limit.
    """

    alpha: float
    beta: float
    gamma: float
    mag_4p6_max_vega: float = math.inf


STERN2012_COLOUR_MIN_VEGA = 0.8
"""Stern et al. 2012, ApJ 753, 30: ``m1 - m2 >= 0.8`` (Vega; from memory)."""
STERN2012_MAG_4P6_MAX_VEGA = 15.05
"""Stern et al. 2012, ApJ 753, 30: ``m2 <= 15.05`` (Vega; from memory)."""

ASSEF2013_R90 = AssefCoefficients(alpha=0.662, beta=0.232, gamma=13.97, mag_4p6_max_vega=17.11)
"""Assef et al. 2013, ApJ 772, 26, 90 % reliability (from memory)."""
# The 2018 boundaries are given without a faint limit in the design notes; the
# exponential already demands implausibly red colours a few magnitudes past gamma.
ASSEF2018_R90 = AssefCoefficients(alpha=0.65, beta=0.153, gamma=13.86)
"""Assef et al. 2018, ApJS 234, 23, R90 (90 % reliability; from memory)."""
ASSEF2018_R75 = AssefCoefficients(alpha=0.486, beta=0.092, gamma=13.07)
"""Assef et al. 2018, ApJS 234, 23, R75 (75 % reliability; from memory)."""
ASSEF2018_C75_COLOUR_MIN_VEGA = 0.71
"""Assef et al. 2018, ApJS 234, 23, C75 (75 % completeness): ``m1 - m2 > 0.71`` (from memory)."""

MATEOS2012_WEDGE: dict[str, tuple[float, float]] = {
    "upper": (0.315, 0.297),
    "lower": (0.315, -0.110),
    "left": (-3.172, 0.436),
}
"""Edges ``(slope, intercept)`` of the Mateos et al. 2012, MNRAS 426, 3271 wedge in
``y = log10(f4.6/f3.4)`` versus ``x = log10(f12/f4.6)`` (from memory; see :func:`mateos2012_wedge`
for why the axes are taken this way round).  The selection
is below ``upper`` and above ``lower`` and ``left``.  The upper and left edges meet at
``x = 0.139/3.487 ≈ 0.0399``, the lower and left edges at ``x = 0.546/3.487 ≈ 0.1566``;
the wedge is open towards large ``x``.
"""


# ----------------------------------------------------------------------------------
# magnitude systems
# ----------------------------------------------------------------------------------


def _check_band(band: str) -> float:
    try:
        return VEGA_TO_AB_MAG[band]
    except (KeyError, TypeError):
        raise ValueError(
            f"unknown infrared band {band!r}; valid bands: {', '.join(BANDS)}"
        ) from None


def band_label(name: str) -> str:
    """Canonical band label for a wavelength written as ``"3.4"``, ``"3p4"`` or ``"12.0"``.

    The arrays passed to the criteria are keyed by the labels of :data:`BANDS`; this accepts the
    column-name form too (through :func:`~selector.core.schema.band_suffix`, the one translation)
    and a wavelength written as a number.

    Raises
    ------
    ValueError
        If ``name`` does not spell one of the four wavelengths.
    """
    text = str(name).strip().lower()
    for band in BANDS:
        if text in (band, band_suffix(band)) or _same_number(text, band):
            return band
    raise ValueError(f"unknown infrared band {name!r}; valid bands: {', '.join(BANDS)}")


def _same_number(text: str, band: str) -> bool:
    try:
        return float(text) == float(band)
    except ValueError:
        return False


def vega_to_ab(mag_vega, band: str) -> np.ndarray:
    """Convert Vega magnitudes to AB magnitudes.

    ``m_AB = m_Vega + Δm(band)`` with Δm from :data:`VEGA_TO_AB_MAG`
    (Jarrett et al. 2011, ApJ 735, 112; from memory, as given in the project design
    notes).

    Parameters
    ----------
    mag_vega : array_like
        Vega magnitudes (mag); NaN stays NaN.
    band : str
        Band label, one of :data:`BANDS`.

    Returns
    -------
    numpy.ndarray
        AB magnitudes (mag), float64.

    Raises
    ------
    ValueError
        If ``band`` is not a known band label.
    """
    offset = _check_band(band)
    return np.asarray(mag_vega, dtype=np.float64) + offset


def ab_to_vega(mag_ab, band: str) -> np.ndarray:
    """Convert AB magnitudes to Vega magnitudes; the inverse of :func:`vega_to_ab`.

    ``m_Vega = m_AB - Δm(band)`` (Jarrett et al. 2011, ApJ 735, 112; from memory).

    Parameters, result and errors are those of :func:`vega_to_ab`, with AB magnitudes
    ``mag_ab`` in and Vega magnitudes out.
    """
    offset = _check_band(band)
    return np.asarray(mag_ab, dtype=np.float64) - offset


def to_vega(mag, band: str, system: str) -> np.ndarray:
    """Bring infrared magnitudes given in ``system`` into the Vega system.

    Parameters
    ----------
    mag : array_like
        Magnitudes (mag) in ``system``.
    band : str
        Band label, one of :data:`BANDS`.
    system : str
        ``"vega"`` or ``"ab"``, case-insensitive.

    Returns
    -------
    numpy.ndarray
        Vega magnitudes (mag), float64 (always a new array).

    Raises
    ------
    ValueError
        If ``system`` is not one of :data:`MAG_SYSTEMS` or ``band`` is unknown.
    """
    key = system.strip().lower() if isinstance(system, str) else None
    if key not in MAG_SYSTEMS:
        raise ValueError(
            f"unknown magnitude system {system!r}; allowed values: "
            + ", ".join(repr(s) for s in MAG_SYSTEMS)
            + " (case-insensitive)"
        )
    if key == "ab":
        return ab_to_vega(mag, band)
    _check_band(band)
    return np.array(mag, dtype=np.float64, copy=True)


def flux_ratio_log10(mag_a_vega, mag_b_vega, band_a: str, band_b: str) -> np.ndarray:
    """Logarithm of the flux-density ratio ``f_b / f_a`` from Vega magnitudes.

    Convention: flux densities per unit frequency, obtained through the AB system, so
    ``log10(f_b / f_a) = -0.4 [(m_b + Δm_b) - (m_a + Δm_a)]`` with the Vega-to-AB
    offsets Δm of :data:`VEGA_TO_AB_MAG`.  This is the quantity on both axes of the
    Mateos et al. 2012, MNRAS 426, 3271 wedge (``x = log10(f4.6/f3.4)``,
    ``y = log10(f12/f4.6)``).

    Parameters
    ----------
    mag_a_vega, mag_b_vega : array_like
        Vega magnitudes (mag) in ``band_a`` (denominator) and ``band_b`` (numerator).
    band_a, band_b : str
        Band labels, from :data:`BANDS`.

    Returns
    -------
    numpy.ndarray
        ``log10(f_b / f_a)`` in dex; NaN where either magnitude is NaN.
    """
    ab_a = vega_to_ab(mag_a_vega, band_a)
    ab_b = vega_to_ab(mag_b_vega, band_b)
    return -0.4 * (ab_b - ab_a)


def colour(mags: Mapping[str, np.ndarray], a: str, b: str) -> np.ndarray:
    """Colour ``mags[a] - mags[b]`` (mag).

    Parameters
    ----------
    mags : Mapping[str, array_like]
        Quantity name → magnitudes.  Both magnitudes should be in the same kind of
        system for the colour to mean anything; infrared bands are Vega here.
    a, b : str
        Keys of ``mags``.

    Returns
    -------
    numpy.ndarray
        float64 colour; NaN where either magnitude is NaN.

    Raises
    ------
    ValueError
        If ``a`` or ``b`` is not a key of ``mags``.
    """
    return _quantity(mags, a, "colour") - _quantity(mags, b, "colour")


def _quantity(quantities: Mapping[str, np.ndarray], name: str, context: str) -> np.ndarray:
    try:
        values = quantities[name]
    except KeyError:
        available = ", ".join(sorted(map(str, quantities))) or "(none)"
        raise ValueError(
            f"{context}: no quantity named {name!r}; available: {available}"
        ) from None
    return np.asarray(values, dtype=np.float64)


# ----------------------------------------------------------------------------------
# published criteria
# ----------------------------------------------------------------------------------


def _bands(mags: Mapping[str, np.ndarray], needed: Iterable[str]) -> list[np.ndarray]:
    """Needed bands as float64 arrays of one common shape.

    A band absent from ``mags`` is a band nobody measured, which the criteria treat
    like a NaN measurement rather than an error.
    """
    if not isinstance(mags, Mapping):
        raise TypeError(f"mags must be a mapping of band label to magnitudes, got {type(mags).__name__}")
    if len(mags) == 0:
        raise ValueError(
            "mags is empty: give at least one band of magnitudes "
            f"(band labels: {', '.join(BANDS)})"
        )
    shape = np.broadcast_shapes(*(np.shape(v) for v in mags.values()))
    out = []
    for band in needed:
        if band in mags:
            out.append(np.broadcast_to(np.asarray(mags[band], dtype=np.float64), shape))
        else:
            out.append(np.full(shape, np.nan))
    return out


#: Bands of the two-band criteria: the colour [3.4]−[4.6] and the magnitude [4.6].
TWO_BANDS = ("3.4", "4.6")
#: Bands of the three-band wedge.
WEDGE_BANDS = ("3.4", "4.6", "12")


def _result(passed, excess) -> CriterionResult:
    return CriterionResult(np.asarray(passed, dtype=bool), np.asarray(excess, dtype=np.float64))


def assef_boundary_colour_vega(mag_4p6_vega, alpha: float, beta: float, gamma: float) -> np.ndarray:
    """Colour threshold of the Assef et al. boundary at a given 4.6 µm magnitude.

    ``alpha * exp[beta * (m2 - gamma)**2]`` for ``m2 > gamma``, else ``alpha``
    (Assef et al. 2013, ApJ 772, 26; Assef et al. 2018, ApJS 234, 23; form and
    coefficients from memory, as given in the project design notes).  The two pieces
    meet at ``m2 = gamma``, where the exponential is 1.

    Parameters
    ----------
    mag_4p6_vega : array_like
        4.6 µm Vega magnitudes ``m2``.
    alpha, beta, gamma : float
        Boundary coefficients, see :class:`AssefCoefficients`.

    Returns
    -------
    numpy.ndarray
        Threshold on ``m1 - m2`` (mag, Vega); NaN where ``m2`` is NaN.
    """
    m2 = np.asarray(mag_4p6_vega, dtype=np.float64)
    with np.errstate(over="ignore", invalid="ignore"):
        rising = alpha * np.exp(beta * (m2 - gamma) ** 2)
    flat = np.where(np.isnan(m2), np.nan, alpha)
    return np.where(m2 > gamma, rising, flat)


def stern2012(mags: Mapping[str, np.ndarray]) -> CriterionResult:
    """Stern et al. 2012, ApJ 753, 30 two-band criterion.

    Selected: ``m1 - m2 >= 0.8`` and ``m2 <= 15.05`` (Vega magnitudes at 3.4 and
    4.6 µm; coefficients from memory, as given in the project design notes).

    Parameters
    ----------
    mags : Mapping[str, array_like]
        Band label → Vega magnitudes; needs ``"3.4"`` and ``"4.6"``.

    Returns
    -------
    CriterionResult
        ``excess_mag = min(m1 - m2 - 0.8, 15.05 - m2)``: the colour margin, or the
        margin to the faint limit when that is smaller, so its sign agrees with
        ``passed``.
    """
    m1, m2 = _bands(mags, TWO_BANDS)
    c = m1 - m2
    passed = (c >= STERN2012_COLOUR_MIN_VEGA) & (m2 <= STERN2012_MAG_4P6_MAX_VEGA)
    excess = np.minimum(c - STERN2012_COLOUR_MIN_VEGA, STERN2012_MAG_4P6_MAX_VEGA - m2)
    return _result(passed, excess)


def _assef(mags: Mapping[str, np.ndarray], k: AssefCoefficients) -> CriterionResult:
    m1, m2 = _bands(mags, TWO_BANDS)
    c = m1 - m2
    threshold = assef_boundary_colour_vega(m2, k.alpha, k.beta, k.gamma)
    with np.errstate(invalid="ignore"):
        excess = c - threshold
        passed = c > threshold
        if math.isfinite(k.mag_4p6_max_vega):
            passed &= m2 < k.mag_4p6_max_vega
            excess = np.minimum(excess, k.mag_4p6_max_vega - m2)
    return _result(passed, excess)


def assef2013_r90(mags: Mapping[str, np.ndarray]) -> CriterionResult:
    """Assef et al. 2013, ApJ 772, 26 criterion at 90 % reliability.

    Selected: ``m1 - m2 > 0.662 exp[0.232 (m2 - 13.97)**2]`` for ``m2 > 13.97``,
    ``m1 - m2 > 0.662`` otherwise, and only ``m2 < 17.11`` (Vega; coefficients from
    memory, as given in the project design notes).

    Takes ``mags`` and returns a :class:`CriterionResult` as :func:`stern2012` does, with
    ``excess_mag = min(m1 - m2 - threshold(m2), 17.11 - m2)`` (mag).
    """
    return _assef(mags, ASSEF2013_R90)


def assef2018_r90(mags: Mapping[str, np.ndarray]) -> CriterionResult:
    """Assef et al. 2018, ApJS 234, 23 criterion R90 (90 % reliability).

    Selected: ``m1 - m2 > 0.65 exp[0.153 (m2 - 13.86)**2]`` for ``m2 > 13.86``,
    ``m1 - m2 > 0.65`` otherwise (Vega; coefficients from memory, as given in the
    project design notes).  No faint limit is applied.

    Takes ``mags`` and returns a :class:`CriterionResult` as :func:`stern2012` does, with
    ``excess_mag = m1 - m2 - threshold(m2)`` (mag).
    """
    return _assef(mags, ASSEF2018_R90)


def assef2018_r75(mags: Mapping[str, np.ndarray]) -> CriterionResult:
    """Assef et al. 2018, ApJS 234, 23 criterion R75 (75 % reliability).

    The form, inputs and result of :func:`assef2018_r90`, with the coefficients 0.486, 0.092 and
    13.07 in place of 0.65, 0.153 and 13.86.
    """
    return _assef(mags, ASSEF2018_R75)


def assef2018_c75(mags: Mapping[str, np.ndarray]) -> CriterionResult:
    """Assef et al. 2018, ApJS 234, 23 criterion C75 (75 % completeness).

    Selected: ``m1 - m2 > 0.71`` at every magnitude (Vega; coefficient from memory,
    as given in the project design notes).

    Takes ``mags`` and returns a :class:`CriterionResult` as :func:`stern2012` does, with
    ``excess_mag = m1 - m2 - 0.71`` (mag).
    """
    m1, m2 = _bands(mags, TWO_BANDS)
    c = m1 - m2
    return _result(c > ASSEF2018_C75_COLOUR_MIN_VEGA, c - ASSEF2018_C75_COLOUR_MIN_VEGA)


def mateos2012_wedge(mags: Mapping[str, np.ndarray]) -> CriterionResult:
    """Mateos et al. 2012, MNRAS 426, 3271 three-band wedge.

    With ``x = log10(f12/f4.6)`` and ``y = log10(f4.6/f3.4)`` (flux densities per unit
    frequency, see :func:`flux_ratio_log10`), selected:
    ``y <= 0.315 x + 0.297`` and ``y >= 0.315 x - 0.110`` and
    ``y >= -3.172 x + 0.436`` (coefficients from memory, as given in the project
    design notes).

    The design notes recall the axes the other way round; we take them as above because
    only this way does the wedge follow the locus of power-law spectra, which is what it was
    drawn around: for f_ν ∝ ν^−α, ``y / x = log10(4.6/3.4) / log10(12/4.6) = 0.315``, the
    slope of the wedge's two long edges (the left edge, slope −1/0.315, is perpendicular to
    them). With the axes swapped, power laws would run at slope 3.17, across the wedge.

    Parameters
    ----------
    mags : Mapping[str, array_like]
        Band label → Vega magnitudes; needs ``"3.4"``, ``"4.6"`` and ``"12"``.

    Returns
    -------
    CriterionResult
        ``excess_mag`` here is in dex, not mag: the smallest of the three signed
        vertical gaps ``(0.315 x + 0.297) - y``, ``y - (0.315 x - 0.110)`` and
        ``y - (-3.172 x + 0.436)``.  Inside the wedge this is the distance along y to
        the nearest edge; outside, it is minus the largest violation.  Multiply by 2.5
        for an equivalent in mag.
    """
    m1, m2, m3 = _bands(mags, WEDGE_BANDS)
    x = flux_ratio_log10(m2, m3, "4.6", "12")
    y = flux_ratio_log10(m1, m2, "3.4", "4.6")
    su, iu = MATEOS2012_WEDGE["upper"]
    sl, il = MATEOS2012_WEDGE["lower"]
    sf, if_ = MATEOS2012_WEDGE["left"]
    upper = su * x + iu
    lower = sl * x + il
    left = sf * x + if_
    passed = (y <= upper) & (y >= lower) & (y >= left)
    excess = np.minimum(np.minimum(upper - y, y - lower), y - left)
    return _result(passed, excess)


# ----------------------------------------------------------------------------------
# criteria as objects: selection, boundary in the diagrams, style, reference
# ----------------------------------------------------------------------------------


class Plane(NamedTuple):
    """The axes of a diagram, each one band (a magnitude) or two (a colour), as in :class:`LinearCut`.

    Attributes
    ----------
    y, x : tuple of str
        Band labels: ``("3.4", "4.6")`` is the colour [3.4]−[4.6], ``("4.6",)`` the magnitude [4.6].
    """

    y: tuple[str, ...]
    x: tuple[str, ...]


class Curve(NamedTuple):
    """One boundary line of a criterion in a :class:`Plane`, in Vega magnitudes and colours.

    Attributes
    ----------
    x, y : sequence of float
        The polyline's points.
    label : str
        Legend text.
    """

    x: object
    y: object
    label: str


class LineStyle(NamedTuple):
    """How a criterion's boundary is drawn (matplotlib colour and line style)."""

    color: str
    ls: str


#: The colour every published criterion here cuts on, and the magnitude its limits use.
_COLOUR = TWO_BANDS
_MAGNITUDE = ("4.6",)


def _colour_cut_boundary(name: str, plane: Plane, xlim, ylim, *, colour_min: float, relation: str,
                         mag_max: float | None) -> tuple[Curve, ...]:
    """A fixed [3.4]−[4.6] threshold, with an optional bright-side [4.6] limit.

    Against [4.6] the limit closes the region on the right; against any other x quantity only the
    colour threshold can be drawn, and the label names the limit.
    """
    if tuple(plane.y) != _COLOUR:
        return ()
    if tuple(plane.x) == _MAGNITUDE:
        if mag_max is None:
            return (Curve(xlim, [colour_min] * 2, f"{name}: {relation} {colour_min}"),)
        return (Curve([xlim[0], mag_max, mag_max], [colour_min, colour_min, ylim[1]],
                      f"{name}: {relation} {colour_min}, [4.6] ≤ {mag_max}"),)
    label = f"{name}: [3.4]−[4.6] {relation} {colour_min}"
    if mag_max is not None:
        label += f" (and [4.6] ≤ {mag_max})"
    return (Curve(np.array(xlim), [colour_min] * 2, label),)


def _assef_boundary(name: str, plane: Plane, xlim, ylim, *, k: AssefCoefficients) -> tuple[Curve, ...]:
    """The Assef et al. boundary: its curve against [4.6]; its bright-side threshold against anything else."""
    if tuple(plane.y) != _COLOUR:
        return ()
    if tuple(plane.x) != _MAGNITUDE:
        return (Curve(np.array(xlim), [k.alpha] * 2,
                      f"{name}: > {k.alpha} for [4.6] ≤ {k.gamma} (rises fainter; see colour–magnitude)"),)
    # 400 points keep the exponential smooth at any plotted magnitude range
    grid = np.linspace(xlim[0], xlim[1], 400)
    g = grid[grid < k.mag_4p6_max_vega]
    curve = assef_boundary_colour_vega(g, k.alpha, k.beta, k.gamma)
    label = f"{name}: α={k.alpha}, β={k.beta}, γ={k.gamma}"
    if math.isfinite(k.mag_4p6_max_vega):
        g = np.append(g, [k.mag_4p6_max_vega, k.mag_4p6_max_vega])
        curve = np.append(curve, [assef_boundary_colour_vega(k.mag_4p6_max_vega, k.alpha, k.beta, k.gamma),
                                  ylim[1]])
        label += f", [4.6] < {k.mag_4p6_max_vega}"
    return (Curve(g, curve, label),)


def _wedge_boundary(name: str, plane: Plane, xlim, ylim) -> tuple[Curve, ...]:
    """The Mateos et al. 2012 wedge as a polyline in ([4.6]−[12], [3.4]−[4.6]) Vega colours.

    With offsets d = m_AB − m_Vega, ``x_f = log10(f12/f4.6) = 0.4([4.6]−[12] + d4.6 − d12)`` and
    ``y_f = log10(f4.6/f3.4) = 0.4([3.4]−[4.6] + d3.4 − d4.6)``: the wedge's axes map straight onto
    the plane's, where it stays a wedge of straight lines. In any other plane it is not a line.
    """
    if (tuple(plane.y), tuple(plane.x)) != (_COLOUR, ("4.6", "12")):
        return ()
    d = VEGA_TO_AB_MAG
    su, iu = MATEOS2012_WEDGE["upper"]
    sl, il = MATEOS2012_WEDGE["lower"]
    sf, if_ = MATEOS2012_WEDGE["left"]
    x_ul = (if_ - iu) / (su - sf)  # where the upper and left edges meet
    x_ll = (if_ - il) / (sl - sf)
    # open towards large x_f, i.e. to the right of the plot: run the two long edges to its edge
    x_right = 0.4 * (xlim[1] + d["4.6"] - d["12"])
    xf = np.array([x_right, x_ul, x_ll, x_right])
    yf = np.array([su * x_right + iu, su * x_ul + iu, sl * x_ll + il, sl * x_right + il])
    return (Curve(2.5 * xf - (d["4.6"] - d["12"]), 2.5 * yf - (d["3.4"] - d["4.6"]),
                  f"{name} (three-band wedge)"),)


@dataclass(frozen=True, kw_only=True)
class Criterion:
    """A published colour criterion, self-described: everything the tool needs to know about it.

    Attributes
    ----------
    name : str
        The name used in the configuration (``colours.criteria``).
    bands : tuple of str
        Band labels the selection reads (so callers read only those columns, or warn up front when
        a catalogue lacks one).
    select : callable
        ``select(mags) -> CriterionResult``, with ``mags`` a mapping of band label to Vega
        magnitudes.
    boundary : callable
        ``boundary(name, plane, xlim, ylim) -> tuple of Curve``: the boundary in a diagram's
        :class:`Plane` over the plotted limits; empty when it cannot be drawn as lines there.
    style : LineStyle
        How the plots draw it.
    reference : str
        The published source (authors, year, journal, volume, page).
    """

    name: str
    bands: tuple[str, ...]
    select: Callable[[Mapping[str, np.ndarray]], CriterionResult]
    boundary: Callable[..., tuple[Curve, ...]]
    style: LineStyle
    reference: str

    def curves(self, plane: Plane, xlim, ylim) -> tuple[Curve, ...]:
        """The boundary lines in ``plane`` over ``xlim`` × ``ylim`` (empty if not drawable there)."""
        return self.boundary(self.name, plane, xlim, ylim)


_A18 = "Assef, R. J., et al. 2018, ApJS 234, 23"

CRITERIA: dict[str, Criterion] = {c.name: c for c in (
    Criterion(name="stern2012", bands=TWO_BANDS, select=stern2012,
              boundary=partial(_colour_cut_boundary, colour_min=STERN2012_COLOUR_MIN_VEGA, relation="≥",
                               mag_max=STERN2012_MAG_4P6_MAX_VEGA),
              style=LineStyle("#1e8449", "-"), reference="Stern, D., et al. 2012, ApJ 753, 30"),
    Criterion(name="assef2013_r90", bands=TWO_BANDS, select=assef2013_r90,
              boundary=partial(_assef_boundary, k=ASSEF2013_R90),
              style=LineStyle("#7d3c98", "--"), reference="Assef, R. J., et al. 2013, ApJ 772, 26"),
    Criterion(name="assef2018_r90", bands=TWO_BANDS, select=assef2018_r90,
              boundary=partial(_assef_boundary, k=ASSEF2018_R90),
              style=LineStyle("#b9770e", "--"), reference=_A18),
    Criterion(name="assef2018_r75", bands=TWO_BANDS, select=assef2018_r75,
              boundary=partial(_assef_boundary, k=ASSEF2018_R75),
              style=LineStyle("#d35400", "-."), reference=_A18),
    Criterion(name="assef2018_c75", bands=TWO_BANDS, select=assef2018_c75,
              boundary=partial(_colour_cut_boundary, colour_min=ASSEF2018_C75_COLOUR_MIN_VEGA, relation=">",
                               mag_max=None),
              style=LineStyle("#117a65", ":"), reference=_A18),
    Criterion(name="mateos2012_wedge", bands=WEDGE_BANDS, select=mateos2012_wedge, boundary=_wedge_boundary,
              style=LineStyle("#2e4053", "-"), reference="Mateos, S., et al. 2012, MNRAS 426, 3271"),
)}
"""THE registry of published colour criteria, by the name used in the configuration. Adding a
criterion is one entry here (see DEVELOPERS.md, "Extending")."""


def criterion_names() -> list[str]:
    """Names of the published criteria, in registry order (by publication year)."""
    return list(CRITERIA)


def _lookup(name: str) -> Criterion:
    if isinstance(name, str) and name in CRITERIA:
        return CRITERIA[name]
    message = f"unknown colour criterion {name!r}; valid names: {', '.join(CRITERIA)}"
    if isinstance(name, str):
        close = difflib.get_close_matches(name.strip().lower(), list(CRITERIA), n=1, cutoff=0.5)
        if close:
            message += f"; did you mean {close[0]!r}?"
    raise ValueError(message)


def apply_criteria(
    mags: Mapping[str, np.ndarray], names, combine: str = "any"
) -> CriterionResult:
    """Evaluate several published criteria and combine them.

    Parameters
    ----------
    mags : Mapping[str, array_like]
        Band label → Vega magnitudes.
    names : str or iterable of str
        Criterion names from :func:`criterion_names`.
    combine : {"any", "all"}
        ``"any"``: a source passes if it passes at least one criterion (union);
        ``"all"``: only if it passes every one (intersection).

    Returns
    -------
    CriterionResult
        For ``"any"`` the excess is the largest of the individual excesses, ignoring
        criteria that could not be evaluated (NaN only if none could).  For ``"all"``
        it is the smallest, and NaN as soon as one criterion could not be evaluated,
        since such a source cannot pass.  Units mix when the wedge (dex) is combined
        with a magnitude criterion; the sign remains meaningful.

    Raises
    ------
    ValueError
        For an unknown criterion name (the message lists the valid names and suggests
        the closest), an empty list of names or an unknown ``combine``.
    """
    if isinstance(names, str):
        names = [names]
    names = list(names)
    if not names:
        raise ValueError(f"names: give at least one colour criterion; valid names: {', '.join(CRITERIA)}")
    if combine not in ("any", "all"):
        raise ValueError(f"combine must be 'any' or 'all', got {combine!r}")
    criteria = [_lookup(n) for n in names]  # all names checked before any work
    results = [c.select(mags) for c in criteria]
    passed = np.stack([r.passed for r in results])
    excess = np.stack([r.excess_mag for r in results])
    if combine == "any":
        return _result(np.any(passed, axis=0), np.fmax.reduce(excess, axis=0))
    return _result(np.all(passed, axis=0), np.minimum.reduce(excess, axis=0))


# ----------------------------------------------------------------------------------
# user-defined linear cuts
# ----------------------------------------------------------------------------------

_SIDES = ("above", "below")


class LinearCut(NamedTuple):
    """A straight-line cut in a magnitude or colour plane, given as configuration data.

    The cut keeps ``y >= slope * x + intercept`` (``side="above"``) or
    ``y <= slope * x + intercept`` (``side="below"``).  Nothing in it is evaluated as
    code: each axis is a tuple of quantity names.

    Attributes
    ----------
    name : str
        Label used in messages and cut-flow tables.
    y, x : tuple of str
        One name, ``("4.6",)``, for that magnitude, or two, ``("3.4", "4.6")``, for the
        colour ``3.4 - 4.6``.  Names are infrared band labels or any other key the
        caller supplies (for instance an optical band such as ``"opt_broad"``).
    slope : float
        Slope of the line (y units per x unit).
    intercept : float
        Value of the line at ``x = 0`` (mag).
    side : {"above", "below"}
        Which side of the line is kept; the line itself is kept.
    """

    name: str
    y: tuple[str, ...]
    x: tuple[str, ...]
    slope: float
    intercept: float
    side: str

    @classmethod
    def from_mapping(cls, data: Mapping[str, object]) -> "LinearCut":
        """Build a validated cut from a plain mapping (such as a parsed TOML table).

        Axes may be given as lists or as a single name string.

        Raises
        ------
        ValueError
            If a field is missing, unknown or invalid.
        """
        fields = cls._fields
        missing = [f for f in fields if f not in data]
        extra = [k for k in data if k not in fields]
        label = data.get("name", "<unnamed>")
        if missing or extra:
            parts = []
            if missing:
                parts.append(f"missing {', '.join(missing)}")
            if extra:
                parts.append(f"unknown {', '.join(map(str, extra))}")
            raise ValueError(
                f"linear cut {label!r}: {'; '.join(parts)} (fields: {', '.join(fields)})"
            )
        return cls(**{f: data[f] for f in fields}).checked()

    def checked(self) -> "LinearCut":
        """Return a normalised copy (tuples, floats, lower-case side) or raise ValueError."""
        if not isinstance(self.name, str) or not self.name:
            raise ValueError(f"linear cut name must be a non-empty string, got {self.name!r}")
        axes = {}
        for axis in ("y", "x"):
            value = getattr(self, axis)
            if isinstance(value, str):
                value = (value,)
            value = tuple(value) if isinstance(value, (list, tuple)) else None
            if (
                value is None
                or len(value) not in (1, 2)
                or not all(isinstance(v, str) and v for v in value)
            ):
                raise ValueError(
                    f"linear cut {self.name!r}: {axis} must be one quantity name (a magnitude) "
                    f"or two (a colour), got {getattr(self, axis)!r}"
                )
            axes[axis] = value
        numbers = {}
        for field in ("slope", "intercept"):
            value = getattr(self, field)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
                raise ValueError(
                    f"linear cut {self.name!r}: {field} must be a finite number, got {value!r}"
                )
            numbers[field] = float(value)
        side = self.side.strip().lower() if isinstance(self.side, str) else self.side
        if side not in _SIDES:
            raise ValueError(
                f"linear cut {self.name!r}: side must be 'above' or 'below', got {self.side!r}"
            )
        return LinearCut(self.name, axes["y"], axes["x"], numbers["slope"], numbers["intercept"], side)


def _axis(quantities: Mapping[str, np.ndarray], names: tuple[str, ...], context: str) -> np.ndarray:
    first = _quantity(quantities, names[0], context)
    if len(names) == 1:
        return first
    return first - _quantity(quantities, names[1], context)


def apply_linear_cut(quantities: Mapping[str, np.ndarray], cut: LinearCut) -> CriterionResult:
    """Apply a user-defined :class:`LinearCut`.

    Parameters
    ----------
    quantities : Mapping[str, array_like]
        Quantity name → magnitudes (mag).  The caller decides the systems; infrared
        bands are Vega inside this package.
    cut : LinearCut
        The cut; validated here.

    Returns
    -------
    CriterionResult
        ``excess_mag`` is the signed vertical distance ``y - (slope x + intercept)``
        for ``side="above"`` and its negative for ``"below"``, so positive on the kept
        side; NaN (and ``passed`` False) where a needed quantity is NaN.

    Raises
    ------
    ValueError
        If the cut is invalid or names a quantity absent from ``quantities`` (a
        missing name here is most likely a typing error in the configuration, so it is
        not silently treated as unmeasured).
    """
    cut = cut.checked()
    context = f"linear cut {cut.name!r}"
    y = _axis(quantities, cut.y, context)
    x = _axis(quantities, cut.x, context)
    line = cut.slope * x + cut.intercept
    if cut.side == "above":
        return _result(y >= line, y - line)
    return _result(y <= line, line - y)
