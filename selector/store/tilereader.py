"""Read a tile's own astrometric sources and everything within the margins around it.

Files are read through a :class:`~selector.store.tilecache.TileCache`, which decodes each file once
and keeps its rows' unit vectors: the margin filter below is then one dot product per cached row.
"""

from __future__ import annotations

import os
import time
from functools import lru_cache
from typing import NamedTuple

import numpy as np
import pyarrow as pa

from selector.core import schema, tiles
from selector.core.tilematch import ASTROMETRIC_ERROR_COLUMNS, DENSITY_COLUMN, LoadedArea, tile_density_per_sr
from selector.errors import InputError
from selector.settings.config import Config
from selector.store.layout import layout_of, tile_rel_path
from selector.store.tilecache import DecodedTile, TileCache

_ARCSEC_PER_RAD = 180.0 / np.pi * 3600.0


def _disc_filter(decoded: DecodedTile, tile: int, order: int, margin_arcsec: float,
                 columns: list[str] | None = None) -> tuple[pa.Table, str | None]:
    """Keep rows within the tile's circumscribed disc grown by the margin (``columns`` only, if given).

    A cheap necessary condition for lying within the margin of the tile: it drops most of each
    neighbour tile with one dot product per row (on the cached unit vectors) before any tree is built.
    """
    if columns is not None:
        present = set(decoded.table.column_names)  # the property builds a new list at each call
        missing = [c for c in columns if c not in present]
        if missing:
            raise InputError(f"{decoded.path}: column '{missing[0]}' is missing; this is not a tile of this "
                             "configuration, run `selector ingest --config ...` again")
    table = decoded.table if columns is None else decoded.table.select(columns)
    if table.num_rows == 0:
        return table, None
    centre, reach = tiles.circumscribed_disc(int(tile), int(order))
    cos_limit = np.cos(min(np.pi, reach + margin_arcsec / _ARCSEC_PER_RAD))
    rows = np.flatnonzero(decoded.xyz @ centre >= cos_limit)
    if rows.size == 0:
        return table.slice(0, 0), None
    return table.take(pa.array(rows)), decoded.part_digest(rows, columns)


class LoadedTile(NamedTuple):
    """A tile's own astrometric sources and everything within the margins around it.

    Attributes
    ----------
    own : pyarrow.Table
        Astrometric sources owned by the tile (every column).
    neighbours : pyarrow.Table
        Astrometric sources of other tiles within the astrometric margin (positions, motions and the
        columns of their positional errors): the competitors.
    infrared : pyarrow.Table
        Infrared sources within the infrared margin, each with the density of its own tile
        (:data:`~selector.core.tilematch.DENSITY_COLUMN`).
    area : LoadedArea
        The caps the rows were loaded from.
    read_s : float
        Wall time spent reading and cutting the margins (every reading, when the margins grew).
    """

    own: pa.Table
    neighbours: pa.Table
    infrared: pa.Table
    area: LoadedArea
    read_s: float = 0.0


def default_ir_margin_arcsec(cfg: Config, own: pa.Table) -> float:
    """Infrared margin that holds every candidate of the owned sources: radius + largest own epoch shift.

    Exact whatever the proper motions: an owned source moves by at most its own motion times the epoch
    difference, and its candidates lie within the radius of where it arrives. The probabilistic match
    loads two radii more, so that a rival of a counterpart (and the rival's own candidates) is usually
    inside too and the margin rarely has to grow.
    """
    pm_own = _pm_total(own)
    radii = 3.0 if cfg.match.method == "probabilistic" else 1.0
    return (radii * cfg.match.radius_arcsec
            + max(np.nanmax(pm_own, initial=0.0), 0.0) * abs(cfg.epoch_difference_yr) / 1000.0)


_DENSITIES: dict[tuple[str, str, int], float] = {}


def _tile_density(decoded: DecodedTile, order: int) -> float:
    """The density of a decoded infrared tile, remembered by its digest (every neighbour asks for it)."""
    key = (str(decoded.path), decoded.sha256, int(order))
    if key not in _DENSITIES:
        if len(_DENSITIES) >= 4096:
            _DENSITIES.clear()
        table = decoded.table
        _DENSITIES[key] = tile_density_per_sr(table.column("ra_deg").to_numpy(), table.column("dec_deg").to_numpy(),
                                              order)
    return _DENSITIES[key]


def load_tile(cfg: Config, tile: int, on_input=None, *, cache: TileCache | None = None,
              ir_margin_arcsec: float | None = None) -> LoadedTile:
    """Read a tile's own astrometric sources and everything within the margins around it.

    Parameters
    ----------
    on_input : callable, optional
        Called as ``on_input(catalogue, tile_id, path, part, decoded, digest=...)`` for every tile file
        consulted, with the rows taken from it (``None`` when the file does not exist), the
        :class:`~selector.store.tilecache.DecodedTile` read (its SHA-256, size and time) and the
        digest of the rows and columns used (None when no row is); the batch runner uses it to
        record exactly what a tile's result depends on.
    cache : TileCache, optional
        Where decoded files are kept between tiles (one per worker); a fresh one by default, so
        each file is still read once for this tile.
    ir_margin_arcsec : float, optional
        Infrared margin; default :func:`default_ir_margin_arcsec`. The match asks for a larger one when
        a chain of competing pairs reaches the edge. The astrometric margin is always the infrared margin
        plus the radius plus the largest allowed proper motion times the epoch difference, so every
        astrometric source that can reach a loaded infrared source is loaded too.

    Returns
    -------
    LoadedTile
    """
    started = time.perf_counter()
    order = cfg.tiling.order
    lay = layout_of(cfg)
    cache = cache if cache is not None else TileCache()
    # the generation in force is read once, and paths are built as text: a tile asks for about twenty
    tile_file = _tile_files(lay.pinned(), order)
    own_path = tile_file("astrometric", tile)
    own_file = cache.get(own_path)
    if not own_file.exists:
        raise InputError(f"{own_path}: cannot read (no such file); run `selector ingest --config ...` again")
    own = own_file.table
    report = on_input or (lambda *args, **kwargs: None)
    report("astrometric", tile, own_path, own, own_file, digest=own_file.part_digest() if own.num_rows else None)
    dt = abs(cfg.epoch_difference_yr)
    r = cfg.match.radius_arcsec
    ir_margin = default_ir_margin_arcsec(cfg, own) if ir_margin_arcsec is None else float(ir_margin_arcsec)
    astro_margin = ir_margin + r + cfg.match.max_proper_motion_mas_yr * dt / 1000.0
    centre, reach = tiles.circumscribed_disc(int(tile), int(order))
    ir_parts = []
    for t in tiles.tiles_near(tile, order, ir_margin):
        path = tile_file("infrared", int(t))
        decoded = cache.get(path)
        part = digest = None
        if decoded.exists:
            # the prior of every pair follows the density of its infrared source's own tile, counted from
            # that tile's rows alone, so every tile that loads the source gives it the same prior; it is
            # reported with the rows, so the record of what the tile used changes when the density does
            density = _tile_density(decoded, order)
            part, digest = _disc_filter(decoded, tile, order, ir_margin)
            part = part.append_column(DENSITY_COLUMN, pa.array(np.full(part.num_rows, density)))
        report("infrared", int(t), path, part, decoded, digest=digest)
        if part is not None:
            ir_parts.append(part)
    neighbour_columns = _neighbour_columns(cfg)
    neighbour_parts = []
    for t in tiles.tiles_near(tile, order, astro_margin):
        if t == tile:
            continue
        path = tile_file("astrometric", int(t))
        decoded = cache.get(path)
        if decoded.exists:
            # neighbours only compete for counterparts: positions, motions and their errors are all we need
            part, digest = _disc_filter(decoded, tile, order, astro_margin, neighbour_columns)
            neighbour_parts.append(part)
            report("astrometric", int(t), path, part, decoded, digest=digest)
        else:
            report("astrometric", int(t), path, None, decoded, digest=None)
    infrared = _concat(ir_parts) if ir_parts else _empty_infrared(cfg)
    neighbours = _concat(neighbour_parts) if neighbour_parts else own.select(neighbour_columns).slice(0, 0)
    return LoadedTile(own, neighbours, infrared, LoadedArea(centre, reach, ir_margin, astro_margin),
                      time.perf_counter() - started)


def _tile_files(lay, order: int):
    """``path(catalogue, tile)`` of a pinned layout's tile files, as text."""
    root = os.fspath(lay.tiles_dir)

    def path(kind: str, tile: int) -> str:
        return f"{root}/{tile_rel_path(kind, order, tile)}"

    return path


def _neighbour_columns(cfg: Config) -> list[str]:
    mapped = {schema.role("astrometric", name).canonical for name in cfg.astrometric.columns}
    return _NEIGHBOUR_COLUMNS + [c for c in ASTROMETRIC_ERROR_COLUMNS if c in mapped and c not in _NEIGHBOUR_COLUMNS]


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
    fields.append((DENSITY_COLUMN, pa.float64()))
    return pa.schema(fields)


def _empty_infrared(cfg):
    bands = tuple(m.band for m in cfg.infrared.magnitudes)
    errs = tuple(bool(m.error_column) for m in cfg.infrared.magnitudes)
    return _empty_infrared_schema(bands, errs).empty_table()


def _pm_total(table: pa.Table) -> np.ndarray:
    pmra = table.column("pmra_mas_yr").to_numpy(zero_copy_only=False)
    pmdec = table.column("pmdec_mas_yr").to_numpy(zero_copy_only=False)
    return np.hypot(pmra, pmdec)
