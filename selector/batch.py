"""Running every tile: executors, merging the per-tile results, the run record.

Each tile is an independent job (:func:`run_tile`): it reads its inputs, writes its own outputs
atomically and returns a small summary. The merge then reads the per-tile candidates and writes
the ranked list. Nothing in a tile's result depends on which worker ran it or when.
"""

from __future__ import annotations

import json
import os
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa

from . import __version__, schema, tiles
from .config import MATCH_SECTIONS, Config, config_hash, plain
from .errors import SelectorError
from .io import read_parquet, write_json, write_parquet, write_table, write_text
from .pipeline import check_accounting, process_tile, sort_by_score, tile_output_dir, write_tile


@dataclass
class RunResult:
    ok: bool
    tiles: int
    candidates: int
    cutflow: list
    outputs: dict = field(default_factory=dict)
    failed: dict = field(default_factory=dict)


def provenance(cfg: Config) -> dict:
    """Config hashes, input fingerprints (from the ingest summaries) and the package version."""
    fingerprints = {}
    for kind in ("astrometric", "infrared"):
        path = cfg.tiles_dir / kind / "summary.json"
        if not path.exists():
            raise SelectorError(f"{path}: not found; run `selector ingest --config ...` first")
        fingerprints[kind] = json.loads(path.read_text())["input_fingerprints"]
    return {
        "config_hash": config_hash(cfg),
        "match_config_hash": config_hash(cfg, MATCH_SECTIONS),
        "input_fingerprints": fingerprints,
        "selector_version": __version__,
    }


def run_tile(cfg: Config, tile: int, prov: dict, scorer_path: str | None = None) -> dict:
    """Process and write one tile; returns its row counts (the unit of work for every executor)."""
    scorer = None
    if scorer_path:
        from .classify import load_scorer

        scorer = load_scorer(scorer_path, cfg)
    result = process_tile(cfg, tile, scorer=scorer)
    check_accounting(result.n_rows, result.rejects.num_rows, result.cutflow)
    write_tile(cfg, result, prov)
    return {"tile": tile, "rows": result.n_rows, "rejects": result.rejects.num_rows, "cutflow": result.cutflow}


def _worker_count(cfg: Config, workers: int | None) -> int:
    n = cfg.run.workers if workers is None else workers
    return n if n and n > 0 else (os.cpu_count() or 1)


def run(cfg: Config, workers: int | None = None, executor: str | None = None, scheduler: str | None = None,
        quiet: bool = False, verbose: bool = False, log=print) -> RunResult:
    """Process every ingested tile and merge the results into the ranked candidate list."""
    order = cfg.tiling.order
    tile_ids = tiles.list_tiles(cfg.tiles_dir, "astrometric", order)
    prov = provenance(cfg)
    scorer_path = str(cfg.path(cfg.classifier.model)) if cfg.classifier.model else None
    n = _worker_count(cfg, workers)
    summaries = []
    if n == 1 or len(tile_ids) <= 1:
        for t in tile_ids:
            summaries.append(run_tile(cfg, t, prov, scorer_path))
    else:
        with ProcessPoolExecutor(max_workers=n) as pool:
            futures = [pool.submit(run_tile, cfg, t, prov, scorer_path) for t in tile_ids]
            for f in futures:
                summaries.append(f.result())
    result = merge(cfg, summaries, prov)
    if not quiet:
        log(format_cutflow(result.cutflow))
        log(f"{result.candidates} candidates from {result.tiles} tiles; ranked list: {result.outputs['ecsv']}")
    return result


def total_cutflow(summaries: list[dict]) -> list[tuple[str, int]]:
    """Sum per-tile cut-flows stage by stage (every tile runs the same stages)."""
    if not summaries:
        return [("input", 0)]
    names = [name for name, _ in summaries[0]["cutflow"]]
    totals = dict.fromkeys(names, 0)
    for s in summaries:
        for name, count in s["cutflow"]:
            totals[name] += count
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


def _ranked_table(cfg: Config, candidates: pa.Table, prov: dict):
    """The merged ranked list as an astropy Table with units and provenance in its metadata."""
    from astropy.table import Table

    candidates = sort_by_score(candidates)
    candidates = candidates.add_column(0, "rank", pa.array(np.arange(1, candidates.num_rows + 1, dtype=np.int64)))
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


def merge(cfg: Config, summaries: list[dict], prov: dict) -> RunResult:
    """Union of the per-tile candidates (each source owned by one tile), ranked; cut-flow totals."""
    parts = []
    for s in sorted(summaries, key=lambda s: s["tile"]):
        parts.append(read_parquet(tile_output_dir(cfg, s["tile"]) / "candidates.parquet"))
    candidates = pa.concat_tables(parts, promote_options="permissive") if parts else pa.table({"astro_id": []})
    ids = candidates.column("astro_id").to_numpy(zero_copy_only=False) if candidates.num_rows else np.zeros(0)
    if len(np.unique(ids)) != len(ids):
        raise SelectorError("internal error: a source appears in more than one tile's candidates")
    flow = total_cutflow(summaries)
    run_dir = cfg.run_dir
    table = _ranked_table(cfg, candidates, prov) if candidates.num_rows else None
    outputs = {"ecsv": run_dir / "candidates.ecsv", "csv": run_dir / "candidates.csv",
               "parquet": run_dir / "candidates.parquet", "cutflow": run_dir / "cutflow.csv",
               "provenance": run_dir / "provenance.json"}
    if table is None:
        from astropy.table import Table

        table = Table({"rank": np.zeros(0, np.int64), "astro_id": np.zeros(0, np.int64)})
        table.meta["selector_provenance"] = prov
    write_table(table, outputs["ecsv"], "ecsv")
    write_table(table, outputs["csv"], "csv")
    write_parquet(candidates, outputs["parquet"], {"provenance": prov})
    write_text("stage,left\n" + "".join(f"{n},{c}\n" for n, c in flow), outputs["cutflow"])
    rejects = sum(s["rejects"] for s in summaries)
    rows = sum(s["rows"] for s in summaries)
    write_json({**prov, "tiles": len(summaries), "rows": rows, "tile_rejects": rejects,
                "candidates": len(table), "cutflow": flow,
                "config": plain(cfg)}, outputs["provenance"])
    return RunResult(True, len(summaries), len(table), flow, outputs)
