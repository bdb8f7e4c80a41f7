"""Published infrared colour criteria checked at their boundaries.

Every boundary equation below is written out again beside its test, with the paper it
comes from.  The coefficients are from memory, as given in the project design notes
(not re-read from the papers); the expected values are computed here with ``math``
and ``astropy.units`` so that a slip in the module's arithmetic does not carry over
into the check.

m1, m2, m3 are Vega magnitudes at 3.4, 4.6 and 12 µm.
"""

from __future__ import annotations

import math

import astropy.units as u
import numpy as np
import pytest

from selector.core import photometry as ph

EPS = 1e-6  # mag (or dex for the wedge): far above float64 rounding at m ~ 20


def _pair(m2, colour_vega):
    m2 = np.asarray(m2, dtype=float)
    return {"3.4": m2 + colour_vega, "4.6": m2}


# --------------------------------------------------------------------------------
# Stern et al. 2012, ApJ 753, 30: m1 - m2 >= 0.8 and m2 <= 15.05 (from memory)
# --------------------------------------------------------------------------------

STERN_M2 = [8.0, 11.0, 13.5, 14.9, 15.05 - 1e-3]


@pytest.mark.parametrize("m2", STERN_M2)
def test_stern2012_colour_edge(m2):
    # boundary: m1 - m2 = 0.8 (Stern et al. 2012, ApJ 753, 30)
    inside = ph.stern2012(_pair(m2, 0.8 + EPS))
    outside = ph.stern2012(_pair(m2, 0.8 - EPS))
    assert inside.passed and not outside.passed
    assert inside.excess_mag == pytest.approx(EPS, abs=1e-9)
    assert outside.excess_mag == pytest.approx(-EPS, abs=1e-9)


def test_stern2012_magnitude_limit():
    # boundary: m2 = 15.05, inclusive (Stern et al. 2012, ApJ 753, 30)
    red = 1.5
    assert ph.stern2012(_pair(15.05 - EPS, red)).passed
    assert ph.stern2012(_pair(15.05, red)).passed
    r = ph.stern2012(_pair(15.05 + EPS, red))
    assert not r.passed
    assert r.excess_mag == pytest.approx(-EPS, abs=1e-9)


def test_stern2012_constants_are_the_cited_values():
    assert ph.STERN2012_COLOUR_MIN_VEGA == 0.8
    assert ph.STERN2012_MAG_4P6_MAX_VEGA == 15.05


# --------------------------------------------------------------------------------
# Assef et al. 2013, ApJ 772, 26 (90 % reliability) and Assef et al. 2018, ApJS 234,
# 23 (R90, R75):
#   m1 - m2 > alpha * exp[beta (m2 - gamma)^2]  for m2 > gamma,
#   m1 - m2 > alpha                              otherwise.
# 2013: (0.662, 0.232, 13.97), only m2 < 17.11; 2018 R90 (0.65, 0.153, 13.86),
# R75 (0.486, 0.092, 13.07) (all from memory).
# --------------------------------------------------------------------------------

ASSEF_FORMS = {
    "assef2013_r90": (0.662, 0.232, 13.97, 17.11),
    "assef2018_r90": (0.65, 0.153, 13.86, None),
    "assef2018_r75": (0.486, 0.092, 13.07, None),
}


def _assef_threshold(m2, alpha, beta, gamma):
    return alpha * math.exp(beta * (m2 - gamma) ** 2) if m2 > gamma else alpha


def _assef_cases():
    for name, (alpha, beta, gamma, limit) in ASSEF_FORMS.items():
        faint_end = (limit - 1e-3) if limit else 18.5
        offsets = [-3.0, -0.7, 0.0, 1e-4, 0.4, 1.3, 2.6]
        for m2 in [gamma + d for d in offsets] + [faint_end]:
            yield pytest.param(name, m2, id=f"{name}-m2={m2:.4f}")


@pytest.mark.parametrize("name,m2", list(_assef_cases()))
def test_assef_boundary_on_both_sides_of_gamma(name, m2):
    alpha, beta, gamma, _ = ASSEF_FORMS[name]
    threshold = _assef_threshold(m2, alpha, beta, gamma)
    inside = ph.CRITERIA[name].select(_pair(m2, threshold + EPS))
    outside = ph.CRITERIA[name].select(_pair(m2, threshold - EPS))
    assert inside.passed and not outside.passed
    assert inside.excess_mag == pytest.approx(EPS, abs=1e-9)
    assert outside.excess_mag == pytest.approx(-EPS, abs=1e-9)


@pytest.mark.parametrize("name", list(ASSEF_FORMS))
def test_assef_boundary_function_matches_equation(name):
    alpha, beta, gamma, _ = ASSEF_FORMS[name]
    m2 = np.array([gamma - 2, gamma, gamma + 0.5, gamma + 2.0, 17.0])
    got = ph.assef_boundary_colour_vega(m2, alpha, beta, gamma)
    want = [_assef_threshold(v, alpha, beta, gamma) for v in m2]
    np.testing.assert_allclose(got, want, rtol=1e-13)
    # the two pieces meet at m2 = gamma: exp(0) = 1
    just_fainter = ph.assef_boundary_colour_vega(gamma + 1e-9, alpha, beta, gamma)
    assert just_fainter == pytest.approx(alpha, rel=1e-12)


def test_assef2013_worked_value():
    # 0.662 * exp(0.232 * (15.00 - 13.97)^2) = 0.662 * exp(0.246129) = 0.84672 (by hand)
    got = ph.assef_boundary_colour_vega(15.0, 0.662, 0.232, 13.97)
    assert float(got) == pytest.approx(0.84672, abs=5e-5)


def test_assef2013_magnitude_limit():
    # applied only to m2 < 17.11, strict (Assef et al. 2013, ApJ 772, 26)
    very_red = 10.0  # far above the boundary (about 6.4 mag at m2 = 17.11)
    assert ph.assef2013_r90(_pair(17.11 - EPS, very_red)).passed
    assert not ph.assef2013_r90(_pair(17.11, very_red)).passed
    r = ph.assef2013_r90(_pair(17.11 + EPS, very_red))
    assert not r.passed
    assert r.excess_mag == pytest.approx(-EPS, abs=1e-9)


def test_assef2018_has_no_faint_limit():
    # the 2018 forms are used as given in the design notes, with no m2 limit
    m2 = 17.5
    for name in ("assef2018_r90", "assef2018_r75"):
        alpha, beta, gamma, _ = ASSEF_FORMS[name]
        assert ph.CRITERIA[name].select(_pair(m2, _assef_threshold(m2, alpha, beta, gamma) + EPS)).passed


def test_assef_coefficients_are_the_cited_values():
    assert tuple(ph.ASSEF2013_R90) == (0.662, 0.232, 13.97, 17.11)
    assert tuple(ph.ASSEF2018_R90)[:3] == (0.65, 0.153, 13.86)
    assert tuple(ph.ASSEF2018_R75)[:3] == (0.486, 0.092, 13.07)
    assert ph.ASSEF2018_C75_COLOUR_MIN_VEGA == 0.71


# Assef et al. 2018, ApJS 234, 23, C75: m1 - m2 > 0.71 at every magnitude (from memory)
@pytest.mark.parametrize("m2", [9.0, 13.0, 15.5, 17.5, 19.0])
def test_assef2018_c75_edge(m2):
    assert ph.assef2018_c75(_pair(m2, 0.71 + EPS)).passed
    assert not ph.assef2018_c75(_pair(m2, 0.71 - EPS)).passed


# --------------------------------------------------------------------------------
# Mateos et al. 2012, MNRAS 426, 3271 wedge, x = log10(f12/f4.6), y = log10(f4.6/f3.4):
#   y <= 0.315 x + 0.297,  y >= 0.315 x - 0.110,  y >= -3.172 x + 0.436  (from memory)
# Sources are built from flux densities in Jy through astropy's AB magnitude, then
# brought to Vega with the cited offsets, so the test does not reuse the module's
# flux-ratio arithmetic.
# --------------------------------------------------------------------------------


def _mags_from_xy(x, y, f46_jy=1e-3):
    f46 = np.asarray(f46_jy, dtype=float)
    fluxes = {"3.4": f46 / 10.0 ** np.asarray(y), "4.6": f46, "12": f46 * 10.0 ** np.asarray(x)}
    out = {}
    for band, f in fluxes.items():
        ab = (np.atleast_1d(f) * u.Jy).to_value(u.ABmag)
        out[band] = ab - ph.VEGA_TO_AB_MAG[band]
    return out


def _upper(x):
    return 0.315 * x + 0.297


def _lower(x):
    return 0.315 * x - 0.110


def _left(x):
    return -3.172 * x + 0.436


X_UL = 0.139 / 3.487  # upper and left edges meet: 0.315x + 0.297 = -3.172x + 0.436
X_LL = 0.546 / 3.487  # lower and left edges meet: 0.315x - 0.110 = -3.172x + 0.436


def _check(x, y, expected):
    r = ph.mateos2012_wedge(_mags_from_xy([x], [y]))
    assert bool(r.passed[0]) is expected, (x, y, r)
    return float(r.excess_mag[0])


@pytest.mark.parametrize("x", [0.1, 0.3, 0.6, 1.2])
def test_mateos_upper_edge(x):
    # y <= 0.315 x + 0.297
    assert _check(x, _upper(x) - EPS, True) == pytest.approx(EPS, abs=1e-8)
    assert _check(x, _upper(x) + EPS, False) == pytest.approx(-EPS, abs=1e-8)


@pytest.mark.parametrize("x", [0.2, 0.4, 0.8, 1.5])
def test_mateos_lower_edge(x):
    # y >= 0.315 x - 0.110 (right of the lower-left corner, where this edge is the floor)
    assert _check(x, _lower(x) + EPS, True) == pytest.approx(EPS, abs=1e-8)
    assert _check(x, _lower(x) - EPS, False) == pytest.approx(-EPS, abs=1e-8)


@pytest.mark.parametrize("x", [0.05, 0.1, 0.15])
def test_mateos_left_edge(x):
    # y >= -3.172 x + 0.436 (between the two corners, where this edge is the floor)
    assert X_UL < x < X_LL
    assert _check(x, _left(x) + EPS, True) == pytest.approx(EPS, abs=1e-8)
    assert _check(x, _left(x) - EPS, False) == pytest.approx(-EPS, abs=1e-8)


def test_mateos_upper_left_corner():
    y_c = _upper(X_UL)
    assert y_c == pytest.approx(_left(X_UL), abs=1e-12)
    # just right of the tip, between the upper and left edges: inside
    _check(X_UL + 1e-4, y_c, True)
    # just left of the tip, nothing is inside
    _check(X_UL - 1e-4, y_c, False)
    _check(X_UL - 1e-4, y_c - 2e-4, False)


def test_mateos_lower_left_corner():
    y_c = _lower(X_LL)
    assert y_c == pytest.approx(_left(X_LL), abs=1e-12)
    _check(X_LL + 1e-4, y_c + 5e-5, True)   # above both floors
    _check(X_LL - 1e-4, y_c + 1e-5, False)  # below the left edge
    _check(X_LL + 1e-4, y_c + 1e-5, False)  # below the lower edge
    _check(X_LL, y_c - EPS, False)


def test_mateos_nothing_selected_left_of_the_tip():
    ys = np.linspace(-1.0, 1.0, 201)
    xs = np.full_like(ys, X_UL - 1e-3)
    r = ph.mateos2012_wedge(_mags_from_xy(xs, ys))
    assert not r.passed.any()


def test_mateos_wedge_constants_are_the_cited_values():
    assert ph.MATEOS2012_WEDGE == {"upper": (0.315, 0.297), "lower": (0.315, -0.110), "left": (-3.172, 0.436)}


# --------------------------------------------------------------------------------
# Vega -> AB offsets (Jarrett et al. 2011, ApJ 735, 112; from memory) and flux ratios
# (reference: astropy.units AB magnitudes)
# --------------------------------------------------------------------------------


def test_ab_offsets_are_the_cited_values():
    assert ph.VEGA_TO_AB_MAG == {"3.4": 2.699, "4.6": 3.339, "12": 5.174, "22": 6.620}
    for band, offset in ph.VEGA_TO_AB_MAG.items():
        assert float(ph.vega_to_ab(0.0, band)) == offset
        assert float(ph.ab_to_vega(offset, band)) == 0.0


@pytest.mark.parametrize("band", ph.BANDS)
def test_ab_offsets_round_trip(band):
    m = np.linspace(5.0, 22.0, 50)
    np.testing.assert_allclose(ph.ab_to_vega(ph.vega_to_ab(m, band), band), m, rtol=0, atol=1e-12)
    np.testing.assert_allclose(ph.to_vega(ph.vega_to_ab(m, band), band, "AB"), m, rtol=0, atol=1e-12)


@pytest.mark.parametrize("band_a,band_b", [("3.4", "4.6"), ("4.6", "12"), ("3.4", "22"), ("22", "12")])
def test_flux_ratio_matches_astropy_for_ab_inputs(band_a, band_b):
    rng = np.random.default_rng(12)
    ab_a = rng.uniform(8.0, 20.0, 40)
    ab_b = rng.uniform(8.0, 20.0, 40)
    f_a = (ab_a * u.ABmag).to_value(u.Jy)
    f_b = (ab_b * u.ABmag).to_value(u.Jy)
    want = np.log10(f_b / f_a)
    got = ph.flux_ratio_log10(
        ph.to_vega(ab_a, band_a, "ab"), ph.to_vega(ab_b, band_b, "ab"), band_a, band_b
    )
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-12)


def test_flux_ratio_insensitive_to_zero_point_convention():
    # Zero-point flux densities 309.540, 171.787, 31.674, 8.363 Jy (Jarrett et al.
    # 2011, ApJ 735, 112; from memory): fluxes f = F0 * 10**(-0.4 m_Vega) give flux
    # ratios within 1e-3 dex of the AB-offset convention, because the offsets differ
    # from 2.5 log10(3631 Jy / F0) by about the same 0.026 mag in every band.
    zero_point_jy = {"3.4": 309.540, "4.6": 171.787, "12": 31.674, "22": 8.363}
    m = {"3.4": 14.2, "4.6": 13.1, "12": 10.0, "22": 7.9}
    for a, b in [("3.4", "4.6"), ("4.6", "12"), ("12", "22"), ("3.4", "22")]:
        direct = math.log10(zero_point_jy[b] * 10 ** (-0.4 * m[b]) / (zero_point_jy[a] * 10 ** (-0.4 * m[a])))
        assert float(ph.flux_ratio_log10(m[a], m[b], a, b)) == pytest.approx(direct, abs=1e-3)


def test_mateos_wedge_follows_the_power_law_locus():
    # a power law f_nu ∝ nu^-alpha lies at y/x = log10(4.6/3.4)/log10(12/4.6) = 0.315 in these axes
    # (common practice: the wedge was drawn around the power-law locus), inside for AGN-like alpha
    import astropy.units as u

    nu = {band: (float(w) * u.micron).to_value(u.Hz, equivalencies=u.spectral())
          for band, w in (("3.4", 3.4), ("4.6", 4.6), ("12", 12.0))}
    alphas = np.array([1.0, 1.5, 2.0, 3.0])
    f = {b: (nu[b] / nu["4.6"]) ** -alphas * 1e-3 for b in nu}
    mags = {b: (f[b] * u.Jy).to_value(u.ABmag) - ph.VEGA_TO_AB_MAG[b] for b in f}
    assert np.all(ph.mateos2012_wedge(mags).passed)
    # a flat (alpha = 0) spectrum, like a star's Rayleigh-Jeans tail turned over, is outside
    flat = {b: np.atleast_1d((1e-3 * u.Jy).to_value(u.ABmag)) - ph.VEGA_TO_AB_MAG[b] for b in nu}
    assert not ph.mateos2012_wedge(flat).passed[0]
