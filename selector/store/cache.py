"""The feature-cache reader: the usable rows of a run's per-tile feature caches, read at once.

Every job that reads the cache of a finished run (tuning, the report, training) goes through
:func:`load_cache`: it reads the asked columns of every tile's ``features.parquet`` (or of the tiles
asked for) in parallel, removes the tile rejects exactly as the run does, and keeps each tile's row
bookkeeping, so per-tile figures can be rebuilt from whole-cache arrays. Paths come from
:mod:`selector.store.layout`; what to read is the caller's business.
"""

from __future__ import annotations

import json
import os
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from selector.core.selection import TILE_REJECT_COLUMNS, tile_rejects
from selector.errors import InputError, SelectorError
from selector.store.io import read_parquet
from selector.store.layout import Layout, layout_of

__all__ = ["FeatureCache", "READ_COLUMNS", "find_rows", "load_cache", "run_tiles", "tile_features"]

#: Columns every load reads whatever the caller asks: those the tile-reject test needs, so the rows
#: a run leaves out of its cut-flow are left out here too.
READ_COLUMNS = TILE_REJECT_COLUMNS


@dataclass
class FeatureCache:
    """The usable rows of a run's feature cache, with their tile bookkeeping.

    Attributes
    ----------
    table : pyarrow.Table
        Usable rows (tile rejects removed) of every tile read, in tile order then file order,
        holding only the loaded columns.
    tiles : numpy.ndarray
        Tile ids read, ascending.
    offsets : numpy.ndarray
        ``table`` rows ``offsets[i]:offsets[i + 1]`` belong to ``tiles[i]`` (each tile's rows are
        contiguous).
    rows_per_tile, rejects_per_tile : numpy.ndarray
        Owned astrometric rows of each tile (as recorded by the run) and its tile rejects.
    layout : Layout
        The paths of the output folder the run belongs to.
    columns : tuple of str or None
        The columns loaded (None: all).
    seconds : float
        Wall time of the load (not part of any result file).
    """

    table: pa.Table
    tiles: np.ndarray
    offsets: np.ndarray
    rows_per_tile: np.ndarray
    rejects_per_tile: np.ndarray
    layout: Layout
    columns: tuple | None = None
    seconds: float = 0.0

    @property
    def n_rows(self) -> int:
        return self.table.num_rows

    @property
    def run_dir(self) -> Path:
        """The run folder."""
        return self.layout.run_dir

    @property
    def folders(self) -> list[Path]:
        """Each tile's output folder, in :attr:`tiles` order."""
        return [self.layout.tile_output_dir(int(t)) for t in self.tiles]

    def tile_slice(self, i: int) -> slice:
        """Rows of ``table`` that belong to ``tiles[i]``."""
        return slice(int(self.offsets[i]), int(self.offsets[i + 1]))

    def tile_index(self, lo: int = 0, hi: int | None = None) -> np.ndarray:
        """Position in ``tiles`` of each of the rows ``lo:hi`` of ``table``."""
        hi = self.n_rows if hi is None else hi
        return np.searchsorted(self.offsets, np.arange(lo, hi), side="right") - 1


def run_tiles(cfg) -> np.ndarray:
    """Tile ids of ``cfg``'s run, ascending: the ingested astrometric tiles.

    The run folder may have been moved without the ingested tiles: its own tile folders are then
    the record of what was processed.
    """
    layout = layout_of(cfg)
    ids = layout.list_tiles("astrometric", cfg.tiling.order) or layout.run_tiles()
    return np.asarray(ids, np.int64)


def _open(path: Path) -> pq.ParquetFile:
    try:
        # without pre-buffering an open file keeps no copy of the bytes it has decoded
        return pq.ParquetFile(path, pre_buffer=False)
    except (OSError, pa.ArrowException) as exc:
        raise InputError(f"{path}: cannot read the feature cache ({str(exc).splitlines()[0]})") from None


def _read_columns(files: list, columns, n_threads: int) -> tuple[pa.Table, np.ndarray]:
    """The requested columns of every file, concatenated in file order, as one chunk per column, and
    each file's row count.

    Floating-point columns are decoded straight into one preallocated array each (nulls become
    NaN), which needs a single copy and leaves every later read a zero-copy view; other columns
    are concatenated by pyarrow. A column a file lacks is missing (NaN or null) for its rows.
    """
    with ThreadPoolExecutor(max_workers=n_threads) as pool:
        handles = list(pool.map(_open, files))
    if columns is None:
        columns = list(dict.fromkeys(n for h in handles for n in h.schema_arrow.names))
    types = {}
    for h in handles:
        for f in h.schema_arrow:
            if f.name in columns and not pa.types.is_null(f.type):
                types.setdefault(f.name, f)
    floats = [c for c in columns if c in types and pa.types.is_floating(types[c].type)]
    others = [c for c in columns if c in types and c not in floats]
    sizes = np.array([h.metadata.num_rows for h in handles], np.int64)
    starts = np.cumsum(sizes) - sizes
    total = int(sizes.sum())
    dense = {c: np.empty(total) for c in floats}
    pieces = {c: [None] * len(handles) for c in others}

    def read(i):
        h = handles[i]
        have = [c for c in columns if c in h.schema_arrow.names]
        try:
            t = h.read(columns=have, use_threads=False)
        except (OSError, pa.ArrowException) as exc:
            raise InputError(f"{files[i]}: cannot read the feature cache ({str(exc).splitlines()[0]})") from None
        lo, hi = starts[i], starts[i] + sizes[i]
        for c in floats:
            dense[c][lo:hi] = t.column(c).to_numpy() if c in have else np.nan
        for c in others:
            pieces[c][i] = t.column(c) if c in have else pa.nulls(int(sizes[i]), types[c].type)
        h.close()

    with ThreadPoolExecutor(max_workers=n_threads) as pool:
        list(pool.map(read, range(len(handles))))
    arrays = {}
    for c in columns:
        if c in dense:
            arrays[c] = pa.array(dense.pop(c))
        elif c in pieces:
            chunks = [ch for col in pieces.pop(c) for ch in col.chunks]
            arrays[c] = pa.chunked_array(chunks, types[c].type).combine_chunks() if chunks else pa.nulls(0, types[c].type)
    table = pa.table(arrays) if arrays else pa.table({"_": pa.nulls(total)}).drop(["_"])
    return table, sizes


def _read_counts(path: Path) -> int:
    """Owned astrometric rows of a tile, from its ``cutflow.json``."""
    try:
        return int(json.loads(path.read_text())["rows"])
    except FileNotFoundError:
        raise InputError(f"{path}: not found; the run is incomplete, finish it with `selector run`") from None
    except (ValueError, KeyError, TypeError):
        raise InputError(f"{path}: damaged (no 'rows'); re-run `selector run`") from None


def load_cache(cfg, columns: Sequence[str] | None = None, *, tiles: Sequence[int] | None = None,
               threads: int | None = None) -> FeatureCache:
    """Read the feature cache of ``cfg``'s run: the asked columns of every tile at once.

    Parameters
    ----------
    cfg : Config
        Any configuration of the run (its output folder and tiling locate the cache).
    columns : sequence of str or None
        Columns to load (after :data:`READ_COLUMNS`, which are always read); None loads all. A
        column absent from a tile's file is read as missing (NaN or null).
    tiles : sequence of int, optional
        Tile ids to read (default: every tile of the run, see :func:`run_tiles`).
    threads : int, optional
        Files read in parallel (default: one per core).

    Raises
    ------
    InputError
        No tiles, or a tile without its feature cache or cut-flow record.
    """
    if columns is not None:
        columns = tuple(dict.fromkeys(list(READ_COLUMNS) + list(columns)))
    t0 = time.perf_counter()
    layout = layout_of(cfg)
    ids = run_tiles(cfg) if tiles is None else np.asarray(sorted({int(t) for t in tiles}), np.int64)
    if len(ids) == 0:
        raise InputError(f"{layout.run_dir}: no tiles found; run `selector ingest` and `selector run` first")
    files = [layout.features(int(t)) for t in ids]
    for f in files:
        if not f.exists():
            raise InputError(f"{f}: no feature cache for this tile; run `selector run` first")
    n_threads = threads or os.cpu_count() or 1
    table, sizes = _read_columns(files, columns, n_threads)
    with ThreadPoolExecutor(max_workers=n_threads) as pool:
        rows = np.array(list(pool.map(_read_counts, [layout.tile_cutflow(int(t)) for t in ids])), np.int64)
    starts = np.concatenate([[0], np.cumsum(sizes)])
    bad = tile_rejects(table)
    rejects = np.zeros(len(ids), np.int64)
    if bad.any():
        seen = np.concatenate([[0], np.cumsum(bad)])
        rejects = (seen[starts[1:]] - seen[starts[:-1]]).astype(np.int64)
        table = table.filter(pa.array(~bad)).combine_chunks()
    offsets = np.concatenate([[0], np.cumsum(sizes - rejects)]).astype(np.int64)
    return FeatureCache(table, ids, offsets, rows, rejects, layout,
                        None if columns is None else tuple(columns), time.perf_counter() - t0)


def tile_features(cache: FeatureCache, i: int) -> pa.Table:
    """Every column of the usable feature rows of ``cache.tiles[i]``, in cache order."""
    full = read_parquet(cache.layout.features(int(cache.tiles[i])))
    return full.filter(pa.array(~tile_rejects(full)))


def find_rows(cache: FeatureCache, ids) -> tuple[np.ndarray, np.ndarray]:
    """Where ``ids`` sit among the cache rows.

    Returns
    -------
    (numpy.ndarray of bool, numpy.ndarray of int64)
        For each cache row, whether its ``astro_id`` is among ``ids``, and the position in
        ``ids`` of the first equal id (0 where there is none). Integer ids given as text are
        compared as integers; otherwise both sides are compared as text.
    """
    if "astro_id" not in cache.table.column_names:
        raise SelectorError("internal error: the feature cache was loaded without its ids (astro_id)")
    cache_ids = cache.table.column("astro_id").combine_chunks()
    if isinstance(ids, pa.ChunkedArray):
        ids = ids.combine_chunks()
    elif not isinstance(ids, pa.Array):
        ids = pa.array(ids)
    if ids.type != cache_ids.type:
        try:
            if not pa.types.is_integer(cache_ids.type):
                raise pa.ArrowInvalid("text ids")
            ids = pc.cast(ids, cache_ids.type)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            ids, cache_ids = pc.cast(ids, pa.string()), pc.cast(cache_ids, pa.string())
    pos = pc.index_in(cache_ids, value_set=ids)
    found = np.asarray(pos.is_valid().to_numpy(zero_copy_only=False), bool)
    return found, np.asarray(pos.fill_null(0).to_numpy(zero_copy_only=False), np.int64)
