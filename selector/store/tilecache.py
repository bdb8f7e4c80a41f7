"""Each tile file read once per worker: a small cache of decoded tiles, with their unit vectors and digests.

A tile's job reads its own file and the files of every tile within its margins (about nine per
catalogue), so without a cache every file is read and decoded about nine times per catalogue and its
rows turned into unit vectors each time, only to keep a thin ring of them. Tiles are done in nested
HEALPix order, in which consecutive tiles are neighbours on the sky, so a least-recently-used cache of
a few dozen decoded tiles per worker serves most of those reads: with the run's chunks of consecutive
tiles, each file is read about once per worker (measured by simulating the run's access order at
order 5: 1.9 reads per file with two workers and 32 cached tiles per catalogue, against 9.3 without).

Another design would cut margin strips at ingest time (each tile's rows near each edge in a file of
their own). It reads less, but the margin depends on the largest proper motion of the reading tile
and on the match radius, both configuration, so strips would have to be cut for the widest margin
and re-cut whenever it changes; the cache needs nothing from ingest and is exact for any margin.

Each entry holds the file's whole table, the unit vectors of its rows (computed once, used by every
neighbour's margin filter) and the SHA-256 of the bytes read, which is the file's fingerprint in the
run manifest, so the first run does not read every file a second time to fingerprint it. An entry is
served only while the file's size, modification time and inode are those it was read with, so a
file rewritten between two runs in one process (or during one) is read again.

Memory: at most :data:`CACHE_TILES` files per catalogue and :data:`CACHE_BYTES` of decoded data in
all, whichever is reached first; a few tiles, whatever the size of the catalogue.
"""

from __future__ import annotations

import hashlib
import os
from collections import OrderedDict
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from selector.core.frames import radec_to_xyz
from selector.errors import InputError

#: Decoded files kept per catalogue. 32 serve nearly every neighbour read of the run's access order
#: (see the module notes); fewer start to re-read the tiles across each block boundary.
CACHE_TILES = 32
#: Decoded bytes kept in all (tables and unit vectors), so a catalogue of very dense tiles cannot grow a
#: worker beyond a few hundred MiB; the tile being read is always kept.
CACHE_BYTES = 384 << 20


@dataclass(frozen=True)
class DecodedTile:
    """One tile file as read once.

    Attributes
    ----------
    path : pathlib.Path
    table : pyarrow.Table or None
        Every column of the file; None when the file does not exist.
    xyz : numpy.ndarray or None
        Unit vectors of the rows (``ra_deg``, ``dec_deg``), shape (rows, 3).
    sha256 : str or None
        SHA-256 of the file's bytes as read.
    size, mtime_ns : int
        Size and modification time of the file read (0 when it does not exist).
    """

    path: Path
    table: pa.Table | None
    xyz: np.ndarray | None
    sha256: str | None
    size: int = 0
    mtime_ns: int = 0
    inode: int = 0
    _column_digests: dict = field(default_factory=dict, repr=False, compare=False)

    @property
    def exists(self) -> bool:
        return self.table is not None

    def part_digest(self, rows: np.ndarray | None = None, columns: list[str] | None = None) -> str:
        """Digest of the rows and columns of this file a tile uses, from what was read once.

        Parameters
        ----------
        rows : numpy.ndarray of int, optional
            The rows used, in file order; every row when not given.
        columns : list of str, optional
            The columns used; every column when not given.

        Returns
        -------
        str
            SHA-256 over the digest of every column used and the row numbers used. Every column of a
            file is stood for by the SHA-256 of its bytes, a few columns each by a digest of its
            decoded values, so a change to a column a tile does not read (a neighbour's parallax, say)
            leaves the tile's key alone. A change to a used column anywhere in the file changes it:
            cheaper than re-encoding the rows used for every tile that reads them, at the price of a
            few tiles re-matched that a digest of the used rows alone would have spared.
        """
        h = hashlib.sha256()
        if columns is None:
            h.update(b"file " + self.sha256.encode())
        else:
            for name in columns:
                h.update(self._column_digest(name))
        h.update(b"all rows" if rows is None else np.ascontiguousarray(rows, np.int64).tobytes())
        return h.hexdigest()[:32]

    def _column_digest(self, name: str) -> bytes:
        if name not in self._column_digests:
            column = self.table.column(name)
            h = hashlib.sha256(f"{name}:{column.type}:{column.null_count}".encode())
            if pa.types.is_integer(column.type) or pa.types.is_floating(column.type) or pa.types.is_boolean(column.type):
                values = column.to_numpy(zero_copy_only=False)
                if column.null_count:
                    h.update(np.flatnonzero(column.is_null().to_numpy(zero_copy_only=False)).tobytes())
                    values = np.where(np.isnan(values), 0, values) if values.dtype.kind == "f" else values
                h.update(np.ascontiguousarray(values).tobytes())
            else:  # text and other types: their values as Python objects, written out
                h.update(repr(column.to_pylist()).encode())
            self._column_digests[name] = h.digest()
        return self._column_digests[name]

    @property
    def nbytes(self) -> int:
        return (self.table.nbytes if self.table is not None else 0) + (self.xyz.nbytes if self.xyz is not None else 0)


def _stamp(st: os.stat_result) -> tuple[int, int, int]:
    return st.st_size, st.st_mtime_ns, st.st_ino


def read_decoded(path: Path) -> DecodedTile:
    """Read a tile file once: its bytes, their SHA-256, the decoded table and the rows' unit vectors.

    Raises
    ------
    InputError
        When the file cannot be read or decoded (one line, naming it).
    """
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            st = os.fstat(fh.fileno())
            data = fh.read()
    except FileNotFoundError:
        return DecodedTile(path, None, None, None)
    except OSError as exc:
        raise InputError(f"{path}: cannot read ({exc.strerror or exc})") from None
    try:
        # ParquetFile reads one file with less set-up than read_table's dataset layer
        table = pq.ParquetFile(pa.BufferReader(data)).read()
    except (OSError, pa.ArrowException) as exc:
        text = str(exc).strip().splitlines()
        raise InputError(f"{path}: cannot read ({text[0] if text else type(exc).__name__})") from None
    xyz = None
    if "ra_deg" in table.column_names and "dec_deg" in table.column_names:
        xyz = radec_to_xyz(table.column("ra_deg").to_numpy(), table.column("dec_deg").to_numpy(), workers=1)
    size, mtime_ns, inode = _stamp(st)
    return DecodedTile(path, table, xyz, hashlib.sha256(data).hexdigest(), size, mtime_ns, inode)


class TileCache:
    """Least-recently-used decoded tile files, checked against the file system on every use.

    Parameters
    ----------
    max_tiles : int
        Files kept per catalogue folder.
    max_bytes : int
        Decoded bytes kept in all.
    """

    def __init__(self, max_tiles: int = CACHE_TILES, max_bytes: int = CACHE_BYTES):
        self.max_tiles = max_tiles
        self.max_bytes = max_bytes
        # one least-recently-used list per folder (catalogue), keyed by the path as text: cheap to hash
        self._folders: dict[str, OrderedDict[str, DecodedTile]] = {}
        self._bytes = 0
        self.reads = 0
        self.hits = 0

    def get(self, path: Path) -> DecodedTile:
        """The decoded file, from the cache when the file on disk is still the one read."""
        key = os.fspath(path)
        folder = self._folders.setdefault(os.path.dirname(key), OrderedDict())
        entry = folder.get(key)
        if entry is not None:
            try:
                now = _stamp(os.stat(key))
            except FileNotFoundError:
                now = None
            if (now is None and not entry.exists) or now == (entry.size, entry.mtime_ns, entry.inode):
                folder.move_to_end(key)
                self.hits += 1
                return entry
            self._bytes -= folder.pop(key).nbytes
        entry = read_decoded(Path(path))
        self.reads += 1
        folder[key] = entry
        self._bytes += entry.nbytes
        self._evict(key)
        return entry

    def _evict(self, keep: str) -> None:
        for folder in self._folders.values():
            while len(folder) > self.max_tiles:
                self._bytes -= folder.popitem(last=False)[1].nbytes
        while self._bytes > self.max_bytes:
            # the largest folder's oldest entry goes first; the file just read always stays
            folder = max(self._folders.values(), key=len)
            oldest = next(iter(folder))
            if oldest == keep or len(self) <= 1:
                break
            self._bytes -= folder.pop(oldest).nbytes

    def clear(self) -> None:
        """Forget every entry (the memory goes back at once)."""
        self._folders.clear()
        self._bytes = 0

    def __len__(self) -> int:
        return sum(len(f) for f in self._folders.values())
