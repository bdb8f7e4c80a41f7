"""Readers for the input formats and atomic writers for every output.

Readers yield :class:`Chunk` objects: a pyarrow table holding only the requested columns, with the
file it came from, the row number of its first row in that file, and the units the file declares.
Parquet and CSV are streamed in chunks, so an input larger than memory can be ingested; FITS, ECSV
and VOTable are read through astropy (FITS memory-mapped) and handed out in chunks of the same size.
"""

from __future__ import annotations

import ctypes
import errno
import glob
import hashlib
import io
import itertools
import json
import os
import shutil
import sys
import time
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterator, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from selector.core.columns import describe
from selector.errors import InputError, SelectorError

_ENDINGS = {
    ".parquet": "parquet", ".pq": "parquet", ".fits": "fits", ".fit": "fits", ".fits.gz": "fits",
    ".csv": "csv", ".csv.gz": "csv", ".ecsv": "ecsv", ".vot": "votable", ".votable": "votable", ".xml": "votable",
}


@dataclass
class Chunk:
    """A slice of one input file."""

    path: Path
    first_row: int
    table: pa.Table
    units: dict[str, str] = field(default_factory=dict)


def expand_files(patterns: Sequence[str], base: Path) -> list[Path]:
    """Resolve files, folders (every file below, sorted) and glob patterns, in a stable order."""
    found: list[Path] = []
    for pattern in patterns:
        p = Path(pattern).expanduser()
        p = p if p.is_absolute() else Path(base) / p
        if p.is_dir():
            members = sorted(q for q in p.rglob("*") if q.is_file() and not q.name.startswith((".", "_")))
            if not members:
                raise InputError(f"{p}: folder holds no files")
            found.extend(members)
        elif any(ch in str(pattern) for ch in "*?["):
            members = sorted(Path(m) for m in glob.glob(str(p), recursive=True) if Path(m).is_file())
            if not members:
                raise InputError(f"{pattern}: no file matches this pattern (looked in {base})")
            found.extend(members)
        elif p.is_file():
            found.append(p)
        else:
            raise InputError(f"{p}: no such file")
    seen, unique = set(), []
    for p in found:
        if p not in seen:
            seen.add(p)
            unique.append(p)
    return unique


def guess_format(path: Path) -> str:
    name = path.name.lower()
    for ending in sorted(_ENDINGS, key=len, reverse=True):
        if name.endswith(ending):
            return _ENDINGS[ending]
    raise InputError(f"{path}: cannot tell the format from the file name; set format = parquet, fits, csv, ecsv or votable")


def iter_chunks(paths: Sequence[Path], fmt: str, columns: Sequence[str] | None, chunk_rows: int) -> Iterator[Chunk]:
    """Yield the requested columns (None: all) of every file in chunks of at most ``chunk_rows`` rows.

    CSV columns come as text, so that an unparsable value can reject its own row.
    """
    for path in paths:
        kind = guess_format(path) if fmt == "auto" else fmt
        reader = {"parquet": _parquet, "csv": _csv}.get(kind, _astropy)
        try:
            yield from reader(path, kind, None if columns is None else list(columns), chunk_rows)
        except InputError:
            raise
        except (OSError, ValueError, pa.ArrowException, TypeError) as exc:
            raise InputError(f"{path}: cannot read as {kind} ({_first_line(exc)})") from None


def read_table(path: Path, columns: Sequence[str] | None = None, fmt: str = "auto",
               what: str = "table") -> tuple[pa.Table, dict[str, str]]:
    """A whole small file (labels, truth, outcomes) in any supported format, with its column units.

    The one reader for small side tables, built on :func:`iter_chunks`, so every format behaves as
    it does at ingest (CSV values come as text). ``what`` names the file in the error when it is
    missing.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: {what} not found")
    parts, units = [], {}
    for chunk in iter_chunks([path], fmt, columns, 1 << 20):
        parts.append(chunk.table)
        units.update(chunk.units)
    if not parts:
        return pa.table({c: pa.array([], pa.string()) for c in columns or ()}), units
    return pa.concat_tables(parts, promote_options="permissive"), units


def file_columns(path: Path, fmt: str = "auto") -> list[str]:
    """The column names of an input file, read from its header alone where the format allows.

    Used to check every input before the first row is ingested. Raises :class:`InputError` with one
    line for a file that is not what its name or ``fmt`` says (see :func:`csv_header`).
    """
    path = Path(path)
    kind = guess_format(path) if fmt == "auto" else fmt
    try:
        if kind == "parquet":
            return list(pq.read_schema(path).names)
        if kind == "csv":
            return csv_header(path)
        if kind == "fits":
            from astropy.io import fits

            _check_fits_size(path)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                with fits.open(path, memmap=True) as hdus:
                    for hdu in hdus:
                        if getattr(hdu, "columns", None) is not None:
                            return list(hdu.columns.names)
            raise InputError(f"{path}: holds no table; give the FITS file that holds the catalogue")
        table, _ = next(((c.table, c.units) for c in _astropy(path, kind, None, 1 << 30)), (pa.table({}), {}))
        return list(table.column_names)
    except InputError:
        raise
    except FileNotFoundError:
        raise InputError(f"{path}: no such file") from None
    except (OSError, ValueError, pa.ArrowException, TypeError) as exc:
        raise InputError(f"{path}: cannot read as {kind} ({_first_line(exc)}); is it damaged, or of another "
                         "format than its name says?") from None


def _first_line(exc) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def _missing(path: Path, have: Sequence[str], want: Sequence[str], where: dict | None = None):
    """Refuse a file without a wanted column: name it, the nearest column the file has, and its columns.

    ``where`` maps a column to the config key that names it, for the message.
    """
    gone = [c for c in want if c not in have]
    if gone:
        raise InputError(missing_column_message(path, gone[0], have, (where or {}).get(gone[0])))


def missing_column_message(path: Path, column: str, have: Sequence[str], key: str | None = None,
                           taken: Sequence[str] = ()) -> str:
    """One line for a column the config names but the file lacks (nearest column, the file's columns).

    The nearest is looked for first among the columns no other key names (``taken``): a renamed
    column is usually one the config does not use yet.
    """
    import difflib

    free = [h for h in have if h not in set(taken)]
    hint = difflib.get_close_matches(column, free, n=1, cutoff=0.3) or difflib.get_close_matches(
        column, list(have), n=1, cutoff=0.5)
    if not hint:
        lower = {h.lower(): h for h in have}
        hint = [lower[column.lower()]] if column.lower() in lower else []
    extra = f"; the nearest is '{hint[0]}'" if hint else ""
    shown = ", ".join(list(have)[:25]) + (f" and {len(have) - 25} more" if len(have) > 25 else "")
    named = f" (named by {key})" if key else " named in the config"
    return (f"{path}: column '{column}'{named} is not in the file{extra}; the file's columns are: {shown or 'none'}; "
            "fix the config or the file")


def _parquet(path, kind, columns, chunk_rows):
    # pre_buffer (on by default) keeps the bytes of every row group read so far until the file is
    # closed, so memory would grow with the file's size; streaming needs it off.
    pf = pq.ParquetFile(path, pre_buffer=False)
    columns = pf.schema_arrow.names if columns is None else columns
    _missing(path, pf.schema_arrow.names, columns)
    units = _arrow_units(pf.schema_arrow)
    first = 0
    for batch in pf.iter_batches(batch_size=chunk_rows, columns=columns):
        table = pa.Table.from_batches([batch])
        yield Chunk(path, first, table, units)
        first += table.num_rows


def _arrow_units(schema: pa.Schema) -> dict[str, str]:
    """Units stored in Parquet field metadata under ``unit`` (as our writers do)."""
    units = {}
    for f in schema:
        if f.metadata and b"unit" in f.metadata:
            units[f.name] = f.metadata[b"unit"].decode()
    return units


#: Leading bytes of formats a file named ``.csv`` may really hold, with the advice for each.
_MAGIC = ((b"\x1f\x8b", "is gzip-compressed; name it .csv.gz (or decompress it)"),
          (b"PAR1", "is a Parquet file; name it .parquet or set format = \"parquet\""),
          (b"SIMPLE  =", "is a FITS file; name it .fits or set format = \"fits\""),
          (b"<?xml", "is XML (a VOTable?); name it .vot or set format = \"votable\""),
          (b"PK\x03\x04", "is a zip archive; unpack it first"))


def csv_header(path: Path) -> list[str]:
    """The column names of a CSV file, after checking that it really is comma-separated text.

    Raises
    ------
    InputError
        One line for an empty file, a file of another format under a ``.csv`` name (compressed,
        Parquet, FITS, XML, zip), or a header separated by something other than commas.
    """
    # Through pyarrow, so a compressed file (.csv.gz) gives its real header, as the reader sees it;
    # "utf-8-sig" drops a byte-order mark, which the reader also skips.
    path = Path(path)
    if path.stat().st_size == 0:
        raise InputError(f"{path}: is empty (0 bytes); a CSV file needs at least a header line of column names")
    with open(path, "rb") as fh:
        raw = fh.read(16)
    if not path.name.lower().endswith(".gz"):
        for magic, advice in _MAGIC:
            if raw.startswith(magic):
                raise InputError(f"{path}: {advice}")
    head = b""
    with pa.input_stream(str(path), compression="detect") as fh:
        while b"\n" not in head and len(head) < 1 << 24:
            block = fh.read(1 << 16)
            if not block:
                break
            head += block
    line = head.split(b"\n", 1)[0].decode("utf-8-sig", "replace").strip()
    if not line:
        raise InputError(f"{path}: line 1 is empty; a CSV file starts with a header line of column names")
    header = [h.strip().strip('"') for h in line.split(",")]
    if len(header) == 1:
        for sep, name in ((";", "semicolons"), ("\t", "tabs"), ("|", "vertical bars"), (" ", "spaces")):
            if sep in line.strip():
                raise InputError(f"{path}: line 1 separates its fields with {name}, not commas; convert it to "
                                 "comma-separated values (or to Parquet)")
    return header


def _csv(path, kind, columns, chunk_rows):
    # Every column is read as text so that an unparsable value rejects its own row, not the file.
    header = csv_header(path)
    columns = header if columns is None else columns
    _missing(path, header, columns)
    convert = pacsv.ConvertOptions(include_columns=columns, column_types={c: pa.string() for c in columns},
                                   strings_can_be_null=True, quoted_strings_can_be_null=True)
    read = pacsv.ReadOptions(block_size=max(1 << 20, chunk_rows * 64))
    try:
        reader = pacsv.open_csv(path, read_options=read, convert_options=convert)
    except pa.ArrowInvalid as exc:
        raise _csv_problem(path, exc, len(header)) from None
    first = 0
    pending: list[pa.RecordBatch] = []
    rows = 0
    batches = iter(reader)
    while True:
        try:
            batch = next(batches)
        except StopIteration:
            break
        except pa.ArrowInvalid as exc:
            raise _csv_problem(path, exc, len(header)) from None
        pending.append(batch)
        rows += batch.num_rows
        while rows >= chunk_rows:
            table = pa.Table.from_batches(pending).combine_chunks()
            yield Chunk(path, first, table.slice(0, chunk_rows))
            first += chunk_rows
            rest = table.slice(chunk_rows)
            pending, rows = rest.to_batches(), rest.num_rows
    if rows:
        yield Chunk(path, first, pa.Table.from_batches(pending, schema=reader.schema))


def _csv_problem(path: Path, exc: Exception, n_fields: int) -> InputError:
    """Find the line a CSV reader stumbled on (a ragged row, bytes that are not UTF-8) and say what is wrong.

    Only on the error path: the file is read again, as text, up to the bad line.
    """
    import codecs
    import csv

    with pa.input_stream(str(path), compression="detect") as raw:
        decoder = codecs.getincrementaldecoder("utf-8")()
        line = 1
        while True:
            block = raw.read(1 << 20)
            try:
                decoder.decode(block, final=not block)
            except UnicodeDecodeError as bad:
                start = min(max(bad.start, 0), max(len(block) - 1, 0))
                byte = block[start] if block else 0
                line += block[:start].count(b"\n")
                return InputError(f"{path}: line {line} holds bytes that are not UTF-8 "
                                  f"text (byte 0x{byte:02x}); save the file as UTF-8")
            if not block:
                break
            line += block.count(b"\n")
    with pa.input_stream(str(path), compression="detect") as raw, \
            io.TextIOWrapper(raw, encoding="utf-8-sig", newline="") as fh:
        reader = csv.reader(fh)
        for row in reader:
            if row and len(row) != n_fields:
                return InputError(f"{path}: line {reader.line_num} has {len(row)} fields but the header has {n_fields}; "
                                  "mend that line (a stray or missing comma or quote?)")
    return InputError(f"{path}: cannot read as csv ({_first_line(exc)})")


def _astropy(path, kind, columns, chunk_rows):
    from astropy.table import Table

    fmt = {"fits": "fits", "ecsv": "ascii.ecsv", "votable": "votable"}[kind]
    kwargs = {"memmap": True} if kind == "fits" else {}
    try:
        with warnings.catch_warnings():
            # astropy warns before it fails on a damaged file; the one-line error below says it all
            warnings.simplefilter("ignore")
            tab = Table.read(path, format=fmt, **kwargs)
            if kind == "fits":
                _check_fits_size(path)
    except InputError:
        raise
    except Exception as exc:  # astropy raises many types for unreadable files
        if kind == "fits" and ("buffer is too small" in str(exc) or "truncated" in str(exc).lower()):
            raise InputError(f"{path}: the FITS file is truncated (shorter than its header says); copy it again "
                             "from its source") from None
        raise InputError(f"{path}: cannot read as {kind} ({_first_line(exc)})") from None
    columns = tab.colnames if columns is None else columns
    _missing(path, tab.colnames, columns)
    units = {c: str(tab[c].unit) for c in columns if tab[c].unit is not None}
    for first in range(0, max(len(tab), 1), chunk_rows):
        part = tab[first:first + chunk_rows]
        if len(tab) == 0:
            part = tab
        arrays = [_astropy_column_to_arrow(part[c]) for c in columns]
        yield Chunk(path, first, pa.table(arrays, names=list(columns)), units)
        if len(tab) == 0:
            break


def _check_fits_size(path: Path) -> None:
    """Refuse a FITS file whose data end before its headers say (astropy may read it without a word)."""
    from astropy.io import fits

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with fits.open(path, memmap=True) as hdus:
            need = 0
            for hdu in hdus:
                info = hdu.fileinfo()
                need = max(need, info["datLoc"] + hdu.size)
    if Path(path).stat().st_size < need:
        raise InputError(f"{path}: the FITS file is truncated ({Path(path).stat().st_size:,d} bytes, its headers "
                         f"describe {need:,d}); copy it again from its source")


def _astropy_column_to_arrow(col) -> pa.Array:
    data = np.asarray(col)
    mask = np.asarray(getattr(col, "mask", np.zeros(len(col), bool)), bool)
    if data.ndim > 1:
        raise InputError(f"column '{col.name}' holds arrays, not one value per row")
    if data.dtype.kind == "S":
        data = np.char.decode(data, "utf-8", "replace")
    if data.dtype.kind in "U":
        data = np.char.strip(data)
        return pa.array(data.astype(object), type=pa.string(), mask=mask | (data == ""))
    if data.dtype.byteorder not in ("=", "|"):
        data = data.astype(data.dtype.newbyteorder("="))
    if mask.shape != data.shape:
        mask = np.zeros(data.shape, bool)
    return pa.array(data, mask=mask if mask.any() else None)


# --- fingerprints -------------------------------------------------------------------------------

def fingerprint(path: Path, sample_bytes: int = 1 << 20) -> str:
    """A content fingerprint: size plus SHA-256 of the first, middle and last MiB.

    Reading whole billion-row files just to notice a change would cost as much as ingesting them;
    sampled blocks and the size catch rewritten, truncated and appended files.
    """
    path = Path(path)
    size = path.stat().st_size
    h = hashlib.sha256(str(size).encode())
    with open(path, "rb") as fh:
        for offset in sorted({0, max(0, size // 2 - sample_bytes // 2), max(0, size - sample_bytes)}):
            fh.seek(offset)
            h.update(fh.read(sample_bytes))
    return f"{size}:{h.hexdigest()[:32]}"


def provenance_path(path: Path | str, base: Path | str) -> str:
    """A file name as provenance records it: relative to ``base`` (the config's folder), with ``/``.

    Results then hold no absolute paths (no home folders, no machine layout), and a project folder
    moved or copied elsewhere keeps records that still name its files. A file outside ``base`` gets
    a ``../`` path.
    """
    return Path(os.path.relpath(Path(path).resolve(), Path(base).resolve())).as_posix()


def file_sha256(path: Path) -> str:
    """Full SHA-256 of a (small) file."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


# --- atomic writers -----------------------------------------------------------------------------

def _current_umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


_UMASK = _current_umask()


def fsync_folder(folder: Path) -> None:
    """Make the renames inside ``folder`` durable (POSIX: a folder's entries are synced through it)."""
    fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _syncfs():
    # Linux's syncfs(2): one flush (and one journal commit) for a whole file system
    if not sys.platform.startswith("linux"):
        return None
    try:
        return ctypes.CDLL(None, use_errno=True).syncfs
    except (OSError, AttributeError):
        return None


_SYNCFS = _syncfs()


def _fsync_each(paths) -> None:
    for path in paths:
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def sync_files(paths) -> None:
    """Make the data of every file in ``paths`` durable (not their folder entries: see :func:`fsync_folder`).

    Where the system has ``syncfs`` (Linux), one call per file system flushes them all: fsync file by file
    forces one journal commit per file (about 3 ms each on the machine this was measured on, against well
    under a millisecond per file for one flush of a hundred files). Elsewhere, or when it fails, each file is
    fsynced. The flush also writes out other dirty files of the same file system, which had to be written
    anyway.
    """
    paths = [os.fspath(p) for p in paths]
    if not paths:
        return
    if _SYNCFS is not None:
        devices = {}
        for p in paths:
            devices.setdefault(os.stat(p).st_dev, p)
        failed = []
        for dev, p in devices.items():
            fd = os.open(p, os.O_RDONLY)
            try:
                if _SYNCFS(fd) != 0:
                    failed.append(dev)
            finally:
                os.close(fd)
        if not failed:
            return
        paths = [p for p in paths if os.stat(p).st_dev in failed]
    _fsync_each(paths)


_TMP_NUMBERS = itertools.count()


def _new_tmp(path: Path) -> Path:
    """Create an empty temporary file beside ``path``, named ``.<name>.<pid>-<n>.tmp``, and return its path.

    Made with ``O_EXCL``, so it is never a file someone else holds; the process id and a counter make
    the first name tried free in practice (a file left by a killed process of the same id is skipped),
    where ``tempfile.mkstemp`` draws random names, which cost it about as much as the file itself.
    """
    for _ in range(1000):
        tmp = path.parent / f".{path.name}.{os.getpid()}-{next(_TMP_NUMBERS)}.tmp"
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
        except FileExistsError:
            continue
        os.close(fd)
        return tmp
    raise FileExistsError(errno.EEXIST, "no free temporary name", str(path))


class DurableBatch:
    """Atomic writes made durable together, so durability is paid once for many files.

    Each file is written to a temporary file beside its target (``.<name>.<pid>-<n>.tmp``). At
    :meth:`commit` every temporary file is made durable (:func:`sync_files`: one flush of the file
    system), then all are renamed into place, then each folder is fsynced once: one journal commit
    carries the data of every file and another the renames, where writing, syncing and renaming file
    by file costs a commit (a few ms) per file. Until the
    commit the targets keep their old contents; a process killed before it leaves only temporary
    files, which the next run removes. Whoever records the files (the run manifest, an ingest
    summary) must do so after :meth:`commit` returns.

    Use as a context manager: committed when the block ends normally, temporary files removed when
    it raises.

    Parameters
    ----------
    sync : bool
        False: the files are renamed into place without any fsync, for a folder that is made durable
        as a whole afterwards (a new generation of tiles, synced once before it is put in force by
        :func:`selector.store.generations.commit_generation`).
    """

    def __init__(self, sync: bool = True):
        self.sync = sync
        self._pending: list[tuple[Path, Path]] = []

    def __enter__(self) -> "DurableBatch":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.commit()
        else:
            self.discard()

    @contextmanager
    def path(self, path: Path):
        """Yield a temporary path to write ``path``'s contents to; it is put in place at the commit."""
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = _new_tmp(path)
        try:
            yield tmp
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise
        self._pending.append((tmp, path))

    def adopt(self, other: "DurableBatch") -> None:
        """Take over ``other``'s written files, to be made durable at this batch's commit."""
        self._pending.extend(other._pending)
        other._pending = []

    def __len__(self) -> int:
        return len(self._pending)

    def commit(self) -> list[Path]:
        """fsync every written file, rename each into place, fsync each folder once; the paths."""
        pending, self._pending = self._pending, []
        try:
            for tmp, _ in pending:
                # a writer may have replaced the file with one of its own mode; outputs are meant to be
                # shared like any file the user writes
                os.chmod(tmp, 0o666 & ~_UMASK)
            if self.sync:
                sync_files([tmp for tmp, _ in pending])
        except BaseException:
            for tmp, _ in pending:
                tmp.unlink(missing_ok=True)
            raise
        for tmp, final in pending:
            os.replace(tmp, final)
        for folder in sorted({final.parent for _, final in pending}) if self.sync else ():
            fsync_folder(folder)
        return [final for _, final in pending]

    def discard(self) -> None:
        """Remove the temporary files written so far; the targets keep their old contents."""
        pending, self._pending = self._pending, []
        for tmp, _ in pending:
            tmp.unlink(missing_ok=True)


@contextmanager
def atomic_path(path: Path, batch: DurableBatch | None = None):
    """Yield a temporary path beside ``path``; on success it is made durable and renamed into place.

    With a ``batch``, the file is only registered with it and put in place at its commit; without,
    it is a batch of one (fsync the file, rename, fsync the folder).
    """
    try:
        if batch is not None:
            with batch.path(path) as tmp:
                yield tmp
            return
        with DurableBatch() as own, own.path(path) as tmp:
            yield tmp
    except (OSError, pa.ArrowException) as exc:
        # a full or read-only disk, in whatever words the writing library used: one line
        err = _write_error(path, exc)
        if err is None:
            raise
        raise err from None


#: A temporary file of an atomic write untouched this long was left by a killed process.
STALE_TMP_S = 600.0


def remove_stale_tmp(folder: Path, older_than_s: float = STALE_TMP_S) -> int:
    """Remove temporary files of atomic writes cut short by a kill (``.<name>.<pid>-<n>.tmp``) from
    ``folder``; only those untouched for ``older_than_s``, since a reader's shared lock lets another
    command of the same kind write there now. Returns how many were removed."""
    folder = Path(folder)
    if not folder.is_dir():
        return 0
    now, removed = time.time(), 0
    for tmp in folder.glob(".*.tmp"):
        try:
            if now - tmp.stat().st_mtime > older_than_s:
                tmp.unlink()
                removed += 1
        except OSError:
            continue
    return removed


def no_space(exc: BaseException) -> bool:
    """Whether an error means the device (or the quota) is full, however the library words it."""
    if isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, errno.EDQUOT):
        return True
    text = str(exc).lower()
    return "no space left" in text or "disk quota exceeded" in text or "database or disk is full" in text


def no_space_error(path: Path) -> SelectorError:
    """The one line for a full device while writing ``path``."""
    folder = Path(path).parent
    try:
        free = f"{shutil.disk_usage(folder).free / 2**20:,.1f} MiB free"
    except OSError:
        free = "free space unknown"
    return SelectorError(f"{path}: no space left on the device ({free}); free some space or move "
                         "project.output_dir, then run the command again (finished work is kept)")


def _write_error(path: Path, exc: BaseException) -> SelectorError | None:
    """A one-line error for a write that failed for a reason outside the program (full, read-only)."""
    if no_space(exc):
        return no_space_error(path)
    if isinstance(exc, OSError) and exc.errno in (errno.EROFS, errno.EACCES, errno.EPERM):
        return SelectorError(f"{path}: cannot write ({exc.strerror}); make {Path(path).parent} writable or move "
                             "project.output_dir")
    return None


def write_parquet(table: pa.Table, path: Path, metadata: dict | None = None, *,
                  batch: DurableBatch | None = None) -> Path:
    """Write a Parquet file atomically with fixed options, so equal tables give equal bytes.

    LZ4 rather than a denser codec: every tile is read by each of its neighbours' jobs, and LZ4
    decodes about a third faster for a tenth more disk.
    """
    if metadata:
        meta = dict(table.schema.metadata or {})
        meta.update({k.encode(): (v if isinstance(v, str) else json.dumps(v, sort_keys=True)).encode()
                     for k, v in metadata.items()})
        table = table.replace_schema_metadata(meta)
    # Dictionary encoding pays for repeated text; on float columns it is tried, abandoned, and makes
    # writing about three times slower and the file larger, so it is kept to text columns.
    with atomic_path(path, batch) as tmp:
        pq.write_table(table, tmp, **parquet_options(table.schema))
    return Path(path)


def parquet_writer_options(schema: pa.Schema) -> dict:
    """The fixed options of every Parquet writer we open, for a table of this schema."""
    textual = [f.name for f in schema if pa.types.is_string(f.type) or pa.types.is_large_string(f.type)
               or pa.types.is_binary(f.type) or pa.types.is_dictionary(f.type)]
    return {"compression": "lz4", "write_statistics": True, "use_dictionary": textual}


def parquet_options(schema: pa.Schema) -> dict:
    """:func:`parquet_writer_options` and the row-group size: the options of ``pyarrow.parquet.write_table``."""
    return {**parquet_writer_options(schema), "row_group_size": PARQUET_ROW_GROUP_ROWS}


#: Rows per Parquet row group of every file we write.
PARQUET_ROW_GROUP_ROWS = 1 << 20


def write_json(data, path: Path, *, batch: DurableBatch | None = None) -> Path:
    """Write JSON atomically with sorted keys (deterministic bytes)."""
    with atomic_path(path, batch) as tmp:
        tmp.write_text(json.dumps(data, indent=2, sort_keys=True, default=_json_default) + "\n", encoding="utf-8")
    return Path(path)


def write_text(text: str, path: Path) -> Path:
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(path)


#: Table writers by format name (``fmt`` of :func:`write_table`).
TABLE_FORMATS = ("ecsv", "csv", "votable", "fits")
#: Table metadata key under which a result's provenance (a dict) travels to the writers.
PROVENANCE_META = "selector_provenance"


def format_columns(table, *, round_floats: bool = True):
    """A shallow copy of an astropy Table ready to be written: every known column described, floats rounded.

    The one formatting step shared by every table writer (the run's merged candidates, the target
    lists and their side tables). For each column :func:`selector.core.columns.describe` knows, the
    copy carries its description and UCD (``meta['ucd']``, which the VOTable writer turns into the
    ``FIELD``'s ``ucd``); with ``round_floats`` its float values are rounded to the decimals their
    unit warrants, so text formats (CSV, ECSV, VOTable) write ``62.7770503`` instead of
    ``62.777050325324694``. Rounding to ``d`` decimals is ``rint(x·10^d)/10^d``: the nearest double
    to the short decimal, which Python writes back in its short form. Binary formats keep full
    precision (``round_floats=False``). Columns unknown to the table of descriptions are left as they are.
    """
    out = table.copy(copy_data=False)
    for name in out.colnames:
        doc = describe(name)
        if doc is None:
            continue
        col = out[name]
        if round_floats and doc.decimals is not None and col.dtype.kind == "f":
            col = col.copy()
            # + 0.0 turns the -0.0 of small negative values into 0.0
            col[...] = np.round(np.asarray(col), doc.decimals) + 0.0
            out[name] = col
            col = out[name]
        col.description = doc.description
        col.meta["ucd"] = doc.ucd
    return out


def describe_arrow_columns(table: pa.Table, units: dict[str, str] | None = None) -> pa.Table:
    """The same table with each known column's description, UCD and unit (``units``) in its Parquet
    field metadata; values untouched (Parquet keeps full precision). The Parquet twin of :func:`format_columns`."""
    fields = []
    for f in table.schema:
        doc = describe(f.name)
        meta = dict(f.metadata or {})
        if doc is not None:
            meta.update({b"description": doc.description.encode(), b"ucd": doc.ucd.encode()})
        if units and units.get(f.name):
            meta[b"unit"] = units[f.name].encode()
        fields.append(f.with_metadata(meta) if meta else f)
    return table.cast(pa.schema(fields, metadata=table.schema.metadata))


def _provenance_json(table) -> str | None:
    prov = table.meta.get(PROVENANCE_META)
    return None if prov is None else json.dumps(prov, sort_keys=True, separators=(",", ":"))


def write_table_file(table, path: Path, fmt: str) -> Path:
    """Write an astropy Table in ``ecsv``, ``csv``, ``votable`` or ``fits`` at ``path`` (not atomically).

    For callers that write several files inside their own :func:`atomic_path` blocks; every other
    caller uses :func:`write_table`. Columns go through :func:`format_columns`. The provenance dict
    in ``table.meta['selector_provenance']`` goes into the ECSV header, a FITS ``PROVJSON`` card
    (with ``LONGSTRN``, which announces the long-string convention its length needs) and a VOTable
    ``INFO`` element; CSV has no place for it (a ``provenance.json`` lies beside every CSV we write).
    """
    path = Path(path)
    if fmt == "ecsv":
        format_columns(table).write(path, format="ascii.ecsv", overwrite=True)
    elif fmt == "csv":
        plain = format_columns(table)
        plain.meta.clear()
        plain.write(path, format="ascii.csv", overwrite=True)
    elif fmt == "votable":
        prov = _provenance_json(table)
        _write_votable_file(format_columns(table), path, {} if prov is None else {PROVENANCE_META: prov})
    elif fmt == "fits":
        _write_fits_file(table, path)
    else:
        raise ValueError(f"unknown table format {fmt!r}; one of {', '.join(TABLE_FORMATS)}")
    return path


def _write_fits_file(table, path: Path) -> None:
    """A FITS binary table with full precision, units, descriptions as ``TCOMMn`` and provenance as
    ``PROVJSON``. A card value longer than 68 characters is continued (the OGIP long-string
    convention), and a file using the convention must say so with ``LONGSTRN``: without it a FITS
    verifier warns."""
    from astropy.io import fits

    out = format_columns(table, round_floats=False)
    prov = _provenance_json(table)
    out.meta = {}
    hdu = fits.table_to_hdu(out)
    header = hdu.header
    long_text = False
    for i, name in enumerate(out.colnames, start=1):
        text = out[name].description
        if text:
            header[f"TCOMM{i}"] = text
            long_text |= len(text) > 68
    if prov is not None:
        header["PROVJSON"] = prov
        long_text |= len(prov) > 68
    if long_text:
        header.insert("TFIELDS", ("LONGSTRN", "OGIP 1.0", "long strings continue over CONTINUE cards"), after=True)
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path, overwrite=True)


def write_table(table, path: Path, fmt: str) -> Path:
    """Write an astropy Table atomically in ``ecsv``, ``csv``, ``votable`` or ``fits`` (see :func:`write_table_file`)."""
    with atomic_path(path) as tmp:
        write_table_file(table, tmp, fmt)
    return Path(path)


# --- fast text bodies ---------------------------------------------------------------------------
#
# The merged candidate lists are written in ECSV and CSV with astropy's header and a body written by
# pyarrow's CSV writer, about 25 times faster than astropy's row-by-row writer, with the same bytes.
# astropy writes a float64 with ``str`` (the shortest text that reads back to the same value, fixed
# notation for 1e-4 <= |x| < 1e16, ``1.0`` for whole numbers), pyarrow with another shortest-text
# algorithm, fixed for 1e-6 <= |x| < 1e10, with one-digit exponents and without ``.0``. Both give the
# same digits, so only the layout differs, and it is moved around with pyarrow's string kernels:
# ``.0`` appended to whole numbers, exponents of 10 to 15 written out, fixed values below 1e-4 given
# their exponent, one-digit exponents padded. Luminosities (1e40 and up) need nothing: both write
# them alike.

#: Characters a text value may not hold to be written unquoted (astropy would quote it, or a
#: reader take it for a separator, a quote, a line end or a comment).
_NEEDS_QUOTES = r'[\s,"#]'


def float_text(values: pa.Array, decimals: int | None = None) -> pa.Array:
    """float64 values as astropy's text writers write them (``str`` of each; null as ``nan``).

    With ``decimals``, the values are first rounded as :func:`format_columns` rounds them.
    """
    x = values.to_numpy(zero_copy_only=False).astype(np.float64, copy=False)
    if decimals is not None:
        x = np.round(x, decimals) + 0.0  # exactly format_columns' rounding
    text = pc.cast(pa.array(x, pa.float64()), pa.string())
    a = np.abs(x)
    with np.errstate(invalid="ignore"):
        whole = (x == np.trunc(x)) & (a < 1e10)  # pyarrow's fixed range: no ".0"
        big = np.isfinite(x) & (a >= 1e10) & (a < 1e16)  # pyarrow's exponent, Python's fixed notation
        small = (a < 1e-4) & (x != 0.0)  # Python's exponent; pyarrow's fixed above 1e-6, short exponents below
    if whole.any():
        text = pc.if_else(pa.array(whole), concat_text(text, ".0"), text)
    for mask, relayout in ((big, _written_out), (small, _with_exponent)):
        if mask.any():
            where = np.flatnonzero(mask)
            text = pc.replace_with_mask(text, pa.array(mask), relayout(text.take(pa.array(where)), x[where]))
    return text


def concat_text(*parts) -> pa.Array:
    """Row-wise concatenation of text arrays and scalars (no separator), in Arrow's string kernel."""
    return pc.binary_join_element_wise(*parts, "")


def _unsigned(text: pa.Array) -> tuple[pa.Array, pa.Array]:
    negative = pc.starts_with(text, "-")
    return pc.utf8_ltrim(text, "-"), negative


def _signed(text: pa.Array, negative: pa.Array) -> pa.Array:
    return pc.if_else(negative, concat_text("-", text), text)


def _written_out(text: pa.Array, x: np.ndarray) -> pa.Array:
    """pyarrow's ``d.ddde+NN`` (10 <= NN <= 15) as Python writes it: ``dddd.dd``, or ``dddd.0``."""
    body, negative = _unsigned(text)
    parts = pc.split_pattern(body, "e+")
    digits = pc.replace_substring(pc.list_element(parts, 0), ".", "")
    exponent = np.floor(np.log10(np.abs(x))).astype(np.int64)
    # one group per exponent, each cut at its own place; the groups are put back in the rows' order
    order = np.argsort(exponent, kind="stable")
    exponent, digits = exponent[order], digits.take(pa.array(order))
    bounds = np.flatnonzero(np.diff(exponent)) + 1
    pieces = []
    for lo, hi in zip(np.r_[0, bounds], np.r_[bounds, len(x)]):
        e, d = int(exponent[lo]), digits.slice(lo, hi - lo)
        whole = pc.utf8_rpad(pc.utf8_slice_codeunits(d, 0, e + 1), e + 1, "0")
        fraction = pc.utf8_slice_codeunits(d, e + 1, 64)
        fraction = pc.if_else(pc.equal(pc.utf8_length(fraction), 0), "0", fraction)
        pieces.append(concat_text(whole, ".", fraction))
    back = np.empty_like(order)
    back[order] = np.arange(len(order))
    out = pa.concat_arrays(pieces).take(pa.array(back))
    return _checked(_signed(out, negative), x)


def _with_exponent(text: pa.Array, x: np.ndarray) -> pa.Array:
    """Values below 1e-4 as Python writes them: ``d.ddde-NN`` with at least two exponent digits."""
    body, negative = _unsigned(text)
    out = pc.replace_substring_regex(body, r"e-(\d)$", r"e-0\1")
    for e in (5, 6):  # pyarrow's fixed notation: 0.0000ddd and 0.00000ddd
        sel = pc.and_(pc.starts_with(body, "0." + "0" * (e - 1)), pc.invert(pc.starts_with(body, "0." + "0" * e)))
        if not pc.any(sel).as_py():
            continue
        d = pc.utf8_slice_codeunits(body.filter(sel), 1 + e, 64)
        first, rest = pc.utf8_slice_codeunits(d, 0, 1), pc.utf8_slice_codeunits(d, 1, 64)
        mantissa = pc.if_else(pc.equal(pc.utf8_length(rest), 0), first,
                              concat_text(first, ".", rest))
        out = pc.replace_with_mask(out, sel, concat_text(mantissa, f"e-{e:02d}"))
    return _checked(_signed(out, negative), x)


def _checked(text: pa.Array, x: np.ndarray) -> pa.Array:
    # the text must read back to the value; a layout this module did not foresee is written by Python
    with np.errstate(invalid="ignore"):
        wrong = pc.cast(text, pa.float64(), safe=False).to_numpy(zero_copy_only=False) != x
    if wrong.any():
        text = pc.replace_with_mask(text, pa.array(wrong), pa.array([repr(v) for v in x[wrong].tolist()], pa.string()))
    return text


def text_writable(column: pa.ChunkedArray | pa.Array) -> bool:
    """Whether :func:`text_body` writes this column exactly as astropy would.

    float64 (nulls become NaN, as astropy's column does), integers and booleans without nulls, and text without
    nulls, without empty values and without a character that astropy would quote (or a reader
    misread); anything else is left to astropy.
    """
    t = column.type
    if pa.types.is_float64(t):
        return True
    if pa.types.is_integer(t) or pa.types.is_boolean(t):
        return column.null_count == 0
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        if column.null_count:
            return False
        return not (pc.any(pc.equal(pc.utf8_length(column), 0)).as_py()
                    or pc.any(pc.match_substring_regex(column, _NEEDS_QUOTES)).as_py())
    return False


def text_cells(table: pa.Table) -> list[pa.Array]:
    """Each column of ``table`` as the text :func:`write_table_file` writes in ECSV and CSV cells.

    Floats are rounded to the decimals their column warrants, as :func:`format_columns` does. Every
    column must pass :func:`text_writable`. The cells are the same in both formats, so a caller
    writing both formats formats them once (:func:`text_lines`).
    """
    cells = []
    for name, col in zip(table.column_names, table.columns):
        col = col.combine_chunks() if isinstance(col, pa.ChunkedArray) else col
        if pa.types.is_float64(col.type):
            doc = describe(name)
            cells.append(float_text(col, None if doc is None else doc.decimals))
        elif pa.types.is_integer(col.type):
            cells.append(pc.cast(col, pa.string()))
        elif pa.types.is_boolean(col.type):
            cells.append(pc.if_else(col, "True", "False"))  # numpy's spelling, which astropy writes
        else:
            cells.append(pc.cast(col, pa.string()))
    return cells


def text_lines(cells: list[pa.Array], delimiter: str) -> pa.Buffer:
    """The rows made of ``cells`` (:func:`text_cells`) joined by ``delimiter``, one line each, as one buffer."""
    pieces = []
    for i, cell in enumerate(cells):
        pieces += [cell, delimiter if i < len(cells) - 1 else "\n"]
    lines = concat_text(*pieces)
    if len(lines) == 0:
        return pa.py_buffer(b"")
    offsets = np.frombuffer(lines.buffers()[1], np.int32, count=len(lines) + 1, offset=4 * lines.offset)
    return lines.buffers()[2].slice(int(offsets[0]), int(offsets[-1] - offsets[0]))


def text_body(table: pa.Table, delimiter: str) -> bytes:
    """The rows of ``table`` (no header) as :func:`write_table_file` writes them in ECSV (``" "``) or CSV (``","``)."""
    return text_lines(text_cells(table), delimiter).to_pybytes()


#: Units a VOTable may carry under another spelling of the same unit: VOUnit (the VOTable unit
#: standard) has deprecated erg and Angstrom, so they are written as scaled SI units.
_VOUNIT_BASES = ("W", "nm", "Jy", "m", "s", "kg", "deg")


def vounit_string(unit) -> str | None:
    """The unit written the VOUnit way, or None when VOUnit cannot express it (e.g. ``dex``).

    A unit VOUnit knows is written as it is; a deprecated one is written as a scale times an SI
    unit of the same kind (``erg / s`` → ``1e-07W``, ``Angstrom`` → ``0.1nm``), which is the same
    unit, so the values are unchanged.
    """
    import astropy.units as u

    if unit is None:
        return None
    unit = u.Unit(unit)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        try:
            return unit.to_string("vounit")
        except (ValueError, TypeError, Warning):
            pass
    if isinstance(unit, u.FunctionUnitBase):
        return None
    for base in _VOUNIT_BASES:
        if unit.is_equivalent(base):
            return f"{unit.to(base):.10g}{base}"
    return None


def write_votable(table, path: Path, infos: dict[str, str] | None = None) -> Path:
    """Write an astropy Table as a VOTable atomically, with VOUnit units, UCDs and ``INFO`` elements.

    Columns go through :func:`format_columns`. Units VOUnit cannot express are left out (the column
    description should say them); the table's ``description`` meta becomes the table's description,
    and each ``infos`` entry an ``INFO`` element (e.g. provenance as JSON), since VOTable has no
    place for nested metadata.
    """
    with atomic_path(path) as tmp:
        _write_votable_file(format_columns(table), tmp, infos or {})
    return Path(path)


def _write_votable_file(table, path: Path, infos: dict[str, str]) -> None:
    from astropy.io.votable import from_table, writeto
    from astropy.io.votable.tree import Info

    out = table.copy(copy_data=False)
    out.meta = {"description": table.meta.get("description", "")}
    for name in out.colnames:
        out[name].unit = vounit_string(out[name].unit)
    vot = from_table(out)
    first = vot.get_first_table()
    for name, value in infos.items():
        first.infos.append(Info(name=name, value=value))
    writeto(vot, str(path))


def _json_default(obj):
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, (Path,)):
        return str(obj)
    raise TypeError(type(obj))


def read_parquet(path: Path, columns: Sequence[str] | None = None) -> pa.Table:
    """Read one of our own Parquet outputs, with a one-line error when it is damaged."""
    try:
        return pq.read_table(path, columns=columns)
    except FileNotFoundError:
        raise InputError(f"{path}: missing (it was written, then removed); run the command that writes it again "
                         "(`selector ingest` for tiles)") from None
    except (OSError, pa.ArrowException) as exc:
        raise InputError(f"{path}: damaged, cannot read ({_first_line(exc)})") from None


def astropy_table(columns: dict, meta: dict, describe_column: Callable[[str], tuple[str | None, str]]):
    """Build an astropy table from named columns, ready for any of the table writers.

    Parameters
    ----------
    columns : dict
        Column name → values (numpy arrays, sequences or Arrow arrays; Arrow text nulls become "").
    meta : dict
        Table metadata.
    describe_column : callable
        Column name → (unit or None, description or ""); what it gives is set on the column.

    Returns
    -------
    astropy.table.Table
        Object columns are written as text, and an empty text column gets a one-character dtype
        because writers refuse zero-width strings.
    """
    from astropy.table import Table

    t = Table()
    for name, values in columns.items():
        if isinstance(values, (pa.Array, pa.ChunkedArray)):
            if pa.types.is_string(values.type) or pa.types.is_large_string(values.type):
                values = np.asarray(values.fill_null("").to_pylist(), dtype=str)
            else:
                values = values.to_numpy(zero_copy_only=False)
        values = np.asarray(values)
        if values.dtype == object:
            values = values.astype(str)
        if values.dtype.kind == "U" and values.size == 0:
            values = np.zeros(0, dtype="U1")
        t[name] = values
        unit, doc = describe_column(name)
        if unit:
            t[name].unit = unit
        if doc:
            t[name].description = doc
    t.meta.update(meta)
    return t
