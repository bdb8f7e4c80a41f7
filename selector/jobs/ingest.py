"""Ingest: map the user's columns onto roles, convert units, validate every row, split into tiles.

The input is streamed chunk by chunk, so its size is bounded by disk, not memory:

1. each chunk is mapped onto the canonical columns (:func:`map_chunk`), invalid rows go to the
   rejects table with a reason code, and accepted rows are buffered per tile and spilled to a spool
   folder; identifiers are spilled separately, hashed into buckets;
2. each identifier bucket is checked for duplicates (the first occurrence in input order is kept);
3. each tile's spooled parts are joined, duplicates dropped, rows sorted by a fine HEALPix index
   and written as one Parquet file.

Every row that enters is accounted for: ``rows_in == accepted + rejected`` is checked before the
summary is written, and a mismatch is an internal error, never silently passed.
"""

from __future__ import annotations

import json
import shutil
from collections import Counter, defaultdict
from dataclasses import dataclass, field
from pathlib import Path

import astropy.units as u
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from selector import __version__
from selector.core import schema, tiles
from selector.settings.config import CatalogueConfig, Config, config_hash
from selector.errors import InputError, SelectorError
from selector.jobs.progress import Progress
from selector.store.io import (DurableBatch, concat_text, expand_files, file_columns, fingerprint, float_text, iter_chunks,
                               missing_column_message, no_space, no_space_error, write_json, write_parquet)
from selector.jobs.checks import ingest_findings, sample_rows, settle
from selector.jobs.run.execute import fault
from selector.store.generations import carry_over, commit_generation, new_generation
from selector.store.layout import Layout, layout_of
from selector.store.lock import output_lock
from selector.core.photometry import VEGA_TO_AB_MAG

#: Reason codes, in the order they are tested; a row is rejected for the first that applies.
REASONS = (
    "missing_id",
    "unparsable_value",
    "non_finite_position",
    "dec_out_of_range",
    "negative_error",
    "missing_position_error",
    "correlation_out_of_range",
    "non_finite_value",
    "beyond_physical_limit",
    "duplicate_id",
)

#: Values no star or quasar can have, in canonical units: a row beyond them is rejected
#: (``beyond_physical_limit``). The fastest known star moves about 10.4 arcsec/yr and the nearest
#: has a parallax of about 0.77 arcsec (common practice); errors beyond the same limits say nothing.
#: Bounding the motions also bounds every tile's margin (it grows with the largest own motion).
PHYSICAL_LIMITS = {"parallax_mas": 1e3, "parallax_error_mas": 1e3, "pmra_mas_yr": 1e4, "pmdec_mas_yr": 1e4,
                   "pmra_error_mas_yr": 1e4, "pmdec_error_mas_yr": 1e4}

# Oke & Gunn 1983, ApJ 266, 713 define m_AB = -2.5 log10(f_nu / erg s^-1 cm^-2 Hz^-1) - 48.60, i.e. a zero
# point of 3630.78 Jy (1 Jy = 1e-23 cgs); the rounded 3631 Jy would shift every magnitude by 6.6e-5 mag.
_AB_ZERO_POINT_JY = 10.0 ** (-0.4 * 48.60) * 1e23
_REASON_NAMES = pa.array(REASONS, pa.string())
_N_BUCKETS = 64
_SPOOL_ROWS = 2_000_000


@dataclass(frozen=True)
class _Field:
    """One output column: where it comes from and how it is converted and checked."""

    canonical: str
    source: str
    kind: str                  # id, lon, lat, value, error, corr, flag, text, magnitude, magnitude_error
    scale: float | None = None  # multiply to get the canonical unit (None: decided per file)
    unit: str | None = None     # canonical unit, also written to the Parquet field metadata
    given_unit: str | None = None
    band: str | None = None
    offset_mag: float = 0.0    # added to an AB/Vega magnitude to reach the canonical system
    flux: bool = False
    null_values: tuple = ()    # values the catalogue uses for "missing" (sentinels such as -999)


def plan_fields(cat: CatalogueConfig, kind: str) -> list[_Field]:
    """The list of output columns of a catalogue, from its role mapping and magnitudes."""
    out = []
    for r in schema.ROLES[kind]:
        spec = cat.columns.get(r.role)
        if spec is None:
            continue
        out.append(_Field(r.canonical, spec.column, r.kind, unit=r.unit, given_unit=spec.unit,
                          null_values=tuple(spec.null_values)))
    for m in cat.magnitudes:
        if kind == "infrared":
            mag_col, err_col = schema.infrared_mag_column(m.band), schema.infrared_error_column(m.band)
            # canonical infrared system is Vega: an AB column (or a flux) loses the band's AB offset
            to_canonical = -VEGA_TO_AB_MAG[m.band] if (m.system == "ab" or u.Unit(m.unit) != u.mag) else 0.0
        else:
            mag_col, err_col = schema.optical_mag_column(m.band), schema.optical_error_column(m.band)
            to_canonical = float(m.vega_to_ab_mag) if (m.system == "vega" and u.Unit(m.unit) == u.mag) else 0.0
        flux = u.Unit(m.unit) != u.mag
        out.append(_Field(mag_col, m.column, "magnitude", unit="mag", given_unit=m.unit, band=m.band,
                          offset_mag=to_canonical, flux=flux, null_values=tuple(m.null_values)))
        if m.error_column:
            out.append(_Field(err_col, m.error_column, "magnitude_error", unit="mag", given_unit=m.unit,
                              band=m.band, flux=flux, null_values=tuple(m.null_values)))
    return out


def _source_columns(fields: list[_Field]) -> list[str]:
    cols = []
    for f in fields:
        if f.source not in cols:
            cols.append(f.source)
    return cols


def _scale(field: _Field, file_units: dict[str, str], path: Path) -> float:
    """Factor from the column's unit (config, else the file's, else canonical) to the canonical unit."""
    if field.kind in ("magnitude", "magnitude_error", "id", "text"):
        return 1.0
    # dimensionless roles convert too: the config accepts e.g. unit = "%" for a correlation
    target = u.Unit(field.unit) if field.unit else u.dimensionless_unscaled
    text = field.given_unit or file_units.get(field.source) or field.unit
    if text is None:
        return 1.0
    try:
        return float(u.Unit(text).to(target))
    except (ValueError, u.UnitsError) as exc:
        raise InputError(f"{path}: column '{field.source}' has unit {text!r}, which cannot be converted to "
                         f"{field.unit or 'a plain number'} ({exc}); set its unit in the config") from None


def _flag_as_number(arr):
    """A boolean flag column as 0/1 integers (other types pass unchanged to :func:`_as_float`)."""
    if pa.types.is_boolean(arr.type):
        return pc.cast(arr, pa.int8())
    return arr


def _as_float(arr: pa.ChunkedArray | pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """float64 values (NaN for null) and a mask of values present but not parsable as numbers."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    if pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type):
        try:
            values = pc.cast(pc.utf8_trim_whitespace(arr), pa.float64())
            return values.to_numpy(zero_copy_only=False).astype(float, copy=False), np.zeros(len(arr), bool)
        except pa.ArrowInvalid:
            text = pd.Series(arr.to_pandas(), dtype=object)
            values = pd.to_numeric(text.str.strip(), errors="coerce").to_numpy(float)
            bad = text.notna().to_numpy() & np.isnan(values) & ~text.str.strip().str.lower().isin(["nan", ""]).to_numpy()
            return values, bad
    if pa.types.is_boolean(arr.type) or not (pa.types.is_integer(arr.type) or pa.types.is_floating(arr.type)
                                            or pa.types.is_decimal(arr.type)):
        raise TypeError(f"holds {arr.type} values, not numbers")
    # a view of Arrow's buffer where it can be (read-only: callers make new arrays, never write to it)
    values = pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False).astype(float, copy=False)
    return values, np.zeros(len(arr), bool)


class IdKind:
    """Remembers whether a catalogue's ids are integers or text, fixed by the first chunk."""

    def __init__(self):
        self.kind = None

    def convert(self, arr) -> tuple[pa.Array, np.ndarray, np.ndarray]:
        """(ids, missing mask, unparsable mask)."""
        if isinstance(arr, pa.ChunkedArray):
            arr = arr.combine_chunks()
        if self.kind is None:
            self.kind = "int" if (pa.types.is_integer(arr.type) or pa.types.is_floating(arr.type)) else "text"
        n = len(arr)
        if self.kind == "int" and pa.types.is_integer(arr.type):
            # integers need no parsing: only a null is missing, only a value beyond int64 is bad
            # (and a detour through float64 would refuse ids beyond 2**53)
            missing = arr.is_null().to_numpy(zero_copy_only=False) if arr.null_count else np.zeros(n, bool)
            bad = np.zeros(n, bool)
            if pa.types.is_uint64(arr.type):
                bad = pc.fill_null(pc.greater(arr, pa.scalar(np.iinfo(np.int64).max, pa.uint64())), False).to_numpy(zero_copy_only=False)
                arr = pc.if_else(pa.array(bad), pa.scalar(0, pa.uint64()), arr)
            return pc.cast(arr, pa.int64()).fill_null(0), missing, bad
        if self.kind == "int":
            values, bad = _as_float(arr)
            missing = np.isnan(values) & ~bad
            integral = np.isfinite(values) & (values == np.round(values)) & (np.abs(values) < 2**63)
            bad = bad | (~missing & ~integral)
            if pa.types.is_integer(arr.type):
                ids = pc.cast(arr, pa.int64()).fill_null(0)
            else:
                ids = pa.array(np.where(integral, values, 0).astype(np.int64))
            return ids, missing, bad
        text = pc.utf8_trim_whitespace(pc.cast(arr, pa.string()))
        missing = pc.fill_null(pc.equal(text, ""), True).to_numpy(zero_copy_only=False)
        return text.fill_null(""), missing, np.zeros(n, bool)


def map_chunk(chunk, fields: list[_Field], id_kind: IdKind):
    """Map one input chunk onto canonical columns and validate it.

    Returns
    -------
    table : pyarrow.Table
        Canonical columns of every row of the chunk (rejected rows included, see ``reason``).
    reason : numpy.ndarray of int8
        Index into :data:`REASONS` of the first failing check, or −1 for an accepted row.
    column : numpy.ndarray of object
        The source column that failed, or None.
    """
    n = chunk.table.num_rows
    reason = np.full(n, -1, np.int8)
    column = np.full(n, None, object)

    def flag(mask, code, source):
        if not mask.any():  # the usual case: most checks find nothing in a chunk
            return
        hit = mask & (reason < 0)
        reason[hit] = REASONS.index(code)
        column[hit] = source

    arrays, names = [], []
    checks = []  # deferred so that the reason order holds across columns
    for f in fields:
        raw = chunk.table.column(f.source)
        if f.kind == "id":
            ids, missing, bad = id_kind.convert(raw)
            checks.append(("missing_id", missing, f.source))
            checks.append(("unparsable_value", bad, f.source))
            arrays.append(ids)
            names.append(f.canonical)
            continue
        if f.kind == "text":
            arrays.append(pc.cast(raw, pa.string()).combine_chunks() if isinstance(raw, pa.ChunkedArray)
                          else pc.cast(raw, pa.string()))
            names.append(f.canonical)
            continue
        if f.kind == "flag":
            raw = _flag_as_number(raw)
        try:
            values, bad = _as_float(raw)
        except TypeError as exc:
            raise InputError(f"{chunk.path}: column '{f.source}' {exc}; map a numeric column to "
                             f"{f.canonical}") from None
        checks.append(("unparsable_value", bad, f.source))
        values = _blank_sentinels(values, f.null_values)
        if f.kind == "flag":
            # any nonzero value means "set": kept as 0/1 so a cut and a model read one meaning
            values = np.where(np.isnan(values), np.nan, (values != 0).astype(float))
        elif f.kind in ("magnitude", "magnitude_error"):
            values = _magnitude(values, f, raw_flux=None) if f.kind == "magnitude" else values
        else:
            scale = _scale(f, chunk.units, chunk.path)
            # x * 1.0 is x: skipping it saves a pass and a fresh array per column
            values = values * scale if scale != 1.0 else values
        if f.kind in ("lon", "lat"):
            checks.append(("non_finite_position", ~np.isfinite(values), f.source))
            if f.kind == "lat":
                checks.append(("dec_out_of_range", np.abs(values) > 90.0, f.source))
            else:
                values = np.mod(values, 360.0)
                values[values >= 360.0] = 0.0  # mod of a tiny negative number rounds up to 360
        elif f.kind in ("error", "position_error"):
            checks.append(("negative_error", values < 0, f.source))
            if f.kind == "position_error":
                # a pair's match probability needs both positions' errors: a row without one cannot be matched
                checks.append(("missing_position_error", np.isnan(values), f.source))
            checks.append(("non_finite_value", np.isinf(values), f.source))
        elif f.kind == "corr":
            checks.append(("correlation_out_of_range", np.abs(values) > 1.0, f.source))
        else:
            checks.append(("non_finite_value", np.isinf(values), f.source))
        if f.canonical in PHYSICAL_LIMITS:
            with np.errstate(invalid="ignore"):
                checks.append(("beyond_physical_limit", np.abs(values) > PHYSICAL_LIMITS[f.canonical], f.source))
        arrays.append(pa.array(values, pa.float64()))
        names.append(f.canonical)
    # flux-density errors need the flux itself; done here once the magnitudes are known
    arrays = _flux_errors(chunk, fields, names, arrays, checks)
    for code in REASONS:
        for c, mask, source in checks:
            if c == code:
                flag(mask, code, source)
    return pa.table(arrays, names=names), reason, column


def _blank_sentinels(values: np.ndarray, null_values: tuple) -> np.ndarray:
    """Values the catalogue uses to mean "missing" become NaN, before any unit is applied."""
    if null_values:
        values = np.where(np.isin(values, np.asarray(null_values, float)), np.nan, values)
    return values


def _magnitude(values: np.ndarray, f: _Field, raw_flux=None) -> np.ndarray:
    if f.flux:
        jy = values * float(u.Unit(f.given_unit).to(u.Jy))
        with np.errstate(divide="ignore", invalid="ignore"):
            # a non-positive flux is a non-detection: missing, not an error
            mag = np.where(jy > 0, -2.5 * np.log10(jy / _AB_ZERO_POINT_JY), np.nan)
        return mag + f.offset_mag
    return values + f.offset_mag


def _flux_errors(chunk, fields, names, arrays, checks):
    for f in fields:
        if f.kind != "magnitude_error":
            continue
        i = names.index(f.canonical)
        err = arrays[i].to_numpy(zero_copy_only=False)
        checks.append(("negative_error", err < 0, f.source))
        checks.append(("non_finite_value", np.isinf(err), f.source))
        if f.flux:
            mag_field = next(g for g in fields if g.kind == "magnitude" and g.band == f.band)
            flux = _blank_sentinels(_as_float(chunk.table.column(mag_field.source))[0], mag_field.null_values)
            with np.errstate(divide="ignore", invalid="ignore"):
                # first-order propagation of a flux error into magnitudes: 2.5/ln(10) · σ_f / f
                err = np.where(flux > 0, 2.5 / np.log(10.0) * err / flux, np.nan)
            arrays[i] = pa.array(err, pa.float64())
    return arrays


def _raw_rows(chunk, rows: np.ndarray, sources: list[str]) -> pa.Array:
    """JSON of the original values of some rows, so a rejected row can be found and mended."""
    return values_json(chunk.table.select(sources).take(pa.array(rows, pa.int64())))


# JSON text that json.dumps would escape (quotes, backslashes, control and non-ASCII characters)
_JSON_ESCAPED = r'["\\\x00-\x1f\x7f-\x{10ffff}]'


def _json_strings(table: pa.Table, name: str) -> pa.Array:
    """``json.dumps(None if v is None else str(v))`` of every value of a column, built as a column."""
    col = table.column(name).combine_chunks()
    t = col.type
    if pa.types.is_floating(t):
        text = float_text(col)  # str() of each value, as Python writes a float
    elif pa.types.is_integer(t):
        text = pc.cast(col, pa.string())
    elif pa.types.is_string(t) or pa.types.is_large_string(t):
        text = pc.cast(col, pa.string())
    else:  # other types are rare in rejects: Python's own str()
        text = pa.array([None if v is None else str(v) for v in col.to_pylist()], pa.string())
    quoted = concat_text('"', text, '"')
    escape = pc.fill_null(pc.match_substring_regex(text, _JSON_ESCAPED), False)
    if pc.any(escape).as_py():
        mask = escape.to_numpy(zero_copy_only=False)
        values = [json.dumps(v) for v, m in zip(text.to_pylist(), mask) if m]
        quoted = pc.replace_with_mask(quoted, pa.array(mask), pa.array(values, pa.string()))
    if col.null_count:
        quoted = pc.if_else(pc.is_null(col), pa.scalar("null"), quoted)
    return quoted


def values_json(table: pa.Table) -> pa.Array:
    """One JSON object of each row's values as text (``None`` → ``null``), built column by column.

    The text is exactly ``json.dumps({name: None if v is None else str(v) ...}, sort_keys=True)`` of
    each row, which this used to build one row at a time (about 15 µs a row).
    """
    names = sorted(table.column_names)
    if not names or table.num_rows == 0:
        return pa.array(["{}"] * table.num_rows, pa.string())
    pieces = []
    for i, name in enumerate(names):
        pieces.append(("{" if i == 0 else ", ") + json.dumps(name) + ": ")
        pieces.append(_json_strings(table, name))
    pieces.append("}")
    return concat_text(*pieces)


def _reject_table(*, files: pa.Array, rows: np.ndarray, reasons: pa.Array, columns: pa.Array,
                  values: pa.Array) -> pa.Table:
    return pa.table({"input_file": files, "input_row": pa.array(rows, pa.int64()), "reason": reasons,
                     "column": columns, "values": values}, schema=REJECT_SCHEMA)


REJECT_SCHEMA = pa.schema([
    ("input_file", pa.string()), ("input_row", pa.int64()), ("reason", pa.string()),
    ("column", pa.string()), ("values", pa.string()),
])


@dataclass
class IngestSummary:
    catalogue: str
    rows_in: int
    accepted: int
    rejected: dict[str, int]
    rows_per_tile: dict[int, int]
    files: dict[str, str]
    #: evenly spaced accepted rows (canonical columns) for the plausibility checks; not written
    sample: pa.Table | None = field(default=None, repr=False, compare=False)

    def as_dict(self):
        return {
            "catalogue": self.catalogue, "rows_in": self.rows_in, "accepted": self.accepted,
            "rejected": dict(sorted(self.rejected.items())), "rejected_total": sum(self.rejected.values()),
            "rows_per_tile": {str(k): v for k, v in sorted(self.rows_per_tile.items())},
            "input_fingerprints": dict(sorted(self.files.items())),
        }


def ingest_catalogue(cfg: Config, kind: str, log=print) -> IngestSummary:
    """Ingest one catalogue (``astrometric``, ``infrared`` or ``known``) into a new generation of
    tiles; the other catalogues of the generation in force are carried over (see :func:`ingest`)."""
    return ingest(cfg, log=log, kinds=(kind,))[kind]


def _known_rows(paths) -> int | None:
    """Rows of the input when every file says so in its metadata (Parquet), for the time left; else None."""
    total = 0
    for path in paths:
        if Path(path).suffix.lower() not in (".parquet", ".pq"):
            return None
        try:
            total += pq.read_metadata(path).num_rows
        except (OSError, pa.ArrowException):
            return None  # the reader reports it, with the file's name
    return total


def _ingest_into(cfg: Config, kind: str, lay: Layout, log=print) -> IngestSummary:
    """Ingest one catalogue into the generation of ``lay`` (pinned to a new, not yet current one)."""
    cat: CatalogueConfig = getattr(cfg, kind)
    fields = plan_fields(cat, kind)
    sources = _source_columns(fields)
    paths = expand_files(cat.files, cfg.path("."))
    order = cfg.tiling.order
    spool = lay.ingest_spool(kind)
    if spool.exists():
        shutil.rmtree(spool)
    spool.mkdir(parents=True)
    tiled = kind != "known"
    id_col = schema.ID_COLUMN[kind]

    rows_in = 0
    rejected: Counter = Counter()
    reject_parts: list[pa.Table] = []
    file_starts: list[int] = []
    buffers: list[tuple[pa.Table, np.ndarray]] = []  # accepted rows of each chunk, with their tiles
    id_buffers: list[pa.Table] = []
    buffered = 0
    id_kind = IdKind()
    samples: list[pa.Table] = []
    sampled = 0
    # One Arrow IPC file per flush, one record batch per tile (and per id bucket): a few large files
    # instead of one small Parquet file per tile per flush, which at order 5 over the whole sky meant
    # 12288 files per flush and cost more than everything else together.
    tile_index: dict[int, list[tuple[int, int]]] = defaultdict(list)
    id_index: dict[int, list[tuple[int, int]]] = defaultdict(list)
    spool_files: list[tuple[Path, Path]] = []

    def by_tile():
        table = pa.concat_tables([t for t, _ in buffers])
        tile = np.concatenate([k for _, k in buffers])
        # stable, so rows of a tile stay in input order; numpy sorts 16-bit keys by radix, ~6× faster
        key = tile.astype(np.uint16) if tiles.n_tiles(order) <= np.iinfo(np.uint16).max + 1 else tile
        order_t = np.argsort(key, kind="stable")
        table, tile = _take(table, order_t), tile[order_t]
        starts = np.flatnonzero(np.r_[True, tile[1:] != tile[:-1]]) if len(tile) else np.zeros(0, np.int64)
        ends = np.r_[starts[1:], len(tile)].astype(np.int64)
        return [(int(tile[a]), table.slice(a, b - a)) for a, b in zip(starts, ends)]

    def by_bucket():
        ids = pa.concat_tables(id_buffers).combine_chunks()
        bucket = ids.column("_bucket").to_numpy()
        orderb = np.argsort(bucket, kind="stable")
        ids, bucket = ids.take(pa.array(orderb)).drop(["_bucket"]), bucket[orderb]
        edges = np.searchsorted(bucket, np.arange(_N_BUCKETS + 1))
        return [(b, ids.slice(edges[b], edges[b + 1] - edges[b])) for b in range(_N_BUCKETS) if edges[b + 1] > edges[b]]

    def write_spool(path, parts, index, number):
        if not parts:
            return
        with pa.OSFile(str(path), "wb") as sink, pa.ipc.new_file(sink, parts[0][1].schema) as writer:
            for i, (key, part) in enumerate(parts):
                writer.write_batch(part.combine_chunks().to_batches()[0])
                index[key].append((number, i))

    def flush():
        nonlocal buffered
        number = len(spool_files)
        paths_ = (lay.ingest_spool_file(kind, "tiles", number), lay.ingest_spool_file(kind, "ids", number))
        if buffers:
            write_spool(paths_[0], by_tile(), tile_index, number)
        if id_buffers:
            write_spool(paths_[1], by_bucket(), id_index, number)
        spool_files.append(paths_)
        buffers.clear()
        id_buffers.clear()
        buffered = 0

    last_path = None
    reading = Progress(f"ingest {kind}: rows read", _known_rows(paths), unit="rows",
                       interval_s=cfg.run.progress_interval_s, log=log)
    for chunk in iter_chunks(paths, cat.format, sources, cat.chunk_rows):
        reading.update(rows_in)
        if chunk.path != last_path:
            file_starts.append(rows_in)
            last_path = chunk.path
        n = chunk.table.num_rows
        table, reason, column = map_chunk(chunk, fields, id_kind)
        bad = np.flatnonzero(reason >= 0)
        if bad.size:
            rejected.update(REASONS[i] for i in reason[bad])
            # built as columns: a reject costs about as much as an accepted row
            reject_parts.append(_reject_table(
                files=pa.repeat(pa.scalar(str(chunk.path), pa.string()), bad.size),
                rows=chunk.first_row + bad,
                reasons=pc.take(_REASON_NAMES, pa.array(reason[bad].astype(np.int64))),
                columns=pa.array(column[bad], pa.string()),
                values=_raw_rows(chunk, bad, sources)))
        good = np.flatnonzero(reason < 0)
        if bad.size:
            table = _take(table, good)
        global_row = rows_in + good
        picked = sample_rows(table, sampled)
        if picked is not None:
            samples.append(picked)
            sampled += picked.num_rows
        ra = table.column("ra_deg").to_numpy()
        dec = table.column("dec_deg").to_numpy()
        fine = tiles.fine_index(ra, dec)
        tile = tiles.parent(fine, order) if tiled else np.zeros(len(fine), np.int64)
        table = table.append_column("_fine", pa.array(fine)).append_column("_row", pa.array(global_row, pa.int64()))
        ids = table.column(id_col)
        bucket = (pd.util.hash_array(ids.to_numpy(zero_copy_only=False)) % _N_BUCKETS).astype(np.int16)
        id_buffers.append(pa.table({"_id": ids, "_row": pa.array(global_row, pa.int64()), "_bucket": bucket}))
        if len(tile):
            buffers.append((table, tile))
        rows_in += n
        buffered += n
        if buffered >= _SPOOL_ROWS:
            flush()
    reading.update(rows_in, total=rows_in)
    reading.finish()
    readers = []
    if spool_files:
        flush()
        _allow_open_files(2 * len(spool_files) + 64)
        # read back one record batch at a time (not memory-mapped, so resident memory stays bounded)
        for tile_path, id_path in spool_files:
            readers.append(tuple(pa.ipc.open_file(pa.OSFile(str(q))) if q.exists() else None
                                 for q in (tile_path, id_path)))
        tile_parts = {t: [(readers[f][0], i) for f, i in refs] for t, refs in tile_index.items()}
        id_parts = {b: [(readers[f][1], i) for f, i in refs] for b, refs in id_index.items()}
    else:
        # everything fitted in memory: no need for a round trip through the spool
        tile_parts = {t: [part] for t, part in by_tile()} if buffers else {}
        id_parts = {0: id_buffers}

    duplicates = _find_duplicates(id_parts)
    file_list = [str(p) for p in paths]
    if duplicates.size:
        rejected["duplicate_id"] += int(duplicates.size)
    # the generation is new and read by nobody until it is put in force, after it has been made
    # durable as a whole (commit_generation): its files need no sync of their own
    batch = DurableBatch(sync=False)
    rows_per_tile = _write_tiles(cfg, kind, tile_parts, log=log, lay=lay, duplicates=duplicates, id_col=id_col, fields=fields,
                                 reject_parts=reject_parts, file_list=file_list, file_starts=np.asarray(file_starts),
                                 batch=batch)
    batch.commit()
    accepted = sum(rows_per_tile.values())
    del tile_parts, id_parts, readers  # closes the spool files before they are removed
    shutil.rmtree(spool)

    rejects = pa.concat_tables(reject_parts) if reject_parts else REJECT_SCHEMA.empty_table()
    rejects = rejects.sort_by([("input_file", "ascending"), ("input_row", "ascending")])
    write_parquet(rejects, lay.ingest_rejects(kind), batch=batch)
    summary = IngestSummary(kind, rows_in, accepted, dict(rejected), rows_per_tile,
                            {input_name(cfg, p): fingerprint(p) for p in paths},
                            sample=pa.concat_tables(samples, promote_options="permissive") if samples else None)
    if rows_in != accepted + sum(rejected.values()) or len(rejects) != sum(rejected.values()):
        raise SelectorError(f"internal error: {kind} ingest lost rows ({rows_in} in, {accepted} accepted, "
                            f"{sum(rejected.values())} rejected); nothing was trusted, please report this")
    info = summary.as_dict()
    info.update({"order": order, "epoch_jyear": cat.epoch_jyear, "version": __version__,
                 "config_hash": config_hash(cfg, (kind, "tiling"))})
    write_json(info, lay.ingest_summary(kind), batch=batch)
    batch.commit()
    return summary


def _load(part) -> pa.Table:
    """A buffered table, or (spool reader, record batch number)."""
    if isinstance(part, pa.Table):
        return part
    reader, i = part
    return pa.Table.from_batches([reader.get_batch(i)])


def _allow_open_files(needed: int) -> None:
    """Raise the soft limit on open files if the spool needs more (every spool file stays open)."""
    try:
        import resource
    except ImportError:  # not a POSIX system: nothing to adjust
        return
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    if soft != resource.RLIM_INFINITY and soft < needed:
        target = needed if hard == resource.RLIM_INFINITY else min(needed, hard)
        resource.setrlimit(resource.RLIMIT_NOFILE, (target, hard))
        if target < needed:
            raise SelectorError(f"ingest needs {needed} open spool files but the system allows {hard}; "
                                "raise the hard open-file limit (ulimit -Hn) or split the input")


def _take(table: pa.Table, index: np.ndarray) -> pa.Table:
    """``table.take(index)`` with every column in one chunk (the Parquet writer's pages then do not
    depend on how the rows were gathered). Arrow's own gather draws on its memory pool, which keeps
    and reuses freed memory: a numpy gather allocates fresh pages each time, and the kernel zeroing
    them cost more than the gather itself."""
    # the indices come from argsort, so always in range: no bounds check
    return pc.take(table, pa.array(np.asarray(index, np.int64)), boundscheck=False).combine_chunks()


def _find_duplicates(buckets: dict) -> np.ndarray:
    """Global row numbers of every repeat of an id (all but its first occurrence in input order).

    ``buckets`` maps a hash bucket to its parts (tables or spooled files); equal ids share a bucket,
    so each bucket is checked on its own and memory is bounded by the largest bucket.
    """
    out = []
    for b in sorted(buckets):
        if not buckets[b]:
            continue
        t = pa.concat_tables([_load(p) for p in buckets[b]])
        if "_bucket" in t.column_names:
            t = t.drop(["_bucket"])
        t = t.sort_by([("_id", "ascending"), ("_row", "ascending")])
        ids = t.column("_id").to_numpy(zero_copy_only=False)
        rows = t.column("_row").to_numpy()
        if len(ids) > 1:
            repeat = np.r_[False, ids[1:] == ids[:-1]]
            out.append(rows[repeat])
    return np.sort(np.concatenate(out)) if out else np.zeros(0, np.int64)


def _write_tiles(cfg, kind, parts, *, log, lay, duplicates, id_col, fields, reject_parts, file_list, file_starts, batch):
    # every catalogue but the known objects is tiled; those are one file
    order, tiled = cfg.tiling.order, kind != "known"
    units = {f.canonical: f.unit for f in fields if f.unit}
    meta = {"catalogue": kind, "order": str(order), "epoch_jyear": json.dumps(getattr(cfg, kind).epoch_jyear),
            "version": __version__}
    rows_per_tile = {}
    written = set()
    writing = Progress(f"ingest {kind}: tiles written", len(parts), unit="tiles", interval_s=cfg.run.progress_interval_s,
                       log=log)
    for tile in sorted(parts):
        t = pa.concat_tables([_load(p) for p in parts[tile]])
        rows = t.column("_row").to_numpy()
        dup = np.isin(rows, duplicates) if duplicates.size else np.zeros(len(rows), bool)
        if dup.any():
            d = t.filter(pa.array(dup))
            drow = d.column("_row").to_numpy()
            fidx = np.searchsorted(file_starts, drow, side="right") - 1
            id_source = getattr(cfg, kind).columns["id" if kind != "known" else "name"].column
            reject_parts.append(_reject_table(
                files=pc.take(pa.array(file_list, pa.string()), pa.array(fidx.astype(np.int64))),
                rows=drow - file_starts[fidx],
                reasons=pa.repeat(pa.scalar("duplicate_id", pa.string()), len(drow)),
                columns=pa.repeat(pa.scalar(id_source, pa.string()), len(drow)),
                values=values_json(d.drop(["_fine", "_row"]))))
            t = t.filter(pa.array(~dup))
        order_f = _fine_then_id_order(t, id_col)
        t = (t.combine_chunks() if order_f is None else _take(t, order_f)).drop(["_fine", "_row"])
        t = _with_units(t, units)
        if tiled:
            path = lay.tile_file(kind, order, tile)
            write_parquet(t, path, {**meta, "tile": str(tile)}, batch=batch)
            written.add(path.name)
            fault("ingest:tile")
        else:
            write_parquet(t, lay.known_objects, meta, batch=batch)
        rows_per_tile[tile] = t.num_rows
        writing.add(1)
    writing.finish()
    if tiled:
        folder = lay.order_dir(kind, order)
        # tiles left from an earlier ingest of other data would otherwise be read as current
        for stale in folder.glob("tile*.parquet") if folder.exists() else []:
            if stale.name not in written:
                stale.unlink()
    elif not parts:
        empty = pa.table({f.canonical: pa.array([], pa.float64()) for f in fields})
        write_parquet(empty, lay.known_objects, meta, batch=batch)
    return rows_per_tile


def _fine_then_id_order(table: pa.Table, id_col: str) -> np.ndarray | None:
    """Row order by fine HEALPix index, then id (both ascending, stable); None when the rows are in it.

    Catalogues are often stored in a spatial order, and then a tile's rows arrive sorted already.
    """
    fine = table.column("_fine").to_numpy()
    if np.all(fine[1:] > fine[:-1]):
        return None
    order = np.argsort(fine)
    sorted_fine = fine[order]
    if not np.any(sorted_fine[1:] == sorted_fine[:-1]):
        return order  # no two rows share a fine pixel (0.4 mas): the order is unique, ids not needed
    ids = table.column(id_col)
    if pa.types.is_integer(ids.type) and ids.null_count == 0:
        return np.lexsort((ids.to_numpy(), fine))
    return pc.sort_indices(table, sort_keys=[("_fine", "ascending"), (id_col, "ascending")]).to_numpy()


def _with_units(table: pa.Table, units: dict[str, str]) -> pa.Table:
    fields = [f.with_metadata({"unit": units[f.name]}) if f.name in units else f for f in table.schema]
    # only metadata changes: the same columns under the new schema (a cast would check every column)
    return pa.Table.from_arrays(table.columns, schema=pa.schema(fields, metadata=table.schema.metadata))


CATALOGUES = ("astrometric", "infrared", "known")


def ingest(cfg: Config, log=print, *, kinds: tuple[str, ...] | None = None,
           strict: bool = False) -> dict[str, IngestSummary]:
    """Ingest the configured catalogues into a new generation of tiles and put it in force.

    The output folder is held alone for the whole ingest (:mod:`selector.store.lock`), so no run
    reads tiles while they change and a second ingest is refused. Every catalogue is written into a
    new generation folder beside the one in force; the pointer to it is replaced in one atomic step
    only after every file is durable (:mod:`selector.store.generations`), so an ingest killed or
    stopped by a full disk leaves the previous tiles in force, whole.

    Parameters
    ----------
    cfg : Config
    log : callable
        Where the per-catalogue lines go.
    kinds : tuple of str, optional
        The catalogues to ingest (default: every configured one); the other configured catalogues
        of the generation in force are carried over unchanged.
    strict : bool
        Make the plausibility checks (:mod:`selector.jobs.checks`) errors: the new generation is
        then dropped and the previous one stays in force.

    Returns
    -------
    dict
        The :class:`IngestSummary` of each ingested catalogue, by catalogue.
    """
    configured = [k for k in CATALOGUES if getattr(cfg, k) is not None]
    kinds = tuple(configured if kinds is None else kinds)
    lay = layout_of(cfg)
    out = {}
    with output_lock(cfg, "ingest", exclusive=True):
        # everything that can be checked is checked before the first row is written
        inputs = check_inputs(cfg, kinds)
        check_space(lay.output_dir, inputs)
        current = lay.pinned()
        new = new_generation(lay)
        try:
            for kind in kinds:
                s = out[kind] = _ingest_into(cfg, kind, new, log)
                log(f"{kind}: {s.rows_in} rows in, {s.accepted} accepted, {sum(s.rejected.values())} rejected"
                    + (f" ({', '.join(f'{k}: {v}' for k, v in sorted(s.rejected.items()))})" if s.rejected else "")
                    + (f", {len(s.rows_per_tile)} tiles" if kind != "known" else ""))
            for kind in configured:
                if kind not in kinds:
                    carry_over(current, new, kind)
            settle(ingest_findings(cfg, out), strict=strict, log=log,
                   what="the new tiles were dropped and the previous ones stay in force")
            fault("ingest:commit")
            commit_generation(lay, new)
        except BaseException as exc:
            # the generation in force stays; this one's files go now (a kill leaves them to the next start)
            if _in_force(lay) != new.generation:
                shutil.rmtree(new.generation_dir(new.generation), ignore_errors=True)
            if no_space(exc) and not isinstance(exc, SelectorError):
                raise no_space_error(new.generation_dir(new.generation)) from None
            raise
    return out


def _column_keys(cat: CatalogueConfig, kind: str) -> dict[str, str]:
    """Each source column → the config key that names it (for messages)."""
    keys = {}
    for role, spec in cat.columns.items():
        keys.setdefault(spec.column, f"{kind}.columns.{role}")
    for i, m in enumerate(cat.magnitudes):
        keys.setdefault(m.column, f"{kind}.magnitudes[{i}].column")
        if m.error_column:
            keys.setdefault(m.error_column, f"{kind}.magnitudes[{i}].error_column")
    return keys


def check_inputs(cfg: Config, kinds) -> dict[str, list[Path]]:
    """Check every input file of every catalogue to ingest before any row is read: it exists, is of
    the format its name says, and holds every column the config names. Returns the files by catalogue.

    Raises
    ------
    InputError
        One line naming the file, the missing column, the key that names it, the nearest column
        and the file's columns.
    """
    out = {}
    for kind in kinds:
        cat: CatalogueConfig = getattr(cfg, kind)
        sources = _source_columns(plan_fields(cat, kind))
        keys = _column_keys(cat, kind)
        out[kind] = paths = expand_files(cat.files, cfg.path("."))
        for path in paths:
            have = file_columns(path, cat.format)
            gone = [c for c in sources if c not in have]
            if gone:
                raise InputError(missing_column_message(path, gone[0], have, keys.get(gone[0]), taken=sources))
    return out


#: Disk an ingest may need per input byte: binary inputs are spooled and then written as tiles
#: beside the generation in force; text shrinks to about half as Parquet, compressed text grows.
_DISK_PER_INPUT_BYTE = {"binary": 2.0, "text": 1.0, "compressed": 4.0}


def check_space(output_dir: Path, inputs: dict[str, list[Path]]) -> int:
    """Refuse an ingest that cannot fit: free space against an estimate from the input sizes.

    Returns the estimate in bytes.
    """
    need = 0.0
    for paths in inputs.values():
        for p in paths:
            name = p.name.lower()
            kind = "compressed" if name.endswith(".gz") else ("text" if name.endswith((".csv", ".ecsv", ".vot",
                                                                                      ".votable", ".xml")) else "binary")
            need += p.stat().st_size * _DISK_PER_INPUT_BYTE[kind]
    folder = Path(output_dir)
    while not folder.exists() and folder != folder.parent:
        folder = folder.parent
    free = shutil.disk_usage(folder).free
    if need > free:
        raise SelectorError(f"{output_dir}: {free / 2**20:,.1f} MiB free on its device but this ingest needs about "
                            f"{need / 2**20:,.1f} MiB (the new tiles are written beside those in force); free some "
                            "space or move project.output_dir")
    return int(need)


def _in_force(lay: Layout) -> str | None:
    try:
        return lay.current_generation()
    except SelectorError:
        return None


def input_name(cfg: Config, path: Path) -> str:
    """An input file as recorded in summaries and provenance: relative to the config's folder when
    it lies below it, so the same job run from another folder records the same names."""
    base = Path(cfg.base_dir)
    try:
        return Path(path).resolve().relative_to(base.resolve()).as_posix()
    except ValueError:
        return str(path)
