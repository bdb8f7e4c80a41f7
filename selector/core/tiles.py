"""HEALPix tiling (Górski et al. 2005, ApJ 622, 759), nested scheme: tile ids, neighbours, margins.

A tile is one HEALPix pixel at the configured order (Nside = 2**order, 12·Nside² equal-area tiles).
Within a tile, rows are kept in the order of a much finer nested pixel index, which keeps neighbours
on the sky close in the file and makes the order deterministic.

Tile ids are computed here with numpy (:func:`tile_of`); the geometry (pixel centres and corners, the
cone search) comes from astropy-healpix. Neither imports a plotting library, so the jobs that only
file and match rows start without one.
"""

from __future__ import annotations

from functools import lru_cache

import astropy.units as u
import numpy as np
from astropy_healpix.core import healpix_cone_search, healpix_to_xyz


#: Order of the fine index used to sort rows within a tile (the finest 64-bit nested order).
FINE_ORDER = 29

_ARCSEC_PER_RAD = 180.0 / np.pi * 3600.0

# Tile ids must not change between versions: every ingested tile file and every run record is keyed
# by them. Points on a pixel edge or corner belong to either side, and the HEALPix libraries settle
# such ties differently (and round differently within an ulp of an edge), so "the same pixel" is
# only well defined against one reference. Ours is the library the project used before (healpy); the
# arithmetic below follows its order of floating-point operations step by step, so the two agree bit
# for bit, on edges too (tests/external/test_healpix.py checks it on millions of points).
#: 2/π rounded once from its decimal expansion (not 2.0 / np.pi, which rounds twice).
_INV_HALF_PI = float("0.6366197723675813430755350534900574")
_TWO_THIRDS = 2.0 / 3.0
#: Colatitudes (rad) closer than this to a pole take the cap's distance from sin θ, which keeps its
#: precision where 1 − |z| cancels.
_POLE_COLATITUDE_RAD = 0.01
_POLE_COLATITUDE_FAR_RAD = 3.14159 - 0.01
#: Rows per block: the temporaries of a block stay in the processor's cache, which triples the speed
#: on large arrays compared with whole-array temporaries.
_BLOCK_ROWS = 1 << 14


def _bit_spread_table() -> np.ndarray:
    v = np.arange(1 << 16, dtype=np.int64)
    out = np.zeros(1 << 16, np.int64)
    for bit in range(16):
        out |= ((v >> bit) & 1) << (2 * bit)
    return out


#: The bits of every 16-bit number moved to the even positions of 32 bits (nested = interleaved x, y).
_SPREAD = _bit_spread_table()


def nside(order: int) -> int:
    """Nside of a HEALPix order."""
    return 1 << int(order)


def n_tiles(order: int) -> int:
    """Number of tiles at an order: 12·Nside² (Górski et al. 2005)."""
    return 12 * nside(order) ** 2


def _interleave(ix: np.ndarray, iy: np.ndarray) -> np.ndarray:
    """Nested index within a base pixel: bits of ``ix`` at even, bits of ``iy`` at odd positions."""
    out = _SPREAD[ix & 0xFFFF] | (_SPREAD[ix >> 16] << 32)
    out |= (_SPREAD[iy & 0xFFFF] | (_SPREAD[iy >> 16] << 32)) << 1
    return out


def _polar_cells(tt, z, colatitude_rad, order: int):
    """Cell (x, y) and base pixel of points in the polar caps, |z| > 2/3 (Górski et al. 2005, eq. 4)."""
    ns = nside(order)
    za = np.abs(z)
    base = np.minimum(tt.astype(np.int64), 3)
    tp = tt - base
    scale = ns * np.sqrt(3.0 * (1.0 - za))
    close = (za >= 0.99) & ((colatitude_rad < _POLE_COLATITUDE_RAD) | (colatitude_rad > _POLE_COLATITUDE_FAR_RAD))
    if close.any():
        scale[close] = ns * np.sin(colatitude_rad[close]) / np.sqrt((1.0 + za[close]) / 3.0)
    # edge lines counted from the cap's corner, kept inside the pixel for points on its outer edge
    jp = np.minimum((tp * scale).astype(np.int64), ns - 1)
    jm = np.minimum(((1.0 - tp) * scale).astype(np.int64), ns - 1)
    north = z > 0
    return (np.where(north, ns - 1 - jm, jp), np.where(north, ns - 1 - jp, jm), np.where(north, base, base + 8))


def _nested_block(ra_deg: np.ndarray, dec_deg: np.ndarray, order: int) -> np.ndarray:
    ns = nside(order)
    colatitude_rad = np.radians(dec_deg)
    np.subtract(np.pi / 2.0, colatitude_rad, out=colatitude_rad)
    z = np.cos(colatitude_rad)
    # longitude in units of 90°, folded into [0, 4); the fold is rare (RA outside [0, 360)) and slow
    tt = np.radians(ra_deg)
    tt *= _INV_HALF_PI
    outside = ~((tt >= 0.0) & (tt < 4.0))
    if outside.any():
        folded = np.fmod(tt[outside], 4.0)
        folded[folded < 0.0] += 4.0
        folded[folded == 4.0] = 0.0
        tt[outside] = folded
    # equatorial belt, |z| <= 2/3: indices of the ascending and descending edge lines
    across = tt + 0.5
    across *= ns
    up = z * 0.75
    up *= ns
    jp = (across - up).astype(np.int64)
    jm = (across + up).astype(np.int64)
    fp, fm = jp >> order, jm >> order
    base = np.where(fp == fm, fp | 4, np.where(fp < fm, fp, fm + 8))
    ix = jm & (ns - 1)
    iy = (ns - 1) - (jp & (ns - 1))
    polar = np.abs(z) > _TWO_THIRDS
    if polar.any():
        px, py, pbase = _polar_cells(tt, z, colatitude_rad, order)
        np.copyto(ix, px, where=polar)
        np.copyto(iy, py, where=polar)
        np.copyto(base, pbase, where=polar)
    base <<= 2 * order
    base |= _interleave(ix, iy)
    return base


def tile_of(ra_deg, dec_deg, order: int) -> np.ndarray:
    """Nested HEALPix pixel of each position at the given order (int64).

    Parameters
    ----------
    ra_deg, dec_deg : array_like
        Positions in degrees (any RA; it is folded into [0, 360)).
    order : int
        HEALPix order, 0 to :data:`FINE_ORDER`.

    Returns
    -------
    numpy.ndarray
        Pixel ids, shaped like the broadcast input; the reference library's ids bit for bit.
    """
    ra, dec = np.broadcast_arrays(np.asarray(ra_deg, float), np.asarray(dec_deg, float))
    flat_ra, flat_dec = ra.ravel(), dec.ravel()
    out = np.empty(flat_ra.shape, np.int64)
    for start in range(0, len(out), _BLOCK_ROWS):
        stop = start + _BLOCK_ROWS
        out[start:stop] = _nested_block(flat_ra[start:stop], flat_dec[start:stop], int(order))
    return out.reshape(ra.shape)


def fine_index(ra_deg, dec_deg) -> np.ndarray:
    """Nested pixel at :data:`FINE_ORDER`; its leading bits are the tile id at every coarser order."""
    return tile_of(ra_deg, dec_deg, FINE_ORDER)


def parent(fine, order: int) -> np.ndarray:
    """Tile at ``order`` of fine indices, by dropping two bits per order (nested scheme)."""
    return np.asarray(fine, np.int64) >> (2 * (FINE_ORDER - order))


def resolution_arcsec(order: int) -> float:
    """Square root of a tile's area, in arcsec."""
    return float(np.sqrt(4.0 * np.pi / n_tiles(order)) * _ARCSEC_PER_RAD)


def max_margin_arcsec(order: int) -> float:
    """Largest margin we allow at an order.

    Tiles are loaded with their neighbours out to the margin; keeping the margin to a third of the
    tile size keeps that a ring of neighbours (plus a few) rather than a large patch of sky, so
    per-tile memory stays bounded.
    """
    return resolution_arcsec(order) / 3.0


def max_pixel_radius_rad(order: int) -> float:
    """An upper bound on any tile's largest centre-to-boundary distance at an order (rad).

    The largest such distance, over all pixels, grows with the order towards 1.0446 times the square
    root of a pixel's area (the pixels where the polar caps meet the equatorial belt are the most
    stretched); 1.05 times that root bounds it at every order, which the tests check against the
    reference library's exact value for orders 0 to 29.
    """
    return 1.05 * resolution_arcsec(order) / _ARCSEC_PER_RAD


def _discs(pixels: np.ndarray, order: int) -> tuple[np.ndarray, np.ndarray]:
    """Centre unit vectors (n, 3) of tiles and their largest centre-to-corner distances (rad)."""
    ns = nside(order)
    centres = np.stack(healpix_to_xyz(pixels, ns, order="nested"), axis=1)
    reach = np.zeros(len(pixels))
    # corners are the pixel's own coordinates (0 or 1 along each edge line)
    for dx, dy in ((1.0, 1.0), (0.0, 1.0), (0.0, 0.0), (1.0, 0.0)):
        corner = np.stack(healpix_to_xyz(pixels, ns, dx=np.full(len(pixels), dx), dy=np.full(len(pixels), dy),
                                         order="nested"), axis=1)
        reach = np.maximum(reach, _angle_rad(corner, centres))
    return centres, reach


def _angle_rad(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    # from sine and cosine together: arccos of a dot product near 1 turns a last-bit difference in the
    # vectors into 1e-8 of a fine tile's radius
    return np.arctan2(np.linalg.norm(np.cross(a, b), axis=-1), np.sum(a * b, axis=-1))


@lru_cache(maxsize=1 << 14)
def circumscribed_disc(tile: int, order: int) -> tuple[np.ndarray, float]:
    """Centre unit vector of a tile and its largest centre-to-corner distance (rad).

    Remembered per tile: every tile's job asks for its own disc and its neighbours', and the geometry
    costs about as much as filtering a small tile's margin. The vector returned is shared; do not
    change it.
    """
    centres, reach = _discs(np.array([int(tile)], np.int64), order)
    centre = centres[0]
    centre.flags.writeable = False
    return centre, float(reach[0])


def tiles_near(tile: int, order: int, margin_arcsec: float) -> np.ndarray:
    """Every tile that holds points within ``margin_arcsec`` of ``tile`` (including itself), sorted.

    A disc around the tile centre with the tile's largest centre-to-corner distance plus the margin
    contains the whole dilated tile. The cone search returns the pixels it finds overlapping a disc,
    but it judges overlap from a few points of each pixel, so a pixel that only grazes the disc can be
    left out, and a lost tile would silently lose the pairs across that edge. The search therefore
    runs on the disc grown by the largest centre-to-boundary distance of any pixel
    (:func:`max_pixel_radius_rad`): every pixel touching the original disc has its centre inside the
    grown one. Of what the search returns (every pixel overlapping the grown disc, a wider ring),
    only the tiles whose centre lies in the grown disc are kept, which is the same test the reference
    library's inclusive search makes. The set is complete at any margin (it holds every tile that
    search gives, and a few per cent more); an extra tile costs only reading, its rows are filtered
    by distance.
    """
    centre, reach = circumscribed_disc(tile, order)
    radius_rad = reach + margin_arcsec / _ARCSEC_PER_RAD
    lon_rad = np.arctan2(centre[1], centre[0])
    lat_rad = np.arcsin(np.clip(centre[2], -1.0, 1.0))
    grown_rad = radius_rad + max_pixel_radius_rad(order)
    found = np.asarray(healpix_cone_search(lon_rad * u.rad, lat_rad * u.rad, grown_rad * u.rad, nside(order),
                                           order="nested"), np.int64)
    centres = np.stack(healpix_to_xyz(found, nside(order), order="nested"), axis=-1).reshape(-1, 3)
    near = found[_angle_rad(centres, centre[None, :]) <= grown_rad]
    return np.unique(np.append(near, tile)).astype(np.int64)


# transitional: file names belong to store.layout (Layout.tile_file, Layout.list_tiles); these two stay
# only until the tune and demo modules use the layout, then they are removed from core
