"""Read a tile's own astrometric sources and everything within the margins around it.

Files are read through a :class:`~selector.store.tilecache.TileCache`, which decodes each file once
and keeps its rows' unit vectors: the margin filter below is then one dot product per cached row.
"""

from __future__ import annotations

from functools import lru_cache
import numpy as np
import pyarrow as pa

from selector.core import schema, tiles
from selector.errors import InputError
from selector.settings.config import Config
from selector.store.layout import layout_of
from selector.store.tilecache import DecodedTile, TileCache

_ARCSEC_PER_RAD = 180.0 / np.pi * 3600.0


@lru_cache(maxsize=4096)
def _disc(tile: int, order: int) -> tuple[np.ndarray, float]:
    # the same tile's disc is asked for by each of its neighbours' margin filters
    return tiles.circumscribed_disc(tile, order)


def _disc_filter(decoded: DecodedTile, tile: int, order: int, margin_arcsec: float,
                 columns: list[str] | None = None) -> pa.Table:
    """Keep rows within the tile's circumscribed disc grown by the margin (``columns`` only, if given).

    A cheap necessary condition for lying within the margin of the tile: it drops most of each
    neighbour tile with one dot product per row (on the cached unit vectors) before any tree is built.
    """
    if columns is not None:
        missing = [c for c in columns if c not in decoded.table.column_names]
        if missing:
            raise InputError(f"{decoded.path}: column '{missing[0]}' is missing; this is not a tile of this "
                             "configuration, run `selector ingest --config ...` again")
    table = decoded.table if columns is None else decoded.table.select(columns)
    if table.num_rows == 0:
        return table
    centre, reach = _disc(int(tile), int(order))
    cos_limit = np.cos(min(np.pi, reach + margin_arcsec / _ARCSEC_PER_RAD))
    return table.filter(pa.array(decoded.xyz @ centre >= cos_limit))


def load_tile(cfg: Config, tile: int, on_input=None, *, cache: TileCache | None = None):
    """Read a tile's own astrometric sources and everything within the margins around it.

    Parameters
    ----------
    on_input : callable, optional
        Called as ``on_input(catalogue, tile_id, path, part, decoded)`` for every tile file
        consulted, with the rows taken from it (``None`` when the file does not exist) and the
        :class:`~selector.store.tilecache.DecodedTile` read (its SHA-256, size and time); the batch
        runner uses it to record exactly what a tile's result depends on.
    cache : TileCache, optional
        Where decoded files are kept between tiles (one per worker); a fresh one by default, so
        each file is still read once for this tile.

    Returns
    -------
    own : pyarrow.Table
        Astrometric sources owned by ``tile`` (every column).
    neighbours : pyarrow.Table
        Astrometric sources of other tiles within the blend margin (positions and motions only).
    infrared : pyarrow.Table
        Infrared sources within the match margin.
    """
    order = cfg.tiling.order
    lay = layout_of(cfg)
    cache = cache if cache is not None else TileCache()
    own_path = lay.tile_file("astrometric", order, tile)
    own_file = cache.get(own_path)
    if not own_file.exists:
        raise InputError(f"{own_path}: cannot read (no such file); run `selector ingest --config ...` again")
    own = own_file.table
    report = on_input or (lambda *args: None)
    report("astrometric", tile, own_path, own, own_file)
    dt = abs(cfg.epoch_difference_yr)
    r = cfg.match.radius_arcsec
    pm_own = _pm_total(own)
    # counterparts of owned sources lie within r + (own largest shift) of the tile: exact, whatever
    # the proper motions; competitors are allowed the configured cap on top of that
    ir_margin = r + max(np.nanmax(pm_own, initial=0.0), 0.0) * dt / 1000.0
    astro_margin = ir_margin + r + cfg.match.max_proper_motion_mas_yr * dt / 1000.0
    ir_parts = []
    for t in tiles.tiles_near(tile, order, ir_margin):
        path = lay.tile_file("infrared", order, int(t))
        decoded = cache.get(path)
        part = _disc_filter(decoded, tile, order, ir_margin) if decoded.exists else None
        report("infrared", int(t), path, part, decoded)
        if part is not None:
            ir_parts.append(part)
    neighbour_parts = []
    for t in tiles.tiles_near(tile, order, astro_margin):
        if t == tile:
            continue
        path = lay.tile_file("astrometric", order, int(t))
        decoded = cache.get(path)
        if decoded.exists:
            # neighbours only compete for counterparts: their positions and motions are all we need
            neighbour_parts.append(_disc_filter(decoded, tile, order, astro_margin, _NEIGHBOUR_COLUMNS))
            report("astrometric", int(t), path, neighbour_parts[-1], decoded)
        else:
            report("astrometric", int(t), path, None, decoded)
    infrared = _concat(ir_parts) if ir_parts else _empty_infrared(cfg)
    neighbours = _concat(neighbour_parts) if neighbour_parts else own.select(_NEIGHBOUR_COLUMNS).slice(0, 0)
    return own, neighbours, infrared


_NEIGHBOUR_COLUMNS = ["astro_id", "ra_deg", "dec_deg", "pmra_mas_yr", "pmdec_mas_yr"]


def _concat(parts):
    return pa.concat_tables(parts, promote_options="permissive")


@lru_cache(maxsize=4)
def _empty_infrared_schema(bands: tuple[str, ...], has_err: tuple[bool, ...]):
    fields = [("ir_id", pa.string()), ("ra_deg", pa.float64()), ("dec_deg", pa.float64())]
    for b, e in zip(bands, has_err):
        fields.append((schema.infrared_mag_column(b), pa.float64()))
        if e:
            fields.append((schema.infrared_error_column(b), pa.float64()))
    return pa.schema(fields)


def _empty_infrared(cfg):
    bands = tuple(m.band for m in cfg.infrared.magnitudes)
    errs = tuple(bool(m.error_column) for m in cfg.infrared.magnitudes)
    return _empty_infrared_schema(bands, errs).empty_table()


def _pm_total(table: pa.Table) -> np.ndarray:
    pmra = table.column("pmra_mas_yr").to_numpy(zero_copy_only=False)
    pmdec = table.column("pmdec_mas_yr").to_numpy(zero_copy_only=False)
    return np.hypot(pmra, pmdec)
