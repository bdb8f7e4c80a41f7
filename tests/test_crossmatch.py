"""selector.crossmatch against astropy's sky matching and brute-force numpy checks."""

from __future__ import annotations

import healpy as hp
import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import Angle, SkyCoord, UnitSphericalRepresentation, search_around_sky
from hypothesis import given, settings
from hypothesis import strategies as st

from selector.core import crossmatch as cm, frames

pytestmark = pytest.mark.filterwarnings("error")  # NaN rows and empty inputs must stay silent


# ---- helpers ------------------------------------------------------------------------------


def _sphere(rng, n):
    """Uniform on the sphere (uniform in sin Dec)."""
    return rng.uniform(0.0, 360.0, n), np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n)))


def _offset(ra_deg, dec_deg, rho_arcsec, pa_rad):
    """Move points by rho along position angle pa on the sphere; RA returned in [0, 360)."""
    a, d = np.radians(ra_deg), np.radians(dec_deg)
    rho = np.radians(np.asarray(rho_arcsec) / 3600.0)
    u0 = np.stack([np.cos(d) * np.cos(a), np.cos(d) * np.sin(a), np.sin(d)], axis=-1)
    east = np.stack([-np.sin(a), np.cos(a), np.zeros_like(a)], axis=-1)
    north = np.stack([-np.sin(d) * np.cos(a), -np.sin(d) * np.sin(a), np.cos(d)], axis=-1)
    t = np.sin(pa_rad)[..., None] * east + np.cos(pa_rad)[..., None] * north
    v = np.cos(rho)[..., None] * u0 + np.sin(rho)[..., None] * t
    ra = np.mod(np.degrees(np.arctan2(v[..., 1], v[..., 0])), 360.0)
    ra[ra >= 360.0] = 0.0
    dec = np.degrees(np.arctan2(v[..., 2], np.hypot(v[..., 0], v[..., 1])))
    return ra, dec


def _cluster(rng, ra0, dec0, n, spread_arcsec):
    rho = spread_arcsec * np.sqrt(rng.uniform(0.0, 1.0, n))
    return _offset(np.full(n, ra0), np.full(n, dec0), rho, rng.uniform(0, 2 * np.pi, n))


def _reference(ra_a, dec_a, ra_b, dec_b, radius_arcsec):
    # reference: astropy search_around_sky (pairs) and its SkyCoord.separation (angles)
    ca = SkyCoord(ra_a * u.deg, dec_a * u.deg)
    cb = SkyCoord(ra_b * u.deg, dec_b * u.deg)
    ia, ib, sep, _ = search_around_sky(ca, cb, radius_arcsec * u.arcsec)
    order = np.lexsort((ib, ia))
    return ia[order], ib[order], sep.to_value(u.arcsec)[order]


def _assert_same_as_reference(pairs, ref, sep_tol_arcsec=1e-6):
    ia, ib, sep = ref
    ours = np.lexsort((pairs.index_b, pairs.index_a))
    # equal as sets of (i, j): each pair encoded as one integer, duplicates would show as well
    span = int(max(pairs.index_b.max(initial=0), ib.max(initial=0))) + 1
    np.testing.assert_array_equal(np.unique(pairs.index_a * span + pairs.index_b), np.unique(ia * span + ib))
    assert pairs.index_a.size == ia.size
    np.testing.assert_array_equal(pairs.index_a[ours], ia)
    np.testing.assert_array_equal(pairs.index_b[ours], ib)
    np.testing.assert_allclose(pairs.separation_arcsec[ours], sep, rtol=0, atol=sep_tol_arcsec)


def _assert_sorted(pairs):
    order = np.lexsort((pairs.index_b, pairs.separation_arcsec, pairs.index_a))
    np.testing.assert_array_equal(order, np.arange(order.size))
    assert pairs.index_a.dtype == np.int64 and pairs.index_b.dtype == np.int64
    assert pairs.separation_arcsec.dtype == np.float64


def _brute_separation_arcsec(ra_a, dec_a, ra_b, dec_b):
    """All-pairs angles by atan2(|u x v|, u.v) (common practice: the stable form at every angle)."""
    ua = frames.radec_to_xyz(ra_a, dec_a)
    ub = frames.radec_to_xyz(ra_b, dec_b)
    cross = np.linalg.norm(np.cross(ua[:, None, :], ub[None, :, :]), axis=-1)
    return np.degrees(np.arctan2(cross, ua @ ub.T)) * 3600.0


@pytest.fixture(scope="module")
def awkward_sky():
    """Whole-sphere sources plus clusters where coordinates misbehave, and noisy counterparts."""
    rng = np.random.default_rng(20240611)
    parts = [_sphere(rng, 20000)]
    for dec0 in (90.0, -90.0, 89.9995, -89.9995):  # on and right next to both poles
        parts.append(_cluster(rng, rng.uniform(0, 360), dec0, 400, 20.0))
    for dec0 in (0.0, 45.0, -60.0):  # across RA = 0/360
        parts.append(_cluster(rng, 0.0, dec0, 400, 15.0))
    nside = hp.order2nside(5)
    corners = hp.boundaries(nside, rng.choice(hp.nside2npix(nside), 6, replace=False), step=1, nest=True)
    c_ra, c_dec = hp.vec2ang(np.moveaxis(corners, 1, -1).reshape(-1, 3), lonlat=True)
    for ra0, dec0 in zip(c_ra, c_dec):  # HEALPix pixel corners, where several tiles meet
        parts.append(_cluster(rng, ra0, dec0, 60, 10.0))
    ra_a = np.concatenate([p[0] for p in parts])
    dec_a = np.concatenate([p[1] for p in parts])
    # counterparts: 1 to 3 noisy copies of most sources at a few arcsec, plus unrelated extras
    src = rng.choice(ra_a.size, int(0.8 * ra_a.size), replace=False)
    copies = np.repeat(src, rng.integers(1, 4, src.size))
    ra_c, dec_c = _offset(ra_a[copies], dec_a[copies], np.abs(rng.normal(0, 2.0, copies.size)),
                          rng.uniform(0, 2 * np.pi, copies.size))
    ra_x, dec_x = _sphere(rng, 3000)
    ra_b = np.concatenate([ra_c, ra_x])
    dec_b = np.concatenate([dec_c, dec_x])
    shuffle = rng.permutation(ra_b.size)
    return ra_a, dec_a, ra_b[shuffle], dec_b[shuffle]


# ---- conversions --------------------------------------------------------------------------


def test_unit_vectors_are_bit_identical_to_reference():
    rng = np.random.default_rng(1)
    ra, dec = _sphere(rng, 200_003)  # several blocks, converted on several threads
    ra[:3], dec[:3] = [0.0, 359.9999999, 123.0], [90.0, -90.0, 0.0]
    # reference: astropy UnitSphericalRepresentation -> Cartesian
    ref = SkyCoord(ra * u.deg, dec * u.deg).data.represent_as(UnitSphericalRepresentation)
    ref = ref.to_cartesian().xyz.value.T
    xyz = frames.radec_to_xyz(ra, dec)
    assert xyz.shape == (ra.size, 3) and xyz.flags.c_contiguous
    np.testing.assert_array_equal(xyz, ref)
    np.testing.assert_array_equal(frames.radec_to_xyz(ra, dec, workers=1), xyz)  # threads change nothing


def test_unit_vectors_wrap_ra_and_reject_bad_dec():
    ra = np.array([-10.0, 370.0, 720.0, 0.0])
    np.testing.assert_allclose(frames.radec_to_xyz(ra, np.zeros(4)), frames.radec_to_xyz(np.mod(ra, 360), np.zeros(4)),
                               rtol=0, atol=1e-15)
    with pytest.raises(ValueError, match="dec_deg"):
        frames.radec_to_xyz([0.0, 1.0], [0.0, 90.0001])
    nan = frames.radec_to_xyz([np.nan, 1.0], [0.0, np.nan])
    assert np.isnan(nan).all()


def test_chord_is_bit_identical_to_reference_ball_radius():
    radii = np.concatenate([[1e-3, 0.5, 1.0, 2.0, 3.0, 5.0, 10.0, 60.0, 3600.0, 648000.0],
                            np.random.default_rng(2).uniform(0.1, 30.0, 200)])
    for r in radii:
        # reference: the chord astropy search_around_sky hands to its tree, 2 sin(θ/2)
        ref = (2 * np.sin(Angle(0.5 * r * u.arcsec))).value
        assert cm.chord_from_arcsec(r) == ref
    np.testing.assert_allclose(cm.arcsec_from_chord([cm.chord_from_arcsec(r) for r in radii]), radii, rtol=1e-12)


@pytest.mark.parametrize("bad", [0.0, -1.0, np.nan, np.inf, 700000.0])
def test_chord_rejects_bad_radius(bad):
    with pytest.raises(ValueError, match="radius_arcsec"):
        cm.chord_from_arcsec(bad)
    with pytest.raises(ValueError, match="radius_arcsec"):
        cm.pairs_within([0.0], [0.0], [0.0], [0.0], bad)


# ---- pairs against the reference ----------------------------------------------------------


@pytest.mark.parametrize("radius_arcsec", [1.0, 3.0, 10.0])
def test_pairs_equal_reference_on_awkward_sky(awkward_sky, radius_arcsec):
    ra_a, dec_a, ra_b, dec_b = awkward_sky
    ref = _reference(ra_a, dec_a, ra_b, dec_b, radius_arcsec)  # reference: astropy search_around_sky
    assert ref[0].size > 10000  # plenty of pairs, and crowded rows near the poles
    pairs = cm.pairs_within(ra_a, dec_a, ra_b, dec_b, radius_arcsec)
    _assert_sorted(pairs)
    _assert_same_as_reference(pairs, ref)


def test_pairs_do_not_depend_on_which_side_gets_the_tree(awkward_sky):
    ra_a, dec_a, ra_b, dec_b = awkward_sky
    ab = cm.pairs_within(ra_a, dec_a, ra_b, dec_b, 3.0)
    ba = cm.pairs_within(ra_b, dec_b, ra_a, dec_a, 3.0)
    _assert_sorted(ba)
    back = np.lexsort((ba.index_a, ba.separation_arcsec, ba.index_b))
    np.testing.assert_array_equal(ba.index_b[back], ab.index_a)
    np.testing.assert_array_equal(ba.index_a[back], ab.index_b)
    np.testing.assert_array_equal(ba.separation_arcsec[back], ab.separation_arcsec)
    serial = cm.pairs_within(ra_a, dec_a, ra_b, dec_b, 3.0, workers=1)
    for got, want in zip(serial, ab):
        np.testing.assert_array_equal(got, want)


def _near_boundary(rng, radius_arcsec, n_centres, reps, rel, keep_ulps=None):
    """Centres and companions at radius*(1 ± rel); optionally only those whose squared chord, as
    the tree computes it, lies within ``keep_ulps`` ulp of the squared ball radius."""
    ra0, dec0 = _sphere(rng, n_centres)
    dec0[:10], dec0[10:20] = 89.9999, -89.99995
    rho = radius_arcsec * (1.0 + rng.uniform(-rel, rel, (n_centres, reps)))
    ra_b, dec_b = _offset(np.repeat(ra0, reps).reshape(-1, reps), np.repeat(dec0, reps).reshape(-1, reps),
                          rho, rng.uniform(0, 2 * np.pi, (n_centres, reps)))
    ra_b, dec_b = ra_b.ravel(), dec_b.ravel()
    owner = np.repeat(np.arange(n_centres), reps)
    if keep_ulps is not None:
        d = np.repeat(frames.radec_to_xyz(ra0, dec0), reps, axis=0) - frames.radec_to_xyz(ra_b, dec_b)
        sq = d[:, 0] ** 2 + d[:, 1] ** 2 + d[:, 2] ** 2
        r2 = cm.chord_from_arcsec(radius_arcsec) ** 2
        close = np.abs(sq - r2) <= keep_ulps * np.spacing(r2)
        ra_b, dec_b, owner = ra_b[close], dec_b[close], owner[close]
    return ra0, dec0, ra_b, dec_b, owner


@pytest.mark.parametrize("radius_arcsec, rel, keep_ulps", [(36000.0, 2e-15, None), (2.0, 3e-11, 6)])
def test_pairs_on_the_boundary_are_decided_like_the_reference(radius_arcsec, rel, keep_ulps):
    # companions whose squared chord is within a few ulp of the squared radius: the decision rests
    # on the last bits, so only the reference's exact inequality reproduces it
    rng = np.random.default_rng(3)
    ra0, dec0, ra_b, dec_b, owner = _near_boundary(rng, radius_arcsec, 300, 2000 if keep_ulps else 60, rel, keep_ulps)
    ref = _reference(ra0, dec0, ra_b, dec_b, radius_arcsec)  # reference: astropy search_around_sky
    pairs = cm.pairs_within(ra0, dec0, ra_b, dec_b, radius_arcsec)
    _assert_same_as_reference(pairs, ref, sep_tol_arcsec=1e-6)
    own = ref[0] == owner[ref[1]]
    assert 0.2 * ra_b.size < own.sum() < 0.8 * ra_b.size  # a genuine coin toss at the boundary


def test_wide_radius_uses_the_stable_formula_for_large_angles():
    rng = np.random.default_rng(4)
    ra_a, dec_a = _sphere(rng, 60)
    ra_b, dec_b = _sphere(rng, 80)
    ra_b[:5], dec_b[:5] = np.mod(ra_a[:5] + 180.0, 360.0), -dec_a[:5]  # antipodes
    radius = 179.9 * 3600.0
    pairs = cm.pairs_within(ra_a, dec_a, ra_b, dec_b, radius)
    # reference: astropy search_around_sky and SkyCoord.separation, up to the antipodes
    _assert_same_as_reference(pairs, _reference(ra_a, dec_a, ra_b, dec_b, radius))
    # at exactly 180 deg an antipode can miss by one rounding of the chord, as in the reference
    full = cm.pairs_within(ra_a, dec_a, ra_b, dec_b, 648000.0)
    _assert_same_as_reference(full, _reference(ra_a, dec_a, ra_b, dec_b, 648000.0))
    assert full.index_a.size >= ra_a.size * ra_b.size - 5


def test_ra_outside_range_matches_like_wrapped(awkward_sky):
    ra_a, dec_a, ra_b, dec_b = (x[:5000] for x in awkward_sky)
    want = cm.pairs_within(ra_a, dec_a, ra_b, dec_b, 5.0)
    got = cm.pairs_within(ra_a - 360.0, dec_a, ra_b + 720.0, dec_b, 5.0)
    np.testing.assert_array_equal(got.index_a, want.index_a)
    np.testing.assert_array_equal(got.index_b, want.index_b)
    np.testing.assert_allclose(got.separation_arcsec, want.separation_arcsec, rtol=0, atol=1e-8)


def test_rows_without_position_match_nothing():
    rng = np.random.default_rng(5)
    ra_a, dec_a = _cluster(rng, 10.0, 10.0, 200, 20.0)
    ra_b, dec_b = _cluster(rng, 10.0, 10.0, 150, 20.0)
    ra_a[::7] = np.nan
    dec_b[::5] = np.nan
    ra_b[1] = np.inf
    pairs = cm.pairs_within(ra_a, dec_a, ra_b, dec_b, 4.0)
    _assert_sorted(pairs)
    good_a = np.flatnonzero(np.isfinite(ra_a))
    good_b = np.flatnonzero(np.isfinite(ra_b) & np.isfinite(dec_b))
    # reference: astropy search_around_sky on the rows that have a position
    ref = _reference(ra_a[good_a], dec_a[good_a], ra_b[good_b], dec_b[good_b], 4.0)
    _assert_same_as_reference(pairs, (good_a[ref[0]], good_b[ref[1]], ref[2]))


def test_empty_inputs():
    e = np.empty(0)
    for args in [(e, e, [1.0], [2.0]), ([1.0], [2.0], e, e), (e, e, e, e)]:
        pairs = cm.pairs_within(*args, 2.0)
        assert all(x.size == 0 for x in pairs)
        assert pairs.index_a.dtype == np.int64 and pairs.separation_arcsec.dtype == np.float64
    empty = cm.pairs_within(e, e, e, e, 2.0)
    near = cm.nearest_within(empty, 4)
    np.testing.assert_array_equal(near.index_b, [-1, -1, -1, -1])
    assert np.isnan(near.separation_arcsec).all()
    np.testing.assert_array_equal(near.n_within, np.zeros(4, np.int64))
    np.testing.assert_array_equal(cm.count_within(empty, 3), np.zeros(3, np.int64))
    assert cm.nearest_within(empty, 0).index_b.size == 0
    with pytest.raises(ValueError, match="dec_a_deg|dec_deg"):
        cm.pairs_within(e, e, [0.0], [91.0], 2.0)


def test_mismatched_lengths_are_rejected():
    with pytest.raises(ValueError, match="equal length"):
        cm.pairs_within([0.0, 1.0], [0.0], [0.0], [0.0], 2.0)


# ---- nearest and blend counts against brute force --------------------------------------------


def test_nearest_and_counts_equal_brute_force():
    rng = np.random.default_rng(6)
    ra_a, dec_a = _cluster(rng, 359.999, 30.0, 150, 25.0)
    ra_b, dec_b = _cluster(rng, 359.999, 30.0, 120, 25.0)
    # exact duplicates in b make ties that must go to the lower index
    ra_b[60:70], dec_b[60:70] = ra_b[50:60], dec_b[50:60]
    ra_b[70:75], dec_b[70:75] = ra_a[:5], dec_a[:5]
    ra_b[75:80], dec_b[75:80] = ra_a[:5], dec_a[:5]
    radius = 4.0
    pairs = cm.pairs_within(ra_a, dec_a, ra_b, dec_b, radius)
    near = cm.nearest_within(pairs, ra_a.size)
    blend = cm.count_within(pairs, ra_b.size)

    # reference: brute force over the full separation matrix in numpy
    sep = _brute_separation_arcsec(ra_a, dec_a, ra_b, dec_b)
    within = sep <= radius
    np.testing.assert_array_equal(near.n_within, within.sum(axis=1))
    np.testing.assert_array_equal(blend, within.sum(axis=0))
    masked = np.where(within, sep, np.inf)
    # np.argmin returns the first minimum, i.e. the lowest index_b on ties
    best = np.argmin(masked, axis=1)
    has = within.any(axis=1)
    np.testing.assert_array_equal(near.index_b, np.where(has, best, -1))
    np.testing.assert_allclose(near.separation_arcsec[has], masked[has, best[has]], rtol=0, atol=1e-9)
    assert np.isnan(near.separation_arcsec[~has]).all()
    assert near.index_b.dtype == np.int64 and near.n_within.dtype == np.int64 and blend.dtype == np.int64
    assert np.all(near.index_b[:5] == 70 + np.arange(5))  # duplicates at zero distance: lower index wins


def test_nearest_accepts_pairs_in_any_order():
    rng = np.random.default_rng(7)
    ra_a, dec_a = _cluster(rng, 0.0, -89.9999, 80, 15.0)
    ra_b, dec_b = _cluster(rng, 0.0, -89.9999, 80, 15.0)
    pairs = cm.pairs_within(ra_a, dec_a, ra_b, dec_b, 5.0)
    shuffle = rng.permutation(pairs.index_a.size)
    shuffled = cm.PairSet(*(x[shuffle] for x in pairs))
    for got, want in zip(cm.nearest_within(shuffled, 80), cm.nearest_within(pairs, 80)):
        np.testing.assert_array_equal(got, want)


def test_nearest_and_count_check_their_sizes():
    pairs = cm.PairSet(np.array([0, 3]), np.array([1, 1]), np.array([0.1, 0.2]))
    with pytest.raises(ValueError, match="n_a"):
        cm.nearest_within(pairs, 3)
    with pytest.raises(ValueError, match="n_b"):
        cm.count_within(pairs, 1)


# ---- property test ------------------------------------------------------------------------


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    dec0=st.sampled_from([-90.0, -89.99, -45.0, 0.0, 30.0, 89.999, 90.0]),
    ra0=st.sampled_from([0.0, 0.0001, 180.0, 359.9999]),
    n_a=st.integers(0, 60),
    n_b=st.integers(0, 60),
    spread=st.floats(1.0, 60.0),
    radius=st.floats(0.1, 30.0),
)
def test_property_pairs_equal_reference(seed, dec0, ra0, n_a, n_b, spread, radius):
    rng = np.random.default_rng(seed)
    ra_a, dec_a = _cluster(rng, ra0, dec0, n_a, spread)
    ra_b, dec_b = _cluster(rng, ra0, dec0, n_b, spread)
    pairs = cm.pairs_within(ra_a, dec_a, ra_b, dec_b, radius)
    _assert_sorted(pairs)
    if n_a and n_b:  # reference: astropy search_around_sky and SkyCoord.separation
        _assert_same_as_reference(pairs, _reference(ra_a, dec_a, ra_b, dec_b, radius))
    else:
        assert pairs.index_a.size == 0
    near = cm.nearest_within(pairs, n_a)
    assert near.n_within.sum() == pairs.index_a.size == cm.count_within(pairs, n_b).sum()
