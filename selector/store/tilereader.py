"""Read a tile's own astrometric sources and everything within the margins around it.
"""

from __future__ import annotations

from functools import lru_cache
import numpy as np
import pyarrow as pa

_ARCSEC_PER_RAD = 180.0 / np.pi * 3600.0
from selector.core import schema, tiles
from selector.settings.config import Config
from selector.core.frames import radec_to_xyz
from selector.store.io import read_parquet
from selector.store.layout import layout_of


def _disc_filter(table: pa.Table, tile: int, order: int, margin_arcsec: float) -> pa.Table:
    """Keep rows within the tile's circumscribed disc grown by the margin.

    A cheap necessary condition for lying within the margin of the tile: it drops most of each
    neighbour tile with one dot product per row before any tree is built.
    """
    if table.num_rows == 0:
        return table
    centre, reach = tiles.circumscribed_disc(tile, order)
    cos_limit = np.cos(min(np.pi, reach + margin_arcsec / _ARCSEC_PER_RAD))
    xyz = radec_to_xyz(table.column("ra_deg").to_numpy(), table.column("dec_deg").to_numpy(), workers=1)
    return table.filter(pa.array(xyz @ centre >= cos_limit))


def load_tile(cfg: Config, tile: int, on_input=None):
    """Read a tile's own astrometric sources and everything within the margins around it.

    Parameters
    ----------
    on_input : callable, optional
        Called as ``on_input(catalogue, tile_id, path, part)`` for every tile file consulted, with
        the rows taken from it (``None`` when the file does not exist); the batch runner uses it
        to record exactly what a tile's result depends on.

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
    own_path = lay.tile_file("astrometric", order, tile)
    own = read_parquet(own_path)
    report = on_input or (lambda *args: None)
    report("astrometric", tile, own_path, own)
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
        part = _disc_filter(read_parquet(path), tile, order, ir_margin) if path.exists() else None
        report("infrared", int(t), path, part)
        if part is not None:
            ir_parts.append(part)
    neighbour_parts = []
    for t in tiles.tiles_near(tile, order, astro_margin):
        path = lay.tile_file("astrometric", order, int(t))
        if t != tile and path.exists():
            # neighbours only compete for counterparts: their positions and motions are all we need
            neighbour_parts.append(_disc_filter(read_parquet(path, columns=_NEIGHBOUR_COLUMNS), tile, order,
                                                astro_margin))
            report("astrometric", int(t), path, neighbour_parts[-1])
        elif t != tile:
            report("astrometric", int(t), path, None)
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
