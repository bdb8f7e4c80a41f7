"""HEALPix tiling checked against the reference libraries and the scheme's definition.

References: Górski et al. 2005, ApJ 622, 759 (Npix = 12·Nside², nested numbering); healpy and
astropy-healpix as reference implementations of ``ang2pix`` / ``lonlat_to_healpix`` (nested scheme).
healpy is the reference library: ``selector.core.tiles`` computes tile ids with its own numpy code
(so that the jobs need not import healpy, which loads a plotting library) and must give healpy's ids
bit for bit, ties on pixel edges included, because ingested tiles and run records are keyed by them.
Its geometry comes from astropy-healpix and is checked against healpy here too.
"""

from __future__ import annotations

import astropy.units as u
import healpy as hp
import numpy as np
import pytest
from astropy_healpix import HEALPix

from selector.core import tiles

ORDERS = [0, 1, 2, 5, 8, 12, 29]
#: Latitude where three base pixels meet, z = ±2/3 (Górski et al. 2005): tiles there have 7 neighbours.
_VERTEX_LAT_DEG = float(np.degrees(np.arcsin(2.0 / 3.0)))


def _healpy(ra, dec, order):
    return hp.ang2pix(2**order, ra, dec, nest=True, lonlat=True)


def _astropy_healpix(ra, dec, order):
    return HEALPix(nside=2**order, order="nested").lonlat_to_healpix(np.asarray(ra) * u.deg, np.asarray(dec) * u.deg)


def _special_points():
    """Both poles, the RA = 0/360 seam, and the base-pixel vertices, at assorted positions."""
    ras = np.array([0.0, 1e-12, 359.9999999, 360.0 - 1e-11, 360.0, 45.0, 90.0, 180.0, 270.0, 123.456])
    decs = np.array([90.0, 89.9999999, -90.0, -89.9999999, 0.0, 1e-10, -1e-10, 41.8103149, _VERTEX_LAT_DEG,
                     -_VERTEX_LAT_DEG, 30.0, -60.0])
    ra, dec = np.meshgrid(ras, decs)
    return ra.ravel(), dec.ravel()


def _random_points(rng, n):
    return rng.uniform(0.0, 360.0, n), np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n)))


def _touching(ra, dec, order):
    """Pixels (healpy) of the point nudged a little in eight directions: shape (n, 9), the point first.

    A point exactly on a pixel edge or vertex belongs to either side; the reference libraries break
    such ties differently (RA = 45°, Dec = 0, a base-pixel vertex, is one), so there a correct answer
    is any pixel touching the point.
    """
    step = min(1e-9, np.degrees(np.sqrt(4 * np.pi / (12 * 4**order))) * 1e-3)
    cols = [_healpy(ra, dec, order)]
    for dra, ddec in ((1, 0), (-1, 0), (0, 1), (0, -1), (1, 1), (1, -1), (-1, 1), (-1, -1)):
        cols.append(_healpy(np.mod(ra + dra * step, 360.0), np.clip(dec + ddec * step, -90.0, 90.0), order))
    return np.stack(cols, axis=1)


def _check_against_references(ra, dec, order, got):
    touching = _touching(ra, dec, order)
    on_edge = np.any(touching != touching[:, :1], axis=1)
    ref_hp, ref_ah = _healpy(ra, dec, order), _astropy_healpix(ra, dec, order)
    np.testing.assert_array_equal(got, ref_hp)
    np.testing.assert_array_equal(got[~on_edge], ref_ah[~on_edge])
    # on an edge: both answers must be pixels that touch the point
    assert np.all(np.any(touching[on_edge] == ref_ah[on_edge, None], axis=1))
    assert np.all(np.any(touching[on_edge] == got[on_edge, None], axis=1))
    return on_edge


@pytest.mark.parametrize("order", ORDERS)
def test_tile_of_matches_both_reference_libraries(order, rng):
    ra_r, dec_r = _random_points(rng, 20000)
    ra_s, dec_s = _special_points()
    ra, dec = np.r_[ra_r, ra_s], np.r_[dec_r, dec_s]
    got = tiles.tile_of(ra, dec, order)
    assert got.dtype == np.int64
    on_edge = _check_against_references(ra, dec, order, got)
    # the random points are almost never on an edge, so nearly everything is compared exactly
    assert on_edge[:20000].mean() < 0.01
    assert got.min() >= 0 and got.max() < tiles.n_tiles(order)


@pytest.mark.parametrize("order", ORDERS)
def test_ra_360_is_ra_0(order):
    dec = np.array([-90.0, -45.0, 0.0, 10.0, _VERTEX_LAT_DEG, 89.0, 90.0])
    np.testing.assert_array_equal(tiles.tile_of(np.full(7, 360.0), dec, order), tiles.tile_of(np.zeros(7), dec, order))


def _corner_points(order, pixels, fraction=1e-3):
    """Points just inside each corner of each pixel, moved ``fraction`` of the way to its centre."""
    ns = 2**order
    corners = np.stack([hp.boundaries(ns, int(p), step=1, nest=True).T for p in pixels])   # (n, 4, 3)
    centres = np.stack(hp.pix2vec(ns, np.asarray(pixels), nest=True), axis=1)[:, None, :]
    v = corners + fraction * (centres - corners)
    v /= np.linalg.norm(v, axis=2, keepdims=True)
    ra, dec = hp.vec2ang(v.reshape(-1, 3), lonlat=True)
    return np.mod(ra, 360.0), dec, np.repeat(np.asarray(pixels), 4)


@pytest.mark.parametrize("order", ORDERS)
def test_points_just_inside_pixel_corners(order, rng):
    n = tiles.n_tiles(order)
    pixels = np.unique(np.r_[rng.integers(0, n, 300), _awkward_tiles(order)]) if n > 300 else np.arange(n)
    ra, dec, owner = _corner_points(order, pixels)
    got = tiles.tile_of(ra, dec, order)
    np.testing.assert_array_equal(got, owner)  # by construction each point is inside its own pixel
    np.testing.assert_array_equal(got, _healpy(ra, dec, order))
    np.testing.assert_array_equal(got, _astropy_healpix(ra, dec, order))


def _edge_points(order, rng, n_pixels=20000, step=8):
    """Points on pixel edges and corners of ``order`` (healpy's boundaries, as RA/Dec)."""
    ns = 2**order
    pixels = np.arange(12 * ns * ns) if 12 * ns * ns <= n_pixels else rng.integers(0, 12 * ns * ns, n_pixels)
    edges = hp.boundaries(ns, pixels, step=step, nest=True)
    ra, dec = hp.vec2ang(np.moveaxis(edges, 1, -1).reshape(-1, 3), lonlat=True)
    return ra, dec


def test_tile_ids_are_healpys_bit_for_bit_on_millions_of_points(rng):
    # reference library: healpy (ang2pix, nested, lonlat). Random points, points on the edges and
    # corners of pixels of several orders (each also a tie at the coarser orders it lies on), poles,
    # the RA = 0/360 seam and RA outside [0, 360).
    ra_r, dec_r = _random_points(rng, 2_000_000)
    ra_s, dec_s = _special_points()
    edges = [_edge_points(o, rng) for o in (0, 1, 3, 6, 9, 12)]
    ra = np.concatenate([ra_r, ra_s, ra_s - 360.0, ra_s + 360.0] + [e[0] for e in edges])
    dec = np.concatenate([dec_r, dec_s, dec_s, dec_s] + [e[1] for e in edges])
    assert len(ra) > 3_000_000
    for order in list(range(0, 13)) + [tiles.FINE_ORDER]:
        np.testing.assert_array_equal(tiles.tile_of(ra, dec, order), _healpy(ra, dec, order),
                                      err_msg=f"order {order}")


def test_tile_of_keeps_the_input_shape():
    ra, dec = np.array([[0.0, 10.0], [200.0, 359.0]]), np.array([[90.0, -5.0], [41.8, -90.0]])
    got = tiles.tile_of(ra, dec, 4)
    assert got.shape == (2, 2)
    np.testing.assert_array_equal(got, _healpy(ra, dec, 4))
    assert tiles.tile_of(np.zeros(0), np.zeros(0), 4).shape == (0,)


@pytest.mark.parametrize("order", list(range(0, 13)))
def test_disc_and_resolution_equal_the_reference_library(order, rng):
    # reference library: healpy (pix2vec, boundaries, nside2resol)
    ns = 2**order
    chosen = np.unique(np.r_[rng.integers(0, 12 * ns * ns, 200), 0, 12 * ns * ns - 1, _awkward_tiles(order)])
    for tile in chosen:
        centre, reach = tiles.circumscribed_disc(int(tile), order)
        ref_centre = np.asarray(hp.pix2vec(ns, int(tile), nest=True))
        corners = hp.boundaries(ns, int(tile), step=1, nest=True).T
        ref_reach = np.max(np.arctan2(np.linalg.norm(np.cross(corners, ref_centre), axis=1), corners @ ref_centre))
        np.testing.assert_allclose(centre, ref_centre, rtol=0, atol=1e-12)
        assert abs(reach - ref_reach) <= 1e-12
    assert tiles.resolution_arcsec(order) == pytest.approx(np.degrees(hp.nside2resol(ns)) * 3600.0, rel=1e-12, abs=0)


@pytest.mark.parametrize("order", list(range(0, 30)))
def test_max_pixel_radius_bounds_the_reference_librarys(order):
    # reference library: healpy's max_pixrad, the largest centre-to-boundary distance of any pixel
    assert hp.max_pixrad(2**order) <= tiles.max_pixel_radius_rad(order) <= 1.3 * hp.max_pixrad(2**order)


def _random_disc_centre(rng, kind):
    if kind == 0:
        return rng.uniform(0.0, 360.0), float(np.degrees(np.arcsin(rng.uniform(-1.0, 1.0))))
    if kind == 1:   # near a pole
        return rng.uniform(0.0, 360.0), float(rng.choice([1.0, -1.0]) * (90.0 - 10 ** rng.uniform(-7, 0.5)))
    if kind == 2:   # on the RA = 0/360 seam
        return float(rng.choice([0.0, 1e-10, 359.9999999999, 0.001, 359.999])), rng.uniform(-90.0, 90.0)
    return rng.uniform(0.0, 360.0), float(rng.choice([1.0, -1.0]) * _VERTEX_LAT_DEG + rng.normal(0.0, 0.5))


@pytest.mark.parametrize("order", [0, 1, 2, 3, 5, 8, 10, 12])
def test_tiles_near_holds_the_reference_librarys_inclusive_disc(order, rng):
    # reference library: healpy's query_disc(inclusive=True). Every tile it gives for the disc that
    # tiles_near searches must be in our set: a missing tile would lose the pairs across its edge.
    ns = 2**order
    for i in range(120):
        tile = int(tiles.tile_of(*_random_disc_centre(rng, i % 4), order))
        margin = 10 ** rng.uniform(0.0, np.log10(tiles.max_margin_arcsec(order)))
        centre, reach = tiles.circumscribed_disc(tile, order)
        ref = hp.query_disc(ns, centre, reach + np.radians(margin / 3600.0), inclusive=True, nest=True)
        got = tiles.tiles_near(tile, order, margin)
        assert np.setdiff1d(ref, got).size == 0, f"order {order} tile {tile} margin {margin}"


@pytest.mark.parametrize("order", list(range(0, 30)))
def test_number_of_tiles(order):
    # Npix = 12·Nside² (Górski et al. 2005, ApJ 622, 759)
    nside = 2**order
    assert tiles.nside(order) == nside
    assert tiles.n_tiles(order) == 12 * nside**2 == hp.nside2npix(nside) == HEALPix(nside=nside).npix


def test_parent_of_fine_index_is_the_tile_at_every_order(rng):
    ra_r, dec_r = _random_points(rng, 20000)
    ra_s, dec_s = _special_points()
    ra, dec = np.r_[ra_r, ra_s], np.r_[dec_r, dec_s]
    fine = tiles.fine_index(ra, dec)
    _check_against_references(ra, dec, tiles.FINE_ORDER, fine)
    for order in range(0, 13):
        # also for points on edges: ingest files rows by parent(fine), other stages may ask tile_of
        np.testing.assert_array_equal(tiles.parent(fine, order), tiles.tile_of(ra, dec, order), err_msg=f"order {order}")


# --- tiles_near ----------------------------------------------------------------------------------

def _awkward_tiles(order):
    """Tiles touching a pole and tiles touching the points where only three base pixels meet."""
    eps = 1e-7
    ras, decs = [], []
    for lon in (45.0, 135.0, 225.0, 315.0):
        ras += [lon, lon]
        decs += [90.0 - eps, -90.0 + eps]
    for lon in (0.0, 90.0, 180.0, 270.0):
        for lat in (_VERTEX_LAT_DEG, -_VERTEX_LAT_DEG):
            for dlon, dlat in ((eps, 0.0), (-eps, 0.0), (0.0, eps), (0.0, -eps)):
                ras.append((lon + dlon) % 360.0)
                decs.append(lat + dlat)
    return np.unique(tiles.tile_of(np.array(ras), np.array(decs), order))


def _points_in_tile(tile, order, rng, n_inner=400, edge_step=60):
    """Random points inside a tile (centres of random sub-pixels 8 orders finer) and points on its edge."""
    sub = (int(tile) << 16) + rng.integers(0, 1 << 16, n_inner)
    inner = np.stack(hp.pix2vec(2 ** (order + 8), sub, nest=True), axis=1)
    ns = 2**order
    edge = hp.boundaries(ns, int(tile), step=edge_step, nest=True).T
    centre = np.asarray(hp.pix2vec(ns, int(tile), nest=True))
    edge = edge + 1e-9 * (centre - edge)
    edge /= np.linalg.norm(edge, axis=1, keepdims=True)
    pts = np.r_[inner, edge]
    assert np.all(hp.vec2pix(ns, pts[:, 0], pts[:, 1], pts[:, 2], nest=True) == tile)
    return pts


def _move(vec, angle_rad, rng):
    """Move unit vectors by the given angles along random directions on the sphere."""
    r = rng.normal(size=vec.shape)
    t = r - np.sum(r * vec, axis=1, keepdims=True) * vec
    t /= np.linalg.norm(t, axis=1, keepdims=True)
    out = np.cos(angle_rad)[:, None] * vec + np.sin(angle_rad)[:, None] * t
    return out / np.linalg.norm(out, axis=1, keepdims=True)


@pytest.mark.parametrize("order", [0, 1, 3, 5, 8, 12])
def test_tiles_near_holds_every_point_within_the_margin(order, rng):
    n = tiles.n_tiles(order)
    chosen = np.unique(np.r_[rng.integers(0, n, 6), _awkward_tiles(order)])
    max_margin = tiles.max_margin_arcsec(order)
    for margin in (0.0, 1.0, 0.25 * max_margin, max_margin):
        margin_rad = np.radians(margin / 3600.0) * (1.0 - 1e-9)
        for tile in chosen:
            near = tiles.tiles_near(int(tile), order, margin)
            assert np.all(np.diff(near) > 0) and near.dtype == np.int64
            assert tile in near and near.min() >= 0 and near.max() < n
            pts = _points_in_tile(tile, order, rng)
            # half the offsets at the full margin (the hardest case), half anywhere inside it
            k = len(pts)
            angle = np.r_[np.full(k, margin_rad), margin_rad * np.sqrt(rng.uniform(0.0, 1.0, k))]
            moved = _move(np.r_[pts, pts], angle, rng)
            start = np.r_[pts, pts]
            moved_by = np.arctan2(np.linalg.norm(np.cross(start, moved), axis=1), np.sum(start * moved, axis=1))
            assert np.all(moved_by <= margin_rad * (1 + 1e-6) + 1e-15)
            ra, dec = hp.vec2ang(moved, lonlat=True)
            reached = np.unique(tiles.tile_of(np.mod(ra, 360.0), dec, order))
            missing = np.setdiff1d(reached, near)
            assert missing.size == 0, f"order {order} tile {tile} margin {margin:.1f}\": misses tiles {missing}"
            if margin >= 0.25 * max_margin:
                # the brute force really reached across the edges, so the check above had teeth
                assert reached.size > 1


def test_max_margin_is_a_third_of_the_tile_size():
    # tile size = sqrt(4π / Npix) (Górski et al. 2005: equal-area pixels)
    for order in range(0, 13):
        size_arcsec = np.degrees(np.sqrt(4.0 * np.pi / (12 * 4**order))) * 3600.0
        assert tiles.resolution_arcsec(order) == pytest.approx(size_arcsec, rel=1e-12)
        assert tiles.max_margin_arcsec(order) == pytest.approx(size_arcsec / 3.0, rel=1e-12)
