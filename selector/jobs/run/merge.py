"""Merging the tiles: the ranked list, the cut-flow totals, the row accounting and the provenance.

The per-tile candidates are merged into the ranked list, the cut-flows summed, the rows accounted
for, and the provenance written, each file atomically. Merged files depend only on the tiles' outputs
and the configuration, never on times, so a resumed run ends with the same bytes as an uninterrupted
one.
"""

from __future__ import annotations

import json
import os
import shutil
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from contextlib import ExitStack
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
from astropy.table import Table

from selector import __version__
from selector.core import schema
from selector.core.selection import check_accounting, rank_keys
from selector.core.tilematch import ChanceEstimate
from selector.errors import SelectorError
from selector.jobs.run.physics import Finisher, finisher, redshift_sources
from selector.jobs.run.plan import ingest_summaries
from selector.jobs.train import read_card
from selector.settings.config import MATCH_SECTIONS, SELECTION_SECTIONS, Config, config_hash
from selector.store.generations import generation_digest
from selector.store.io import (PARQUET_ROW_GROUP_ROWS, DurableBatch, describe_arrow_columns, parquet_writer_options,
                               text_cells, text_lines, text_writable, write_json, write_parquet, write_table_file,
                               write_text)
from selector.store.keys import model_path, model_sha, result_config
from selector.store.layout import MERGED_FILES, labelled_luminosities, layout_of, merge_spool


@dataclass(frozen=True)
class TileSummary:
    """A finished tile's counts, as the merge and the accounting need them.

    Attributes
    ----------
    tile : int
    rows : int
        Own rows of the tile.
    rejects : int
        Rows the tile rejected before the cuts.
    candidates : int or None
        Rows the cuts kept.
    cutflow : list of (stage, rows left)
    """

    tile: int
    rows: int
    rejects: int
    candidates: int | None
    cutflow: list

    @classmethod
    def from_record(cls, rec: dict) -> "TileSummary":
        """From a tile's manifest record."""
        return cls(int(rec["tile"]), rec["rows"], rec["rejects"], rec["candidates"], rec["cutflow"])


@dataclass
class Merged:
    """The merged outputs of a run.

    Attributes
    ----------
    tiles : int
        Tiles in the merged outputs.
    candidates : int
        Rows of the ranked list.
    cutflow : list of (stage, rows left)
        Summed over the merged tiles.
    outputs : dict
        Paths of the merged outputs, by kind (:data:`~selector.store.layout.MERGED_FILES`).
    """

    tiles: int
    candidates: int
    cutflow: list
    outputs: dict


def merged_paths(cfg: Config) -> dict[str, Path]:
    """The merged outputs' paths, by kind, in the order they are written."""
    lay = layout_of(cfg)
    return {kind: lay.merged(kind) for kind in MERGED_FILES}


def file_stats(paths) -> list:
    """``[name, size, mtime_ns]`` of each file (``None`` twice when absent)."""
    out = []
    for p in paths:
        try:
            st = os.stat(p)
            out.append([Path(p).name, st.st_size, st.st_mtime_ns])
        except FileNotFoundError:
            out.append([Path(p).name, None, None])
    return out


def provenance(cfg: Config) -> dict:
    """Config hashes, input fingerprints (from the ingest summaries), model file and package version."""
    summaries = ingest_summaries(cfg)
    model = model_path(cfg)
    return {
        "config_hash": config_hash(cfg, tuple(result_config(cfg))),
        "match_config_hash": config_hash(cfg, MATCH_SECTIONS),
        "selection_config_hash": config_hash(cfg, SELECTION_SECTIONS),
        "classifier_model_sha256": model_sha(cfg),
        # the model file relative to the output folder (so the run folder alone finds it), and the
        # sky's class proportions its probabilities were moved to
        "classifier_model_file": os.path.relpath(model, layout_of(cfg).output_dir) if model else None,
        "classifier_sky_priors": (read_card(model) or {}).get("sky_priors") if model else None,
        "input_fingerprints": {k: s["input_fingerprints"] for k, s in summaries.items()},
        "redshift_sources": redshift_sources(cfg),
        "selector_version": __version__,
        # which whole generation of tiles the run read, by content (see store/generations.py)
        "tiles_generation": generation_digest(layout_of(cfg)),
    }


def total_cutflow(summaries: list[TileSummary]) -> list[tuple[str, int]]:
    """Sum per-tile cut-flows stage by stage (every tile runs the same stages)."""
    if not summaries:
        return [("input", 0)]
    names = [name for name, _ in summaries[0].cutflow]
    totals = dict.fromkeys(names, 0)
    for s in summaries:
        stages = [name for name, _ in s.cutflow]
        if stages != names:
            raise SelectorError(f"internal error: tile {s.tile} has cut-flow stages {stages}, tile "
                                f"{summaries[0].tile} has {names}; re-run with --force")
        for name, count in s.cutflow:
            totals[name] += int(count)
    return list(totals.items())


def format_cutflow(flow: list[tuple[str, int]]) -> str:
    """A plain-text cut-flow table: stage, rows left, rows removed, fraction of the input kept."""
    width = max(len(n) for n, _ in flow)
    lines = [f"{'stage':<{width}}  {'left':>12}  {'removed':>12}  {'kept':>8}"]
    first = flow[0][1] or 1
    prev = flow[0][1]
    for name, count in flow:
        lines.append(f"{name:<{width}}  {count:>12,d}  {prev - count:>12,d}  {count / first:>8.2%}")
        prev = count
    return "\n".join(lines)


def chance_total(cfg: Config, tiles) -> dict | None:
    """Expected chance counterparts summed over the tiles' records (``cutflow.json``), or None without any.

    Each tile estimated its own from the shifted-position match (:func:`selector.core.tilematch.chance_estimate`);
    tiles are independent, so the expectations add and their errors add in quadrature.
    """
    lay = layout_of(cfg)
    parts = []
    for t in tiles:
        path = lay.tile_cutflow(t)
        record = json.loads(path.read_text()) if path.exists() else {}
        # a record written by an older version lacks fields: that tile's estimate is left out
        if "chance" in record and set(record["chance"]) == set(ChanceEstimate.__dataclass_fields__):
            parts.append(ChanceEstimate(**record["chance"]))
    if not parts:
        return None
    total = ChanceEstimate.total(parts).as_dict()
    return {**total, "tiles": len(parts), "method": "shifted positions"}


def format_chance(chance: dict | None) -> str | None:
    """One line for the run summary and the report, or None when there is no estimate."""
    if not chance:
        return None
    return (f"expected chance counterparts: {chance['expected_candidates']:.1f} ± "
            f"{chance['expected_candidates_error']:.1f} among the candidates, {chance['expected_matches']:.0f} ± "
            f"{chance['expected_matches_error']:.0f} among all matched sources (from "
            f"{chance['shifted_sources']:,} shifted positions)")


def merged_from_summaries(cfg: Config, summaries: list[TileSummary]) -> Merged:
    """What the merged outputs hold, from the tiles' records alone (when the merge is not redone)."""
    flow = total_cutflow(summaries)
    return Merged(len(summaries), sum(int(s.cutflow[-1][1]) for s in summaries) if summaries else 0,
                  flow, merged_paths(cfg))


def account(summaries: list[TileSummary], n_candidates: int, ingest: dict | None = None, *,
            failed: dict | None = None, expected_rows: dict | None = None) -> list[str]:
    """Check that every row is accounted for, per tile and in total; returns the summary lines.

    Per tile: rows = tile rejects + cut-flow input, and the cut-flow never increases. In total:
    Σ tile rows = candidates + Σ rows removed by each cut + Σ tile rejects; and, against the ingest
    summary, catalogue rows = ingest rejects + rows of the finished tiles + rows of failed tiles.

    Parameters
    ----------
    summaries : list of TileSummary
        The finished tiles.
    n_candidates : int
        Rows of the merged list.
    ingest : dict, optional
        The ingest summaries, by catalogue.
    failed : dict, optional
        Failed tile → error.
    expected_rows : dict, optional
        Rows of each astrometric tile according to the ingest summary.

    Raises
    ------
    SelectorError
        When a count does not add up (an internal error: nothing is trusted).
    """
    failed = failed or {}
    for s in summaries:
        check_accounting(int(s.rows), int(s.rejects), [tuple(x) for x in s.cutflow])
    flow = total_cutflow(summaries)
    rows = sum(int(s.rows) for s in summaries)
    rejects = sum(int(s.rejects) for s in summaries)
    removed = {name: prev - count for (_, prev), (name, count) in zip(flow, flow[1:])}
    if rows != n_candidates + sum(removed.values()) + rejects:
        raise SelectorError(f"internal error: row accounting of the run does not add up: {rows:,} tile rows but "
                            f"{n_candidates:,} candidates + {sum(removed.values()):,} removed by cuts + {rejects:,} "
                            "tile rejects; the merged outputs are not to be trusted, re-run with --force")
    lines = [f"rows: {rows:,} in {len(summaries):,} tiles = {n_candidates:,} candidates + "
             f"{sum(removed.values()):,} removed by cuts + {rejects:,} tile rejects"]
    if ingest is not None:
        astro = ingest["astrometric"]
        rows_in, accepted = int(astro["rows_in"]), int(astro["accepted"])
        ing_rejected = int(astro.get("rejected_total", rows_in - accepted))
        expected = expected_rows or {}
        missing = sum(expected.get(int(t), 0) for t in failed)
        per_tile_known = bool(expected) or not failed  # an ingest summary without rows per tile cannot say
        if rows_in != ing_rejected + accepted or (per_tile_known and accepted != rows + missing):
            raise SelectorError(f"internal error: the astrometric catalogue's {rows_in:,} rows are not "
                                f"{ing_rejected:,} ingest rejects + {rows:,} rows of finished tiles + {missing:,} rows "
                                "of failed tiles; run `selector ingest` and `selector run --force` again")
        lines.insert(0, f"rows: astrometric catalogue {rows_in:,} = {ing_rejected:,} ingest rejects + {rows:,} in "
                        f"finished tiles" + (f" + {missing:,} in failed tiles" if failed else ""))
    return lines


def ranked_table(candidates: pa.Table, prov: dict) -> Table:
    """The merged ranked list as an astropy Table with units and provenance in its metadata."""
    cols = {}
    for name in candidates.column_names:
        arr = candidates.column(name)
        if pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type):
            cols[name] = np.asarray(arr.to_pylist(), dtype=str) if len(arr) else np.zeros(0, dtype=str)
        else:
            cols[name] = arr.to_numpy(zero_copy_only=False)
    table = Table(cols)
    for name in table.colnames:
        unit = schema.unit_of(name)
        if unit:
            table[name].unit = unit
    table.meta.update({"selector_provenance": prov, "description": "ranked quasar candidates; statistical "
                       "selection, spectroscopic confirmation needed"})
    return table


#: Candidates sorted in memory at a time (one sorted run); more are merged from sorted runs on disk.
RUN_ROWS = 1 << 18
#: Rows read from each sorted run at a time during the merge of runs.
BLOCK_ROWS = 1 << 14


def _rank_key(schema: pa.Schema, order: str = "probability") -> list[tuple[str, str]]:
    # the order of rank_candidates (core.selection.rank_keys) for ranking.order, ending with the id;
    # ids are unique (checked), so the order is total and a merge of sorted runs gives exactly the one sort
    return rank_keys(schema.names, order)


class _Runs:
    """The candidates, cut into sorted runs: kept in memory while they fit one run, spilled to disk after.

    Tiles normally share one schema; when they do not (a column that is all null in one tile), the
    schemas are unified as ``concat_tables(promote_options="permissive")`` does, each spilled run
    with its own, and every block is cast to the unified schema when the runs are merged.
    """

    def __init__(self, spool: Path, order: str = "probability"):
        self.spool = spool
        self.order = order
        self.schemas: list[pa.Schema] = []
        self.pending: list[pa.Table] = []
        self.pending_rows = 0
        self.files: list[Path] = []
        self.rows = 0

    def add(self, part: pa.Table) -> None:
        if not self.schemas or part.schema != self.schemas[-1]:
            self.schemas.append(part.schema)
        self.pending.append(part)
        self.pending_rows += part.num_rows
        self.rows += part.num_rows
        if self.pending_rows >= RUN_ROWS:
            self.spill()

    @property
    def schema(self) -> pa.Schema:
        """The unified schema of every part added (one ``astro_id`` column when there was none)."""
        if not self.schemas:
            return pa.schema([("astro_id", pa.int64())])
        return pa.unify_schemas(self.schemas, promote_options="permissive")

    def _unified(self, table: pa.Table, schema: pa.Schema) -> pa.Table:
        if table.schema == schema:
            return table
        return pa.concat_tables([schema.empty_table(), table], promote_options="permissive").cast(schema)

    def sorted_pending(self) -> pa.Table:
        parts, self.pending, self.pending_rows = self.pending, [], 0
        if not parts:
            return self.schema.empty_table()
        table = pa.concat_tables(parts, promote_options="permissive")
        return table.sort_by(_rank_key(table.schema, self.order)).combine_chunks() if table.num_rows else table

    def spill(self) -> None:
        table = self.sorted_pending()
        if not table.num_rows:
            return
        self.spool.mkdir(parents=True, exist_ok=True)
        path = self.spool / f"run-{len(self.files):05d}.arrow"
        with pa.OSFile(str(path), "wb") as sink, pa.ipc.new_file(sink, table.schema) as writer:
            for batch in table.to_batches(max_chunksize=BLOCK_ROWS):
                writer.write_batch(batch)
        self.files.append(path)

    def merged(self):
        """Yield the candidates in rank order, in batches, with the unified schema."""
        schema = self.schema
        key = _rank_key(schema, self.order)
        if not self.files:  # everything fitted in one run: sorted in memory
            table = self.sorted_pending()
            if table.num_rows:
                yield self._unified(table, schema)
            return
        self.spill()
        readers = [pa.ipc.open_file(pa.OSFile(str(p))) for p in self.files]
        next_block = [0] * len(readers)
        buffers: list[pa.Table | None] = [None] * len(readers)

        def refill(i):
            if buffers[i] is None or buffers[i].num_rows == 0:
                if next_block[i] < readers[i].num_record_batches:
                    block = pa.Table.from_batches([readers[i].get_batch(next_block[i])])
                    buffers[i] = self._unified(block, schema)
                    next_block[i] += 1
                else:
                    buffers[i] = None

        for i in range(len(readers)):
            refill(i)
        while any(b is not None for b in buffers):
            live = [i for i, b in enumerate(buffers) if b is not None]
            table = pa.concat_tables([buffers[i] for i in live])
            order = pc.sort_indices(table, sort_keys=key).to_numpy()
            position = np.empty_like(order)
            position[order] = np.arange(len(order))
            # rows up to the first last-row of a run with more blocks on disk are final: nothing
            # unread can come before them (each run is sorted)
            starts = np.cumsum([0] + [buffers[i].num_rows for i in live])
            more = [k for k, i in enumerate(live) if next_block[i] < readers[i].num_record_batches]
            cut = min(position[starts[k + 1] - 1] for k in more) + 1 if more else len(order)
            yield table.take(pa.array(order[:cut]))
            for k, i in enumerate(live):
                used = int(np.count_nonzero(position[starts[k]:starts[k + 1]] < cut))  # a prefix of the run
                buffers[i] = buffers[i].slice(used)
                refill(i)


#: Candidates of consecutive tiles gathered before they are finished and checked together: the
#: per-call costs of the finisher, the text checks and the sorted runs are paid per gathering, not per tile.
GATHER_ROWS = 1 << 16
#: At most this many tiles in a gathering: a decoded tile costs some 100 kB of schema and buffers
#: whatever its rows, which would add up over a whole sky of tiles with few candidates each.
GATHER_TILES = 256


class _Gathered:
    """Tiles' candidates of one schema gathered into one table, then finished and checked at once.

    Every step applied to a gathering is row by row (spectroscopic redshifts, luminosities, the
    labelled-luminosity flag, the text checks), so the rows are those of doing each tile alone; a tile
    of another schema closes the gathering first, so each table keeps its own schema, as each tile did.
    """

    def __init__(self, runs: _Runs, finish: Finisher | None):
        self.runs, self.finish = runs, finish
        self.parts: list[pa.Table] = []
        self.rows = 0
        self.writable = True
        self.ids: list[np.ndarray] = []

    def add(self, part: pa.Table) -> None:
        if self.parts and (part.schema != self.parts[0].schema or self.rows + part.num_rows > GATHER_ROWS
                           or len(self.parts) >= GATHER_TILES):
            self.flush()
        self.parts.append(part)
        self.rows += part.num_rows

    def flush(self) -> None:
        if not self.parts:
            return
        # one chunk per column: every later step pays per chunk, and the tiles' small buffers are freed
        table = pa.concat_tables(self.parts).combine_chunks() if len(self.parts) > 1 else self.parts[0]
        self.parts, self.rows = [], 0
        if self.finish is not None and table.num_rows:
            table = self.finish.apply(table)
        self.runs.add(table)
        if table.num_rows:
            self.writable = self.writable and all(text_writable(c) for c in table.columns)
            self.ids.append(table.column("astro_id").to_numpy(zero_copy_only=False))


#: Tile files read at once: decoding a small file is mostly fixed costs per column, paid in Arrow
#: without holding the interpreter, so a few reads side by side keep the cores busy.
READERS = 4


def _read_tile(path: Path) -> pa.Table | BaseException:
    try:
        # one open per tile: ParquetFile has less set-up than read_table's dataset layer, and the
        # column chunks fetched in one go cost less than one read each
        return pq.ParquetFile(path, pre_buffer=True).read(use_threads=False).replace_schema_metadata(None)
    except (OSError, pa.ArrowException) as exc:
        return exc


def _read_ahead(paths: list[Path]):
    """Each tile's candidates in order, read by :data:`READERS` threads a few files ahead (bounded memory)."""
    with ThreadPoolExecutor(READERS) as pool:
        ahead: deque = deque()
        for path in paths:
            ahead.append(pool.submit(_read_tile, path))
            if len(ahead) > 2 * READERS:
                yield ahead.popleft().result()
        while ahead:
            yield ahead.popleft().result()


def _streamed(cfg: Config, summaries: list[TileSummary], lay,
              finish: Finisher | None = None) -> tuple[_Runs, bool, int]:
    """Read every tile's candidates once into sorted runs; whether the fast text writers apply; rows.

    ``finish`` (models with a redshift part) adopts spectroscopic redshifts and flags candidates beyond
    the labelled luminosities in the candidates before they are ranked.
    """
    runs = _Runs(merge_spool(lay), cfg.ranking.order)
    gathered = _Gathered(runs, finish)
    paths = [lay.tile_candidates(s.tile) for s in summaries]
    for s, path, part in zip(summaries, paths, _read_ahead(paths)):
        if isinstance(part, BaseException):
            first = (str(part).strip().splitlines() or [type(part).__name__])[0]
            raise SelectorError(f"{path}: cannot read ({first}); re-run with --force")
        if part.num_rows != int(s.cutflow[-1][1]):
            raise SelectorError(f"internal error: {path} holds {part.num_rows} candidates but the tile's cut-flow "
                                f"ends with {s.cutflow[-1][1]}; re-run with --force")
        gathered.add(part)
    gathered.flush()
    # the one check that needs every row at once: the ids only (8 bytes a candidate for integer ids)
    ids = np.concatenate(gathered.ids) if gathered.ids else np.zeros(0)
    if len(np.unique(ids)) != len(ids):
        raise SelectorError("internal error: a source appears in more than one tile's candidates")
    return runs, gathered.writable, runs.rows


def merge(cfg: Config, summaries: list[TileSummary], prov: dict, fault=None) -> Merged:
    """Union of the per-tile candidates (each source owned by one tile), ranked; cut-flow totals.

    Streamed: each tile's candidates are read once into sorted runs of :data:`RUN_ROWS` rows (spilled to
    a scratch folder when there are more), which are merged in rank order and written batch by batch
    to the three lists at once: Parquet by row groups of the usual size, ECSV and CSV with astropy's
    header and a body written column by column (:func:`~selector.store.io.text_body`). The bytes are
    those of ranking the whole list in memory and writing it with astropy; a list whose values the
    column writer cannot reproduce exactly (text with spaces, integer columns with nulls, ...) is
    written by astropy, in memory, as before.

    Parameters
    ----------
    cfg : Config
    summaries : list of TileSummary
        One per tile to merge.
    prov : dict
        Provenance written into every merged file (no times in it, so equal inputs give equal bytes).
    fault : callable, optional
        Called with ``"merge:<name>"`` after each file is written (the resumption tests use it).
    """
    fault = fault or (lambda event: None)
    lay = layout_of(cfg)
    summaries = sorted(summaries, key=lambda s: s.tile)
    flow = total_cutflow(summaries)
    outputs = merged_paths(cfg)
    spool = merge_spool(lay)
    shutil.rmtree(spool, ignore_errors=True)
    try:
        finish = finisher(cfg)
        runs, writable, n = _streamed(cfg, summaries, lay, finish)
        texts = {"ecsv": DurableBatch(), "csv": DurableBatch(), "parquet": DurableBatch()}
        try:
            if n and writable:
                _write_streamed(runs, prov, outputs, texts)
            else:
                _write_in_memory(runs, prov, outputs, texts, tiles=len(summaries))
            for kind in ("ecsv", "csv", "parquet"):
                texts[kind].commit()
                fault(f"merge:{kind}")
        finally:
            for batch in texts.values():
                batch.discard()
    finally:
        shutil.rmtree(spool, ignore_errors=True)
    write_text("stage,left\n" + "".join(f"{n_},{c}\n" for n_, c in flow), outputs["cutflow"])
    fault("merge:cutflow")
    rejects = sum(int(s.rejects) for s in summaries)
    rows = sum(int(s.rows) for s in summaries)
    physics = finish.summary() if finish is not None and "z_phot" in runs.schema.names else None
    luminosities = None if physics is None else physics.record(cfg.ranking.order)
    if physics is not None and physics.labelled is not None:
        write_parquet(physics.labelled, labelled_luminosities(lay))
    write_json({**prov, "tiles": len(summaries), "rows": rows, "tile_rejects": rejects,
                "candidates": n, "cutflow": flow, "luminosities": luminosities, "config": result_config(cfg)},
               outputs["provenance"])
    fault("merge:provenance")
    return Merged(len(summaries), n, flow, outputs)


def _with_rank(table: pa.Table, first: int) -> pa.Table:
    return table.add_column(0, "rank", pa.array(np.arange(first, first + table.num_rows, dtype=np.int64)))


def _units(names) -> dict[str, str]:
    return {name: schema.unit_of(name) for name in names}


def _write_streamed(runs: _Runs, prov: dict, outputs: dict, batches: dict) -> None:
    """Write the ranked rows batch by batch into the three lists (see :func:`merge`)."""
    columns = runs.schema.insert(0, pa.field("rank", pa.int64()))
    header = ranked_table(columns.empty_table(), prov)
    with ExitStack() as stack:
        files = {}
        for kind in ("ecsv", "csv"):
            tmp = stack.enter_context(batches[kind].path(outputs[kind]))
            write_table_file(header, tmp, kind)  # astropy's header (and no rows)
            files[kind] = stack.enter_context(open(tmp, "ab"))
        described = describe_arrow_columns(columns.empty_table(), _units(columns.names)).schema
        parquet_schema = described.with_metadata({b"provenance": json.dumps(prov, sort_keys=True).encode()})
        writer = stack.enter_context(pq.ParquetWriter(stack.enter_context(batches["parquet"].path(outputs["parquet"])),
                                                      parquet_schema, **parquet_writer_options(parquet_schema)))

        def write_group(group: pa.Table) -> None:
            writer.write_table(group.cast(parquet_schema), row_group_size=PARQUET_ROW_GROUP_ROWS)

        pending: list[pa.Table] = []
        pending_rows, first = 0, 1
        for merged_part in runs.merged():
            for start in range(0, merged_part.num_rows, TEXT_ROWS):
                part = _with_rank(merged_part.slice(start, TEXT_ROWS), first)
                first += part.num_rows
                cells = text_cells(part)  # the same cells in both formats: formatted once
                files["ecsv"].write(text_lines(cells, " "))
                files["csv"].write(text_lines(cells, ","))
                del cells
                # row groups of the usual size, so the file is the one a single write would give; a
                # part is cut at the group's end, so no group's buffers outlive it
                while part.num_rows:
                    take = min(part.num_rows, PARQUET_ROW_GROUP_ROWS - pending_rows)
                    pending.append(part.slice(0, take))
                    pending_rows += take
                    part = part.slice(take)
                    if pending_rows == PARQUET_ROW_GROUP_ROWS:
                        write_group(_combined(pending))
                        pending_rows = 0
        if pending_rows:
            write_group(_combined(pending))


#: Ranked rows formatted as text at a time (bounds the memory of the cells and lines).
TEXT_ROWS = 1 << 15


def _combined(parts: list[pa.Table]) -> pa.Table:
    """The parts as one table of one chunk per column, emptying ``parts``: each column is combined
    after the previous one's pieces are released, so the group is never held twice."""
    table = pa.concat_tables(parts)
    parts.clear()
    schema, arrays = table.schema, []
    for _ in schema.names:
        arrays.append(table.column(0).combine_chunks())
        table = table.remove_column(0)
    return pa.Table.from_arrays(arrays, schema=schema)


def _write_in_memory(runs: _Runs, prov: dict, outputs: dict, batches: dict, *, tiles: int) -> None:
    """The whole ranked list in memory, written by astropy (lists the column writer cannot write exactly)."""
    parts = list(runs.merged())
    if parts:
        candidates = _with_rank(pa.concat_tables(parts).combine_chunks(), 1)
        table = ranked_table(candidates, prov)
    else:
        candidates = runs.schema.empty_table() if tiles else pa.table({"astro_id": []})
        table = Table({"rank": np.zeros(0, np.int64), "astro_id": np.zeros(0, np.int64)})
        table.meta["selector_provenance"] = prov
    for kind in ("ecsv", "csv"):
        with batches[kind].path(outputs[kind]) as tmp:
            write_table_file(table, tmp, kind)
    write_parquet(describe_arrow_columns(candidates, _units(candidates.column_names)), outputs["parquet"],
                  {"provenance": prov}, batch=batches["parquet"])
