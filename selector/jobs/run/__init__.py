"""The nightly run over tiles: lock, plan, execute, merge; progress and status.

A run goes through four steps, all recorded in the run manifest (:mod:`selector.store.manifest`):

1. **Lock** (:mod:`selector.store.lock`). The run folder's lock is held with ``flock`` for the whole
   run, so a second run on the same folder is refused; the kernel drops the lock when the process
   dies, however it dies.
2. **Plan** (:mod:`.plan`). Each tile is reused, re-selected, checked or computed, from the keys its
   record holds, the input fingerprints and its output files.
3. **Work** (:mod:`.execute`). :func:`~.execute.run_tile` does one tile on any executor (in-process,
   a local process pool, or Dask) and writes its files atomically; the manifest records it when its
   outcome arrives. A tile whose input is damaged fails alone, with its error recorded.
4. **Merge** (:mod:`.merge`). The per-tile candidates become the ranked list, the cut-flows are
   summed, the rows accounted for, and the provenance written.
"""

from __future__ import annotations

import os
import shutil
import socket
import time
import traceback
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pyarrow as pa

from selector import __version__
from selector.errors import SelectorError
from selector.jobs.checks import moving, run_findings, settle
# imported under another name, so `selector.jobs.run.commit` stays the module
from selector.jobs.run.commit import commit as commit_outputs, committed_run, read_record, withdraw
from selector.jobs.run.execute import (BLOCKED_BY, KILL_AT_ENV, TileOutcome, check_model, execute, fault, one_line,
                                      run_tile, worker_count)
from selector.core.selection import skipped_cut_notes
from selector.jobs.run.merge import (TileSummary, account, chance_total, file_stats, format_chance, format_cutflow, merge,
                                     merged_from_summaries, merged_paths, provenance, total_cutflow)
from selector.jobs.run.plan import (TilePlan, compute_plan, expected_rows, file_digest, file_row, ingest_summaries,
                                    inputs_key, must_compute, output_stats, plan_tiles, scan_inputs, tile_ids, tile_rel)
from selector.jobs.run.progress import Reporter
from selector.jobs.run.status import status_text
from selector.settings.config import Config
from selector.store.io import no_space, no_space_error, read_parquet
from selector.store.keys import digest
from selector.store.layout import FEATURE_FILES, SELECTION_FILES, Layout, layout_of
from selector.store.lock import FolderLock, output_lock, run_lock
from selector.store.manifest import Manifest

__all__ = ["KILL_AT_ENV", "FolderLock", "RunResult", "RunTimings", "TileOutcome", "TilePlan", "TileSummary", "account",
           "committed_run",
           "format_cutflow", "provenance", "run", "run_lock", "run_tile", "status_text", "total_cutflow"]


@dataclass
class RunTimings:
    """Where a run's time went, and how large its workers grew.

    Attributes
    ----------
    wall_s : float
        The whole call, lock to summary.
    plan_s : float
        Planning: ingest summaries, manifest, input fingerprints.
    work_s : float
        Wall time from the first tile started to the last recorded.
    merge_s : float
        Merging the tiles into the ranked outputs (0 when they were up to date).
    tiles : int
        Tiles worked by this run (computed, re-selected, checked or failed).
    tile_s_total, tile_s_max : float
        Sum and largest of those tiles' wall times, measured in the workers.
    read_s, match_s, select_s, write_s : float
        Sums over those tiles of their stages (see :class:`~selector.jobs.run.execute.TileOutcome`).
    worker_peak_rss_mib : dict
        Worker process id → its resident-memory high-water mark (``ru_maxrss``) in MiB. With one
        worker the tiles run in the calling process, whose peak this then is.
    """

    wall_s: float = 0.0
    plan_s: float = 0.0
    work_s: float = 0.0
    merge_s: float = 0.0
    tiles: int = 0
    tile_s_total: float = 0.0
    tile_s_max: float = 0.0
    read_s: float = 0.0
    match_s: float = 0.0
    select_s: float = 0.0
    write_s: float = 0.0
    worker_peak_rss_mib: dict = field(default_factory=dict)

    def add(self, res: TileOutcome) -> None:
        """Count one tile's outcome."""
        self.tiles += 1
        self.tile_s_total += res.duration_s
        self.tile_s_max = max(self.tile_s_max, res.duration_s)
        self.read_s += res.read_s
        self.match_s += res.match_s
        self.select_s += res.select_s
        self.write_s += res.write_s
        if res.pid:
            self.worker_peak_rss_mib[res.pid] = max(self.worker_peak_rss_mib.get(res.pid, 0.0), res.peak_rss_mib)

    @property
    def peak_worker_rss_mib(self) -> float:
        """The largest worker's resident-memory high-water mark, MiB (0 when no tile was worked)."""
        return max(self.worker_peak_rss_mib.values(), default=0.0)

    def summary(self) -> str:
        """One line for the run log."""
        return (f"times: wall {self.wall_s:.1f} s = plan {self.plan_s:.1f} s + tile work {self.work_s:.1f} s + merge "
                f"{self.merge_s:.1f} s + rest; {self.tiles} tiles worked, {self.tile_s_total:.1f} s in all (read "
                f"{self.read_s:.1f}, match {self.match_s:.1f}, select {self.select_s:.1f}, write {self.write_s:.1f}), "
                f"slowest {self.tile_s_max:.2f} s; peak memory per worker "
                + ", ".join(f"{mib:.0f} MiB" for _, mib in sorted(self.worker_peak_rss_mib.items())))


@dataclass
class RunResult:
    """What a run did.

    Attributes
    ----------
    ok : bool
        Every tile finished and the merged outputs are complete.
    tiles, candidates, cutflow, outputs
        As in :class:`~selector.jobs.run.merge.Merged`.
    failed : dict
        Tile id → one-line error, for tiles that failed.
    run_id : int or None
        The run's number in the manifest.
    actions : dict
        Tiles ``computed``, ``reselected``, ``verified`` (inputs re-read, nothing rewritten),
        ``reused`` and ``failed`` by this run.
    merged : bool
        Whether the merged outputs were (re)written; false when they were already up to date.
    complete : bool
        Whether the merged outputs cover every tile.
    accounting : list of str
        The row-accounting lines.
    log_file : pathlib.Path or None
        The run log.
    timings : RunTimings
        Where the time went and the workers' peak memory (also in the run log and the manifest).
    chance : dict or None
        Expected chance counterparts among the candidates and the matched sources, from the shifted-position
        matches of every tile (also in ``provenance.json`` as ``chance_counterparts``).
    """

    ok: bool
    tiles: int
    candidates: int
    cutflow: list
    outputs: dict = field(default_factory=dict)
    failed: dict = field(default_factory=dict)
    run_id: int | None = None
    actions: dict = field(default_factory=dict)
    merged: bool = True
    complete: bool = True
    accounting: list = field(default_factory=list)
    log_file: Path | None = None
    timings: RunTimings = field(default_factory=RunTimings)
    chance: dict | None = None


@dataclass(kw_only=True)
class _Run:
    """What one run's steps share: the configuration, its folder, the manifest and what it knows."""

    cfg: Config
    layout: Layout
    man: Manifest
    run_id: int
    rep: Reporter
    executor: str
    workers: int
    scheduler: str | None
    force: bool
    config_path: str | os.PathLike | None
    strict: bool = False
    records: dict = field(default_factory=dict)
    shas: dict = field(default_factory=dict)
    missing: dict = field(default_factory=dict)
    expected_rows: dict = field(default_factory=dict)
    timings: RunTimings = field(default_factory=RunTimings)
    #: Fingerprints returned by the workers, stored in the manifest in batches: one lost in a crash
    #: only means that file is hashed again next time
    seen_files: dict = field(default_factory=dict)
    started: float = field(default_factory=time.perf_counter)


def run(cfg: Config, workers: int | None = None, executor: str | None = None, scheduler: str | None = None, *,
        quiet: bool = False, verbose: bool = False, log=print, force: bool = False,
        config_path: str | os.PathLike | None = None, strict: bool = False) -> RunResult:
    """Bring the run folder up to date with the ingested tiles and the configuration.

    Parameters
    ----------
    cfg : Config
    workers : int, optional
        Worker processes (local) or local Dask workers; default ``run.workers`` (0: one per core).
    executor : {"local", "dask"}, optional
        Default ``run.executor``.
    scheduler : str, optional
        Dask scheduler address; default ``run.scheduler``; a local Dask cluster when neither is set.
    quiet, verbose : bool
        Print only the final summary, or also a line per tile.
    log : callable
        Where messages go (progress goes to standard error).
    force : bool
        Recompute every tile whatever the manifest says.
    config_path : path, optional
        The configuration file, named in the retry advice after failures.
    strict : bool
        Make the plausibility checks (:mod:`selector.jobs.checks`) errors, raised before the merge
        (the previous merged outputs then stay as they were).

    Returns
    -------
    RunResult
        ``ok`` is false when a tile failed (the others are finished and merged).

    Raises
    ------
    SelectorError
        When the folder is in use by another run, the tiles are missing, or the row accounting of
        the merged result does not add up (the run is then recorded as failed).
    """
    if executor is None and scheduler is not None:
        executor = "dask"  # a scheduler address only means something to Dask
    executor = executor or cfg.run.executor
    scheduler = scheduler or cfg.run.scheduler
    n = worker_count(cfg, workers)
    lay = layout_of(cfg)
    with output_lock(cfg, "run", exclusive=True), Manifest(lay.manifest) as man:
        man.mark_dead_runs()
        run_id = man.begin_run(pid=os.getpid(), host=socket.gethostname(), version=__version__,
                               executor=executor, workers=n)
        log_path = lay.run_log(run_id)
        rep = Reporter(log, quiet=quiet, verbose=verbose, log_path=log_path,
                       interval_s=cfg.run.progress_interval_s)
        man.update_run(run_id, log_file=str(log_path))
        ctx = _Run(cfg=cfg, layout=lay, man=man, run_id=run_id, rep=rep, executor=executor, workers=n,
                   scheduler=scheduler, force=force, config_path=config_path, strict=strict)
        try:
            result = _run(ctx)
        except KeyboardInterrupt:
            man.end_run(run_id, "interrupted", message="interrupted by the user; run again to continue")
            rep.always("interrupted: finished tiles are kept; run again to continue")
            rep.close()
            raise
        except SelectorError as exc:
            man.end_run(run_id, "failed", message=str(exc))
            rep.to_file(f"failed: {exc}")
            rep.close()
            raise
        except BaseException as exc:
            if no_space(exc):
                # the manifest itself may be what cannot grow: say so in one line, whatever recording manages
                try:
                    man.end_run(run_id, "failed", message="no space left on the device")
                    rep.close()
                except Exception:
                    pass
                raise no_space_error(lay.manifest) from None
            man.end_run(run_id, "failed", message=one_line(exc))
            rep.to_file(traceback.format_exc())
            rep.close()
            raise
        rep.close()
        result.run_id, result.log_file = run_id, log_path
        return result


def _run(ctx: _Run) -> RunResult:
    cfg, lay, man, run_id, rep = ctx.cfg, ctx.layout, ctx.man, ctx.run_id, ctx.rep
    # the lock keeps ingest out for the whole run, so the generation in force now is the one read
    generation = lay.current_generation()
    prov = provenance(cfg)
    ingest = ingest_summaries(cfg)
    man.update_run(run_id, config_hash=prov["config_hash"], match_hash=prov["match_config_hash"],
                   selection_hash=prov["selection_config_hash"])
    rep.to_file(f"run {run_id}: selector {__version__}, executor {ctx.executor}, {ctx.workers} workers, "
                f"pid {os.getpid()}, tiles generation {generation or '(none)'}")
    man.set("generation", {"run": run_id, "name": generation, "digest": prov["tiles_generation"]})
    ctx.expected_rows = expected_rows(ingest)
    ids = tile_ids(cfg, ctx.expected_rows)
    ctx.records = records = man.tiles()
    recorded_inputs = {rel for rec in records.values() for rel in (rec.get("inputs") or [])}
    compute = compute_plan(cfg, prov["classifier_model_sha256"])
    # only the inputs of tiles that may be reused are fingerprinted here; the others are computed
    # anyway and their workers fingerprint the bytes they read
    needed = {rel for t in ids if not must_compute(cfg, records.get(t), compute, ctx.force)
              for rel in records[t]["inputs"]}
    ctx.shas = scan_inputs(cfg, man, recorded_inputs, ctx.workers, needed=needed)
    check_model(cfg, compute.model)  # a bad model refuses the run before any tile is rewritten
    ctx.missing = missing_inputs(cfg, ingest)
    plans, reused = plan_tiles(cfg, records, ctx.shas, tiles=ids, compute=compute, force=ctx.force)
    check_run_space(lay, plans, cfg.tiling.order)
    stale = sorted(set(records) - set(ids))
    man.plan(sorted(plans), stale)
    for t in stale:  # tiles gone from the ingested catalogue must not be merged
        shutil.rmtree(lay.tile_output_dir(t), ignore_errors=True)
    # temporary files of writes cut short by a killed run (only tiles never recorded can have them)
    for folder in [lay.run_dir] + [lay.tile_output_dir(t) for t in plans]:
        for tmp in folder.glob(".*.tmp"):
            tmp.unlink(missing_ok=True)
    modes = {m: sum(p.mode == m for p in plans.values()) for m in ("compute", "check", "select")}
    rep.info(f"run {run_id}: {len(ids)} tiles — {modes['compute']} to compute, {modes['select']} to re-select, "
             f"{modes['check']} to check (an input file changed), {len(reused)} unchanged")
    man.update_run(run_id, tiles=len(ids), reused=len(reused))
    fault("planned")
    ctx.timings.plan_s = time.perf_counter() - ctx.started

    actions, work_s = _work(ctx, plans, reused)
    ctx.timings.work_s = work_s

    if lay.current_generation() != generation:
        raise SelectorError(f"{lay.current_pointer}: the tiles changed generation during the run ({generation} → "
                            f"{lay.current_generation()}) although the run held the folder; nothing was merged, run "
                            "`selector run --config ...` again")
    records = man.tiles()
    failed = {t: records[t]["error"] for t in ids if records[t]["status"] != "done"}
    finished = [t for t in ids if t not in failed]
    summaries = [TileSummary.from_record(records[t]) for t in finished]
    complete = not failed
    chance = chance_total(cfg, finished)
    merge_prov = {**prov, "complete": complete, "failed_tiles": sorted(failed), "chance_counterparts": chance}
    warnings = settle(run_findings(cfg, {t: records[t] for t in finished}, ingest, _moving_stars(lay, finished)),
                      strict=ctx.strict, log=rep.always,
                      what="nothing was merged and the previous merged outputs stay as they were")
    if warnings:
        merge_prov["warnings"] = warnings
    outputs = merged_paths(cfg)
    merge_key = digest("merge", merge_prov, [(t, records[t]["match_key"], records[t]["content_key"],
                                             records[t]["selection_key"]) for t in finished])
    state = man.get("merge") or {}
    up_to_date = (state.get("key") == merge_key and state.get("outputs") == file_stats(outputs.values())
                  and (read_record(lay) or {}).get("merge_key") == merge_key)
    if failed and (not cfg.run.merge_incomplete or not finished):
        merged_out = merged_from_summaries(cfg, summaries)
        merged = False
        why = "run.merge_incomplete = false" if finished else "no tile finished"
        rep.always(f"{len(failed)} tiles failed; {why}, so the merged outputs in {lay.run_dir} were left as they "
                   "were (their commit record still names the run that made them)")
    elif up_to_date and not ctx.force:
        merged_out = merged_from_summaries(cfg, summaries)
        merged = False
    else:
        # the merged files become visible as one set: the record goes first and comes back last
        t_merge = time.perf_counter()
        withdraw(lay)
        merged_out = merge(cfg, summaries, merge_prov, fault=fault)
        commit_outputs(cfg, lay, merge_prov, merge_key=merge_key)
        ctx.timings.merge_s = time.perf_counter() - t_merge
        merged = True
        man.set("merge", {"key": merge_key, "outputs": file_stats(outputs.values())})
    fault("merged")
    lines = account(summaries, merged_out.candidates, ingest, failed=failed, expected_rows=ctx.expected_rows)
    ctx.timings.wall_s = time.perf_counter() - ctx.started
    result = RunResult(complete, merged_out.tiles, merged_out.candidates, merged_out.cutflow, merged_out.outputs,
                       failed=failed, actions=actions, merged=merged, complete=complete, accounting=lines,
                       timings=ctx.timings, chance=chance)
    # kept with the run's record (not a result file: times never go there)
    man.set(f"run-{ctx.run_id}-timings", {k: v for k, v in vars(ctx.timings).items()})
    status = "ok" if complete else "incomplete"
    man.end_run(run_id, status, rows=sum(s.rows for s in summaries), candidates=result.candidates,
                merged=int(merged), message=None if complete else f"{len(failed)} tiles failed")
    _summarise(ctx, result, work_s)
    return result


def _work(ctx: _Run, plans: dict[int, TilePlan], reused: list[int]) -> tuple[dict, float]:
    """Do the planned tiles and record each as it finishes; returns the actions and the seconds of work."""
    rep, man = ctx.rep, ctx.man
    # nested HEALPix order: consecutive tiles are neighbours on the sky, so each worker's tile cache
    # serves most of their margin reads (tiles are small, so the last one leaves little imbalance)
    items = sorted(plans.items())
    actions = dict.fromkeys(("computed", "reselected", "verified", "failed"), 0)
    actions["reused"] = len(reused)
    done_rows, t_work = 0, time.monotonic()
    if items:
        rep.progress(0, len(items), 0, 0)
    for t, res in execute(ctx.cfg, items, executor=ctx.executor, workers=ctx.workers, scheduler=ctx.scheduler,
                          note=rep.info):
        fault("tile")
        res = _record(ctx, t, plans[t], res)
        fault("recorded")
        if len(ctx.seen_files) >= 4096:
            _store_seen(ctx)
        ctx.timings.add(res)
        actions[res.action] += 1
        done_rows += int(res.rows or 0)
        if res.action == "failed":
            rep.detail(f"tile {t}: FAILED: {res.error}")
            if res.traceback:
                rep.to_file(res.traceback)
        else:
            rep.detail(f"tile {t}: {res.action}, {res.rows:,} rows, {res.candidates or 0:,} candidates, "
                       f"{res.duration_s:.2f} s (read {res.read_s:.2f}, match {res.match_s:.2f}, select "
                       f"{res.select_s:.2f}, write {res.write_s:.2f}); worker {res.pid} peak {res.peak_rss_mib:.0f} MiB")
        rep.progress(sum(actions.values()) - len(reused), len(items), done_rows, actions["failed"])
    if items:
        rep.progress(len(items), len(items), done_rows, actions["failed"], final=True)
    _store_seen(ctx)
    work_s = time.monotonic() - t_work
    man.update_run(ctx.run_id, computed=actions["computed"], reselected=actions["reselected"],
                   verified=actions["verified"], failed=actions["failed"], work_s=work_s)
    return actions, work_s


def _store_seen(ctx: _Run) -> None:
    if ctx.seen_files:
        ctx.man.store_files(sorted(ctx.seen_files.values()))
        ctx.seen_files.clear()


def _record(ctx: _Run, t: int, plan: TilePlan, res: TileOutcome) -> TileOutcome:
    """Check a tile's outcome against the ingest summary and store it in the manifest."""
    cfg, lay, expected = ctx.cfg, ctx.layout, ctx.expected_rows
    if res.action != "failed" and t in expected and res.rows != expected[t]:
        own = lay.tile_file("astrometric", cfg.tiling.order, t)
        res = replace(res, action="failed",
                      error=f"{own}: holds {res.rows:,} rows but the ingest summary says {expected[t]:,}; the tiles "
                            "changed after ingest, run `selector ingest --config ...` again")
    gone = [rel for rel, existed in (res.inputs or []) if not existed and rel in ctx.missing]
    if res.action != "failed" and gone:
        # the tile ran without a file the ingest wrote: its result would silently lack those rows
        res = replace(res, action="failed",
                      error=f"{BLOCKED_BY} {lay.tiles_dir / gone[0]}: missing (the ingest wrote it with "
                            f"{ctx.missing[gone[0]]:,} rows, something removed it); run `selector ingest --config "
                            "...` again")
    if res.action == "failed":
        ctx.man.record_tile(ctx.run_id, t, "failed", status="failed", error=res.error, duration_s=res.duration_s)
        return res
    # the manifest's stored fields, exactly as before the outcomes were typed
    fields = {"status": "done", "error": None, "duration_s": res.duration_s, "match_key": plan.match_key,
              "selection_key": plan.selection_key}
    if res.inputs is not None:
        inputs = [rel for rel, _ in res.inputs]
        # the fingerprints of the bytes the worker read: exactly what the tile used
        for f in res.files or ():
            row = file_row(*f)
            ctx.shas[row[0]] = row[3]
            ctx.seen_files[row[0]] = row
        for rel, existed in res.inputs:
            if rel not in ctx.shas or (ctx.shas[rel] is None) == existed:
                # appeared or vanished while the run went on: fingerprint what is there now
                ctx.shas[rel] = file_digest(lay.tiles_dir / rel)
        fields.update(inputs=inputs, inputs_key=inputs_key(inputs, ctx.shas), content_key=res.content_key)
    if res.action != "verified":
        fields.update(rows=res.rows, rejects=res.rejects, candidates=res.candidates, cutflow=res.cutflow,
                      outputs=output_stats(cfg, t, FEATURE_FILES + SELECTION_FILES))
    else:
        old = ctx.records[t]
        res = replace(res, rows=old["rows"], candidates=old["candidates"])
    ctx.man.record_tile(ctx.run_id, t, res.action, **fields)
    return res


#: Tiles whose feature caches are read for the stellar-locus check after a run (spread over the sky).
_LOCUS_TILES = 32


def _moving_stars(lay: Layout, finished: list[int]):
    """Feature-cache rows with a significant proper motion from a spread of finished tiles."""
    if not finished:
        return None
    picked = sorted(set(finished[i] for i in np.linspace(0, len(finished) - 1, min(_LOCUS_TILES, len(finished)),
                                                         dtype=int)))
    parts = []
    for t in picked:
        try:
            parts.append(moving(read_parquet(lay.features(t))))
        except SelectorError:
            continue  # a damaged cache is the tile's own problem, reported elsewhere
    return pa.concat_tables(parts, promote_options="permissive") if parts else None


def missing_inputs(cfg: Config, ingest: dict) -> dict[str, int]:
    """Tile files the ingest summaries list (with rows) that are not on disk: relative path → rows."""
    lay = layout_of(cfg)
    out = {}
    for kind in ("astrometric", "infrared"):
        present = set(lay.list_tiles(kind, cfg.tiling.order))
        for t, n_rows in ingest[kind].get("rows_per_tile", {}).items():
            if int(n_rows) and int(t) not in present:
                out[tile_rel(cfg, kind, int(t))] = int(n_rows)
    return out


#: Disk a computed tile may need per byte of its own astrometric tile file (feature cache, the
#: infrared blend counts, candidates, rejects), with room for the merged lists.
_RUN_DISK_PER_TILE_BYTE = 2.0


def check_run_space(lay: Layout, plans: dict, order: int) -> None:
    """Refuse a run whose tiles to compute cannot fit: free space against an estimate."""
    need = 0.0
    for t, plan in plans.items():
        if plan.mode != "select":
            try:
                need += lay.tile_file("astrometric", order, t).stat().st_size * _RUN_DISK_PER_TILE_BYTE
            except OSError:
                pass
    free = shutil.disk_usage(lay.output_dir).free
    if need > free:
        raise SelectorError(f"{lay.output_dir}: {free / 2**20:,.1f} MiB free on its device but the tiles to compute "
                            f"need about {need / 2**20:,.1f} MiB; free some space or move project.output_dir")


def blocked_by(failed: dict) -> dict[str, list[int]]:
    """Failed tiles grouped by the damaged or missing file of another tile that blocked them."""
    out: dict[str, list[int]] = {}
    for t, err in sorted(failed.items()):
        if err and err.startswith(BLOCKED_BY):
            cause = err[len(BLOCKED_BY):].strip().split(": ", 1)[0]
            out.setdefault(cause, []).append(t)
    return out


def _summarise(ctx: _Run, result: RunResult, work_s: float) -> None:
    rep, a = ctx.rep, result.actions
    rep.info(format_cutflow(result.cutflow))
    for note in skipped_cut_notes(ctx.cfg):
        rep.info(note)
    for line in result.accounting:
        rep.info(line)
    chance_line = format_chance(result.chance)
    if chance_line:
        rep.info(chance_line)
    rep.always(f"run {ctx.run_id}: {a['computed']} tiles computed, {a['reselected']} re-selected, {a['verified']} "
               f"checked unchanged, {a['reused']} reused, {a['failed']} failed ({work_s:.1f} s of tile work); "
               f"{result.candidates:,} candidates in {result.outputs['ecsv']}"
               + ("" if result.merged else " (already up to date)")
               + (f"; expected chance counterparts among them: {result.chance['expected_candidates']:.1f} ± "
                  f"{result.chance['expected_candidates_error']:.1f}" if result.chance else ""))
    if result.failed:
        where = f"--config {ctx.config_path}" if ctx.config_path else "--config <your config file>"
        rep.always(f"INCOMPLETE: {len(result.failed)} of {len(result.failed) + result.tiles} tiles failed"
                   + (" (the merged list holds the finished tiles only; its provenance says complete: false):"
                      if result.merged else ":"))
        shown = sorted(result.failed.items())
        for cause, blocked in sorted(blocked_by(result.failed).items()):
            rep.always(f"  {cause} blocks {len(blocked)} tiles: {', '.join(map(str, blocked[:10]))}"
                       + (" ..." if len(blocked) > 10 else ""))
        for t, err in shown[:20]:
            rep.always(f"  tile {t}: {err}")
        if len(shown) > 20:
            rep.always(f"  ... and {len(shown) - 20} more (`selector status {where} --failed` lists them all)")
        rep.always(f"fix the files named above (a damaged ingested tile: run `selector ingest {where}` again), then "
                   f"run `selector run {where}`: only the failed tiles are recomputed")
    rep.to_file(result.timings.summary())
    rep.info(f"run log: {result.log_file or ctx.layout.run_log(ctx.run_id)}")
