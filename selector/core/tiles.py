"""HEALPix tiling (Górski et al. 2005, ApJ 622, 759), nested scheme: tile ids, neighbours, margins.

A tile is one HEALPix pixel at the configured order (Nside = 2**order, 12·Nside² equal-area tiles).
Within a tile, rows are kept in the order of a much finer nested pixel index, which keeps neighbours
on the sky close in the file and makes the order deterministic.
"""

from __future__ import annotations


import healpy as hp
import numpy as np

#: Order of the fine index used to sort rows within a tile (the finest 64-bit nested order).
FINE_ORDER = 29

_ARCSEC_PER_RAD = 180.0 / np.pi * 3600.0


def nside(order: int) -> int:
    """Nside of a HEALPix order."""
    return 1 << int(order)


def n_tiles(order: int) -> int:
    """Number of tiles at an order: 12·Nside² (Górski et al. 2005)."""
    return 12 * nside(order) ** 2


def tile_of(ra_deg, dec_deg, order: int) -> np.ndarray:
    """Nested HEALPix pixel of each position at the given order (int64)."""
    return hp.ang2pix(nside(order), np.asarray(ra_deg, float), np.asarray(dec_deg, float),
                      nest=True, lonlat=True).astype(np.int64)


def fine_index(ra_deg, dec_deg) -> np.ndarray:
    """Nested pixel at :data:`FINE_ORDER`; its leading bits are the tile id at every coarser order."""
    return tile_of(ra_deg, dec_deg, FINE_ORDER)


def parent(fine, order: int) -> np.ndarray:
    """Tile at ``order`` of fine indices, by dropping two bits per order (nested scheme)."""
    return np.asarray(fine, np.int64) >> (2 * (FINE_ORDER - order))


def resolution_arcsec(order: int) -> float:
    """Square root of a tile's area, in arcsec."""
    return float(hp.nside2resol(nside(order)) * _ARCSEC_PER_RAD)


def max_margin_arcsec(order: int) -> float:
    """Largest margin we allow at an order.

    Tiles are loaded with their neighbours out to the margin; keeping the margin to a third of the
    tile size keeps that a ring of neighbours (plus a few) rather than a large patch of sky, so
    per-tile memory stays bounded.
    """
    return resolution_arcsec(order) / 3.0


def circumscribed_disc(tile: int, order: int) -> tuple[np.ndarray, float]:
    """Centre unit vector of a tile and its largest centre-to-corner distance (rad)."""
    ns = nside(order)
    centre = np.asarray(hp.pix2vec(ns, int(tile), nest=True))
    corners = hp.boundaries(ns, int(tile), step=1, nest=True).T
    return centre, float(np.max(np.arccos(np.clip(corners @ centre, -1.0, 1.0))))


def tiles_near(tile: int, order: int, margin_arcsec: float) -> np.ndarray:
    """Every tile that holds points within ``margin_arcsec`` of ``tile`` (including itself), sorted.

    A disc around the tile centre with the tile's largest centre-to-corner distance plus the margin
    contains the whole dilated tile, and ``inclusive=True`` returns every pixel that overlaps the disc,
    so the set is complete at any margin; it may hold a few extra tiles, which cost only reading.
    """
    vec, reach = circumscribed_disc(tile, order)
    radius = reach + margin_arcsec / _ARCSEC_PER_RAD
    near = hp.query_disc(nside(order), vec, radius, inclusive=True, nest=True)
    return np.unique(np.append(near, tile)).astype(np.int64)


# transitional: file names belong to store.layout (Layout.tile_file, Layout.list_tiles); these two stay
# only until the tune and demo modules use the layout, then they are removed from core
