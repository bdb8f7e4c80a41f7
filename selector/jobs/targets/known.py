"""Known objects for ``selector targets``: the catalogue read, and candidates matched against it.

The catalogue is ``targets.known`` read directly (its refused rows kept with their reasons), or
else the ``[known]`` catalogue that ``selector ingest`` wrote.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
import pyarrow as pa

from selector.core.crossmatch import nearest_within, pairs_within
from selector.errors import InputError, SelectorError
from selector.jobs import ingest
from selector.settings.config import Config
from selector.store.io import expand_files, fingerprint, iter_chunks, read_parquet
from selector.store.layout import layout_of

__all__ = ["KNOWN_COLUMNS", "KnownMatch", "KnownObjects", "match_known", "read_known"]

#: Columns every known-objects table has (``redshift`` is added as NaN when missing).
KNOWN_COLUMNS = ("known_name", "ra_deg", "dec_deg", "known_class")


class KnownObjects(NamedTuple):
    """The known-objects catalogue as read.

    Attributes
    ----------
    table : pyarrow.Table
        The usable rows: :data:`KNOWN_COLUMNS` and ``redshift``.
    source : str
        The file names, for the summary and the provenance.
    fingerprint : str
        Fingerprint(s) of the file(s).
    rows_in : int
        Rows read.
    rejects : pyarrow.Table or None
        Rows of a directly read file that were refused, with the reason; None for the ingested catalogue.
    """

    table: pa.Table
    source: str
    fingerprint: str
    rows_in: int
    rejects: pa.Table | None

    @property
    def rejected(self) -> dict[str, int]:
        """Refused rows by reason."""
        if self.rejects is None:
            return {}
        reasons = self.rejects.column("reason").to_pylist()
        return {r: reasons.count(r) for r in sorted(set(reasons))}


class KnownMatch(NamedTuple):
    """The nearest known object within the radius of every candidate (blank or NaN where none)."""

    hit: np.ndarray               # bool: a known object lies within the radius
    known_name: np.ndarray        # str
    known_class: np.ndarray       # str
    known_redshift: np.ndarray    # float
    known_sep_arcsec: np.ndarray  # float

    def columns(self, rows) -> dict[str, np.ndarray]:
        """The four ``known_*`` columns of the given rows, by column name, for a written table."""
        return {name: getattr(self, name)[rows]
                for name in ("known_name", "known_class", "known_redshift", "known_sep_arcsec")}

    def detail(self) -> np.ndarray:
        """``name (class)`` of each matched candidate's known object, in the order of ``hit``."""
        text = np.char.add(np.char.add(self.known_name[self.hit], " ("), self.known_class[self.hit])
        return np.asarray(np.char.add(text, ")"), dtype=str)


def read_known(cfg: Config) -> KnownObjects | None:
    """The known-objects catalogue: ``targets.known`` read directly, else the ingested ``[known]``; None without either."""
    tcfg = cfg.targets
    if tcfg.known is not None:
        return _read_known_files(cfg, tcfg.known)
    if cfg.known is None:
        return None
    path = layout_of(cfg).known_objects
    if not path.exists():
        raise SelectorError(f"{path}: not found; run `selector ingest --config ...` to ingest the [known] catalogue")
    table = read_parquet(path)
    for col in KNOWN_COLUMNS:
        if col not in table.column_names:
            raise InputError(f"{path}: column '{col}' is missing; run `selector ingest --config ...` again")
    if "redshift" not in table.column_names:
        table = table.append_column("redshift", pa.array(np.full(table.num_rows, np.nan)))
    return KnownObjects(table, path.name, fingerprint(path), table.num_rows, None)


def _read_known_files(cfg: Config, cat) -> KnownObjects:
    """Map and check the files of ``targets.known`` as ingest would, keeping the refused rows."""
    fields = ingest.plan_fields(cat, "known")
    sources = list(dict.fromkeys(f.source for f in fields))
    paths = expand_files(cat.files, cfg.path("."))
    parts, rejects, rows_in = [], [], 0
    for chunk in iter_chunks(paths, cat.format, sources, cat.chunk_rows):
        table, reason, column = ingest.map_chunk(chunk, fields, ingest.IdKind())
        rows_in += chunk.table.num_rows
        bad = np.flatnonzero(reason >= 0)
        rejects.append(pa.table({
            "input_file": pa.array([chunk.path.name] * bad.size, pa.string()),
            "input_row": pa.array(chunk.first_row + bad, pa.int64()),
            "reason": pa.array([ingest.REASONS[i] for i in reason[bad]], pa.string()),
            "column": pa.array(column[bad].tolist(), pa.string())}))
        parts.append(table.filter(pa.array(reason < 0)))
    table = pa.concat_tables(parts) if parts else pa.table({c: pa.array([], pa.float64()) for c in KNOWN_COLUMNS})
    if "redshift" not in table.column_names:
        table = table.append_column("redshift", pa.array(np.full(table.num_rows, np.nan)))
    rejects = pa.concat_tables(rejects) if rejects else None
    if table.num_rows + (0 if rejects is None else rejects.num_rows) != rows_in:
        raise SelectorError("internal error: rows of the known-objects files were lost; please report this")
    prints = ";".join(f"{p.name}={fingerprint(p)}" for p in paths)
    return KnownObjects(table, ", ".join(p.name for p in paths), prints, rows_in, rejects)


def match_known(ra_deg: np.ndarray, dec_deg: np.ndarray, known: KnownObjects, radius_arcsec: float) -> KnownMatch:
    """The nearest known object within ``radius_arcsec`` of each candidate position (deg)."""
    k = known.table
    n = len(ra_deg)
    pairs = pairs_within(ra_deg, dec_deg, k.column("ra_deg").to_numpy(zero_copy_only=False).astype(float),
                         k.column("dec_deg").to_numpy(zero_copy_only=False).astype(float), radius_arcsec, workers=1)
    match = nearest_within(pairs, n)
    hit = match.index_b >= 0
    take = pa.array(match.index_b[hit])
    name = np.full(n, "", dtype=object)
    klass = np.full(n, "", dtype=object)
    redshift = np.full(n, np.nan)
    name[hit] = k.column("known_name").cast(pa.string()).take(take).fill_null("").to_pylist()
    klass[hit] = k.column("known_class").cast(pa.string()).take(take).fill_null("").to_pylist()
    redshift[hit] = k.column("redshift").cast(pa.float64()).take(take).to_numpy(zero_copy_only=False)
    return KnownMatch(hit, name.astype(str), klass.astype(str), redshift, match.separation_arcsec)
