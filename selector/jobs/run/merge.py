"""Merging the tiles: the ranked list, the cut-flow totals, the row accounting and the provenance.

The per-tile candidates are merged into the ranked list, the cut-flows summed, the rows accounted
for, and the provenance written, each file atomically. Merged files depend only on the tiles' outputs
and the configuration, never on times, so a resumed run ends with the same bytes as an uninterrupted
one.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
from astropy.table import Table

from selector import __version__
from selector.core import schema
from selector.core.selection import check_accounting, rank_candidates
from selector.errors import SelectorError
from selector.jobs.run.plan import ingest_summaries
from selector.settings.config import MATCH_SECTIONS, SELECTION_SECTIONS, Config, config_hash
from selector.store.generations import generation_digest
from selector.store.io import describe_arrow_columns, read_parquet, write_json, write_parquet, write_table, write_text
from selector.store.keys import model_sha, result_config
from selector.store.layout import MERGED_FILES, layout_of


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
    return {
        "config_hash": config_hash(cfg, tuple(result_config(cfg))),
        "match_config_hash": config_hash(cfg, MATCH_SECTIONS),
        "selection_config_hash": config_hash(cfg, SELECTION_SECTIONS),
        "classifier_model_sha256": model_sha(cfg),
        "input_fingerprints": {k: s["input_fingerprints"] for k, s in summaries.items()},
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


def merge(cfg: Config, summaries: list[TileSummary], prov: dict, fault=None) -> Merged:
    """Union of the per-tile candidates (each source owned by one tile), ranked; cut-flow totals.

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
    parts = []
    for s in summaries:
        path = lay.tile_candidates(s.tile)
        part = read_parquet(path).replace_schema_metadata(None)
        if part.num_rows != int(s.cutflow[-1][1]):
            raise SelectorError(f"internal error: {path} holds {part.num_rows} candidates but the tile's cut-flow "
                                f"ends with {s.cutflow[-1][1]}; re-run with --force")
        parts.append(part)
    candidates = pa.concat_tables(parts, promote_options="permissive") if parts else pa.table({"astro_id": []})
    ids = candidates.column("astro_id").to_numpy(zero_copy_only=False) if candidates.num_rows else np.zeros(0)
    if len(np.unique(ids)) != len(ids):
        raise SelectorError("internal error: a source appears in more than one tile's candidates")
    flow = total_cutflow(summaries)
    if candidates.num_rows:
        # every merged format carries the same ranked rows, the Parquet copy included
        candidates = rank_candidates(candidates)
        table = ranked_table(candidates, prov)
    else:
        table = Table({"rank": np.zeros(0, np.int64), "astro_id": np.zeros(0, np.int64)})
        table.meta["selector_provenance"] = prov
    outputs = merged_paths(cfg)
    write_table(table, outputs["ecsv"], "ecsv")
    fault("merge:ecsv")
    write_table(table, outputs["csv"], "csv")
    fault("merge:csv")
    units = {name: schema.unit_of(name) for name in candidates.column_names}
    write_parquet(describe_arrow_columns(candidates, units), outputs["parquet"], {"provenance": prov})
    fault("merge:parquet")
    write_text("stage,left\n" + "".join(f"{n},{c}\n" for n, c in flow), outputs["cutflow"])
    fault("merge:cutflow")
    rejects = sum(int(s.rejects) for s in summaries)
    rows = sum(int(s.rows) for s in summaries)
    write_json({**prov, "tiles": len(summaries), "rows": rows, "tile_rejects": rejects,
                "candidates": len(table), "cutflow": flow, "config": result_config(cfg)}, outputs["provenance"])
    fault("merge:provenance")
    return Merged(len(summaries), len(table), flow, outputs)
