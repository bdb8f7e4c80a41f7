"""The cross-match of one tile: propagate to the infrared epoch, pair within the radius, count blends.

Pure functions over columnar tables (no files): the tile reader supplies the tables, the run job writes the
result. Ownership: an astrometric source belongs to the tile its catalogue position falls in, so every source
is processed in exactly one tile; its counterparts and competitors come from every tile within the margin.
"""

from __future__ import annotations

from dataclasses import dataclass
import numpy as np
import pyarrow as pa
from selector.core import tiles
from selector.core.astrometry import propagate
from selector.core.crossmatch import nearest_within, pairs_within
from selector.core.frames import galactic


_ARCSEC_PER_RAD = 180.0 / np.pi * 3600.0


#: Columns the match adds to each astrometric source in the feature cache.
MATCH_COLUMNS = ("tile", "ra_match_deg", "dec_match_deg", "ir_id", "ir_ra_deg", "ir_dec_deg", "sep_arcsec",
                 "n_ir_within", "ir_blend_count", "gal_l_deg", "gal_b_deg")


def _propagated(table: pa.Table, dt_yr: float):
    """Positions at the infrared epoch; sources without a proper motion stay where they are."""
    ra = table.column("ra_deg").to_numpy()
    dec = table.column("dec_deg").to_numpy()
    pmra = np.nan_to_num(table.column("pmra_mas_yr").to_numpy(zero_copy_only=False), nan=0.0)
    pmdec = np.nan_to_num(table.column("pmdec_mas_yr").to_numpy(zero_copy_only=False), nan=0.0)
    if dt_yr == 0.0:
        return ra, dec
    p = propagate(ra, dec, pmra, pmdec, dt_yr)
    return p.ra_deg, p.dec_deg


@dataclass
class TileMatch:
    """The cross-match of one tile.

    Attributes
    ----------
    features : pyarrow.Table
        One row per owned astrometric source with at least one infrared source within the radius.
    pairs : pyarrow.Table
        Every (astro_id, ir_id, sep_arcsec) pair within the radius for owned sources.
    n_input : int
        Owned astrometric sources.
    infrared : pyarrow.Table or None
        One row per infrared source owned by the tile (its position falls in it): ``ir_id`` and
        ``n_astro_within``, how many astrometric sources (at the infrared epoch) lie within the
        radius — the blend count of every infrared source, matched or not. None unless the tiling
        order was given.
    """

    features: pa.Table
    pairs: pa.Table
    n_input: int
    infrared: pa.Table | None = None


def match_tile(own: pa.Table, neighbours: pa.Table, infrared: pa.Table, tile: int, *, radius_arcsec: float,
               dt_yr: float, order: int | None = None) -> TileMatch:
    """Cross-match the owned sources of a tile against the infrared sources around it.

    Parameters
    ----------
    own : pyarrow.Table
        Astrometric sources owned by the tile (canonical columns).
    neighbours : pyarrow.Table
        Astrometric sources of neighbouring tiles (``_NEIGHBOUR_COLUMNS``), for the blend count.
    infrared : pyarrow.Table
        Infrared sources covering the owned sources' match margin.
    tile : int
        The tile id, written into the features.
    radius_arcsec : float
        Match radius, applied at the infrared epoch.
    dt_yr : float
        Infrared epoch minus astrometric epoch (Julian years).
    order : int, optional
        Tiling order; when given, the blend count of every infrared source owned by the tile is
        returned as well (``TileMatch.infrared``).
    """
    ra_own, dec_own = _propagated(own, dt_yr)
    ra_nb, dec_nb = _propagated(neighbours, dt_yr)
    ra_m, dec_m = np.concatenate([ra_own, ra_nb]), np.concatenate([dec_own, dec_nb])
    ir_ra = infrared.column("ra_deg").to_numpy()
    ir_dec = infrared.column("dec_deg").to_numpy()
    own_pairs = pairs_within(ra_own, dec_own, ir_ra, ir_dec, radius_arcsec, workers=1)
    nearest = nearest_within(own_pairs, own.num_rows)
    matched = np.flatnonzero(nearest.index_b >= 0)
    ir_for = nearest.index_b[matched]
    # blend count: every astrometric source (own or neighbour) within the radius of an infrared
    # source, for the counterparts of owned sources and for the tile's own infrared sources
    ir_own = (tiles.tile_of(ir_ra, ir_dec, order) == tile) if order is not None else np.zeros(len(ir_ra), bool)
    counted = np.union1d(np.unique(ir_for), np.flatnonzero(ir_own))
    blend_pairs = pairs_within(ir_ra[counted], ir_dec[counted], ra_m, dec_m, radius_arcsec, workers=1)
    blend = np.bincount(blend_pairs.index_a, minlength=len(counted))
    blend_for = blend[np.searchsorted(counted, ir_for)]
    ir_table = None
    if order is not None:
        own_ir = np.flatnonzero(ir_own)
        ir_table = pa.table({"ir_id": infrared.column("ir_id").take(pa.array(own_ir, pa.int64())),
                             "n_astro_within": pa.array(blend[np.searchsorted(counted, own_ir)].astype(np.int64))})

    rows = matched
    feats = own.take(pa.array(rows, pa.int64()))
    ir_sel = infrared.take(pa.array(ir_for, pa.int64()))
    l_deg, b_deg = galactic(feats.column("ra_deg").to_numpy(), feats.column("dec_deg").to_numpy())
    add = {
        "tile": pa.array(np.full(len(rows), tile, np.int64)),
        "ra_match_deg": pa.array(ra_m[rows]),
        "dec_match_deg": pa.array(dec_m[rows]),
        "ir_id": ir_sel.column("ir_id"),
        "ir_ra_deg": ir_sel.column("ra_deg"),
        "ir_dec_deg": ir_sel.column("dec_deg"),
        "sep_arcsec": pa.array(nearest.separation_arcsec[matched]),
        "n_ir_within": pa.array(nearest.n_within[matched].astype(np.int64)),
        "ir_blend_count": pa.array(blend_for.astype(np.int64)),
        "gal_l_deg": pa.array(l_deg),
        "gal_b_deg": pa.array(b_deg),
    }
    for name in ir_sel.column_names:
        if name not in ("ir_id", "ra_deg", "dec_deg"):
            add[name] = ir_sel.column(name)
    for name, col in add.items():
        feats = feats.append_column(name, col)
    pairs = pa.table({
        "astro_id": own.column("astro_id").take(pa.array(own_pairs.index_a, pa.int64())),
        "ir_id": infrared.column("ir_id").take(pa.array(own_pairs.index_b, pa.int64())),
        "sep_arcsec": pa.array(own_pairs.separation_arcsec),
    })
    return TileMatch(feats, pairs, own.num_rows, ir_table)
