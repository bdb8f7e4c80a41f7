"""Doing the tiles: one tile's work, and the executors that run many (in-process, local pool, Dask).

:func:`run_tile` does one tile on any executor and writes its files atomically; it never raises, a
tile's failure is its outcome. The executors yield outcomes as tiles finish; only the process that
holds the run lock records them in the manifest.
"""

from __future__ import annotations

import json
import os
import resource
import signal
import sys
import time
import traceback
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass

import pyarrow as pa

from selector import __version__
from selector.core import schema
from selector.core.frames import galactic_matrix
from selector.core.selection import check_accounting
from selector.errors import InputError, SelectorError
from selector.jobs.train import load_redshifts, load_scorer
from selector.jobs.run.plan import TilePlan, compute_plan, tile_rel
from selector.jobs.run.tile import estimate_chance, load_and_match, select_tile
from selector.settings.config import Config
from selector.store.io import DurableBatch, read_parquet, write_json, write_parquet
from selector.store.keys import combined_digest, model_sha
from selector.store.layout import CHANCE_SOURCES_KEY, chance_file, layout_of
from selector.store.lock import close_inherited_lock
from selector.store.tilecache import TileCache

#: Environment variable naming a moment at which the run kills itself with SIGKILL (tests only):
#: ``planned``, ``tile@N`` (N-th tile result received, not yet recorded), ``recorded@N``,
#: ``merge:<ecsv|csv|parquet|cutflow|provenance>`` (after writing that merged file) or ``merged``; in
#: ingest, ``ingest:tile@N`` (N-th tile file written) and ``ingest:commit`` (all written, pointer not
#: yet switched).
KILL_AT_ENV = "SELECTOR_TEST_KILL_AT"


@dataclass
class TileOutcome:
    """What one tile's work gave; returned by the worker, so plain and picklable.

    Attributes
    ----------
    tile : int
    action : {"computed", "reselected", "verified", "failed"}
    duration_s : float
        Wall time of the tile's work.
    rows, rejects, candidates : int or None
        Own rows, tile rejects and candidates (finished tiles; ``rows`` also after loading).
    cutflow : list of [stage, rows left] or None
        The tile's cut-flow (finished tiles).
    inputs : list of (str, bool) or None
        After loading: each consulted tile file, relative to the tiles folder, and whether it existed.
    content_key : str or None
        After loading: digest of the rows actually used.
    error : str or None
        Failures: the one-line error.
    traceback : str or None
        Failures not caused by the input: the traceback, for the run log.
    files : list of (str, str, int, int) or None
        After loading: each existing file read, relative to the tiles folder, with the SHA-256, size
        and modification time (ns) of the bytes read, so the manifest's fingerprints are those of
        what was used and no file is read a second time to fingerprint it.
    read_s, match_s, select_s, write_s : float
        Wall time of the tile's stages: reading (and the margin filters and digests), the cross-match,
        the selection, and writing its files durably.
    peak_rss_mib : float
        The worker process's resident-memory high-water mark (``ru_maxrss``) after the tile.
    pid : int
        The worker process.
    """

    tile: int
    action: str = ""
    duration_s: float = 0.0
    rows: int | None = None
    rejects: int | None = None
    candidates: int | None = None
    cutflow: list | None = None
    inputs: list | None = None
    content_key: str | None = None
    error: str | None = None
    traceback: str | None = None
    files: list | None = None
    read_s: float = 0.0
    match_s: float = 0.0
    select_s: float = 0.0
    write_s: float = 0.0
    peak_rss_mib: float = 0.0
    pid: int = 0


#: Decoded tile files kept by this process between tiles (each worker has its own; see tilecache).
TILE_CACHE = TileCache()


def peak_rss_mib() -> float:
    """This process's resident-memory high-water mark in MiB (``ru_maxrss`` is in KiB on Linux)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def failure(tile: int, message: str) -> TileOutcome:
    """The outcome of a tile whose worker could not report one."""
    return TileOutcome(int(tile), "failed", error=message)


def one_line(exc: BaseException) -> str:
    """An exception as one line: its message for our errors, its type and first line otherwise."""
    text = str(exc).strip().splitlines()
    first = text[0] if text else ""
    if isinstance(exc, SelectorError):
        return first
    return f"{type(exc).__name__}: {first} (unexpected; the run log has the traceback)"


#: How the error of a tile that fails because of another tile's file begins (the cause follows).
BLOCKED_BY = "blocked by a damaged input read for its margin:"

_SCORERS: dict = {}


def check_model(cfg: Config, model: tuple[str, str] | None) -> None:
    """Load the classifier model once in this process before any tile is done, so a bad model file
    (type outside the allow-list, card missing or not matching) refuses the run up front; in-process
    and forked workers then reuse it."""
    _scorer(cfg, model)


def _scorer(cfg: Config, model: tuple[str, str] | None):
    """P(quasar) scorer and photometric-redshift predictor (or None) of the run's model, or (None, None)."""
    # one model per worker process: loading it is slow, and a worker only ever sees one run's model
    if model is None:
        return None, None
    if model not in _SCORERS:
        _SCORERS.clear()
        _SCORERS[model] = (load_scorer(model[0], cfg), load_redshifts(model[0], cfg))
    return _SCORERS[model]


def _required_columns(cfg: Config, kind: str) -> list[str]:
    cat = getattr(cfg, kind)
    cols = [schema.role(kind, name).canonical for name in cat.columns]
    for m in cat.magnitudes:
        if kind == "infrared":
            cols.append(schema.infrared_mag_column(m.band))
            if m.error_column:
                cols.append(schema.infrared_error_column(m.band))
        else:
            cols.append(schema.optical_mag_column(m.band))
            if m.error_column:
                cols.append(schema.optical_error_column(m.band))
    return cols


def _check_columns(cfg: Config, kind: str, path, table: pa.Table) -> None:
    missing = [c for c in _required_columns(cfg, kind) if c not in table.column_names]
    if missing:
        raise InputError(f"{path}: column '{missing[0]}' is missing ({len(missing)} of the ingested {kind} columns "
                         f"are); this is not a tile of this configuration, run `selector ingest --config ...` again")


def _normalised(features: pa.Table) -> pa.Table:
    # the same table whether it comes from the match or from the cache file, so both give equal bytes
    return features.replace_schema_metadata(None).combine_chunks()


def run_tile(cfg: Config, tile: int, plan: TilePlan | None = None, *, batch: DurableBatch | None = None) -> TileOutcome:
    """Do one tile's work and write its files; the unit of work of every executor.

    Parameters
    ----------
    cfg : Config
    tile : int
    plan : TilePlan, optional
        What to do, as made by the planner. Default: compute with ``cfg``'s keys.
    batch : DurableBatch, optional
        Where the tile's written files go to be made durable together with other tiles' (its
        outcome must then not be recorded before the batch is committed). Default: the tile's own
        files are made durable before it returns.

    Returns
    -------
    TileOutcome
        Exceptions never escape: a tile's failure is its outcome, with its one-line error.
    """
    t0 = time.perf_counter()
    if plan is None:
        plan = compute_plan(cfg, model_sha(cfg))
    try:
        with DurableBatch() as own:  # a failed tile's files are discarded, never put in place
            out = _work(cfg, int(tile), plan, own)
            if batch is not None:
                batch.adopt(own)
        out.write_s += time.perf_counter() - t0 - (out.read_s + out.match_s + out.select_s + out.write_s)
    except Exception as exc:  # a tile's failure must not end the run: it is recorded instead
        out = TileOutcome(int(tile), "failed", error=one_line(exc),
                          traceback=None if isinstance(exc, SelectorError) else traceback.format_exc())
    out.duration_s = time.perf_counter() - t0
    out.peak_rss_mib, out.pid = peak_rss_mib(), os.getpid()
    return out


def run_tiles(cfg: Config, items: list) -> list[TileOutcome]:
    """Do several tiles one after the other in this process (a pool worker's unit of work).

    Consecutive tiles in nested order are neighbours on the sky, so a chunk of them reads most of
    its files from this worker's :data:`TILE_CACHE`; and their files are made durable together
    (one journal commit for the chunk rather than a few per file) before the outcomes are returned
    to be recorded. The time of that commit is shared among the chunk's tiles.
    """
    with DurableBatch() as batch:
        outcomes = [run_tile(cfg, t, p, batch=batch) for t, p in items]
        t0 = time.perf_counter()
    share = (time.perf_counter() - t0) / max(1, len(outcomes))
    for out in outcomes:
        out.write_s += share
        out.duration_s += share
    return outcomes


def _work(cfg: Config, tile: int, plan: TilePlan, batch: DurableBatch) -> TileOutcome:
    lay = layout_of(cfg)
    mode = plan.mode
    out = TileOutcome(tile)
    features = None
    clock = time.perf_counter()
    if mode in ("compute", "check"):
        consulted, digests, files = {}, {}, {}

        def on_input(kind, t, path, part, decoded, *, digest):
            rel = tile_rel(cfg, kind, t)
            consulted[rel] = part is not None
            if part is None:
                return
            # a tile whose margin grows reads its files again: the last reading is the one used
            files[rel] = (rel, decoded.sha256, decoded.size, decoded.mtime_ns)
            if t == tile and kind == "astrometric" or kind == "infrared":
                _check_columns(cfg, kind, path, part)
            if digest is not None:
                digests[rel] = digest

        try:
            loaded, m = load_and_match(cfg, tile, on_input, cache=TILE_CACHE)
            own = loaded.own
        except InputError as exc:
            if not str(exc).startswith(str(lay.tile_file("astrometric", cfg.tiling.order, tile))):
                # a neighbour's file, read for the margin: say that this tile fails because of it
                raise InputError(f"{BLOCKED_BY} {exc}") from None
            raise
        content_key = combined_digest(digests)
        rows = own.num_rows
        out.inputs, out.content_key, out.rows = sorted(consulted.items()), content_key, rows
        out.files = sorted(files.values())
        # the match decides whether the margins must grow and be read again: the readings are timed inside
        out.read_s = loaded.read_s
        out.match_s, clock = time.perf_counter() - clock - loaded.read_s, time.perf_counter()
        if mode == "check" and content_key == plan.content_key:
            if not plan.reselect:
                out.action = "verified"
                return out
            mode = "select"
        else:
            features = _normalised(m.features)
            out.match_s, clock = out.match_s + time.perf_counter() - clock, time.perf_counter()
            match_prov = {"provenance": {"tile": tile, "match_key": plan.match_key, "content_key": content_key,
                                         "selector_version": __version__}}
            write_parquet(features, lay.tile_output(tile, "features.parquet"), match_prov, batch=batch)
            # the blend count of every infrared source the tile owns, matched or not
            write_parquet(m.infrared, lay.tile_output(tile, "infrared.parquet"), match_prov, batch=batch)
            chance, n_shifted = m.chance, m.n_chance_sources
            # the chance pairs of the shifted sources and how many shifted sources took part (none: no estimate)
            chance = _normalised(chance) if chance is not None else features.slice(0, 0)
            write_parquet(chance, chance_file(lay, tile), {**match_prov, CHANCE_SOURCES_KEY: n_shifted}, batch=batch)
            out.action = "computed"
            out.write_s, clock = time.perf_counter() - clock, time.perf_counter()
    else:
        rows = int(plan.rows)
    if features is None:
        features = _normalised(read_parquet(lay.tile_output(tile, "features.parquet")))
        chance, n_shifted = _read_chance(lay, tile)
        out.action = "reselected"
        out.read_s, clock = out.read_s + time.perf_counter() - clock, time.perf_counter()
    scorer, redshifts = _scorer(cfg, plan.model)
    result = select_tile(cfg, tile, rows, features, scorer, redshifts=redshifts)
    check_accounting(result.n_rows, result.rejects.num_rows, result.cutflow)
    estimate = estimate_chance(cfg, result, chance, n_shifted=n_shifted, scorer=scorer)
    out.select_s, clock = time.perf_counter() - clock, time.perf_counter()
    tile_prov = {"tile": tile, "match_key": plan.match_key, "selection_key": plan.selection_key,
                 "selector_version": __version__}
    write_parquet(result.candidates, lay.tile_output(tile, "candidates.parquet"), {"provenance": tile_prov},
                  batch=batch)
    write_parquet(result.rejects, lay.tile_output(tile, "rejects.parquet"), batch=batch)
    record = {"tile": tile, "rows": result.n_rows, "rejects": result.rejects.num_rows, "cutflow": result.cutflow}
    if estimate is not None:
        record["chance"] = estimate.as_dict()
    write_json(record, lay.tile_output(tile, "cutflow.json"), batch=batch)
    out.write_s += time.perf_counter() - clock
    out.rows, out.rejects, out.candidates = result.n_rows, result.rejects.num_rows, result.candidates.num_rows
    out.cutflow = [[n, int(c)] for n, c in result.cutflow]
    return out


def _read_chance(lay, tile: int):
    """The chance pairs a tile's match wrote, and the number of shifted sources; (None, 0) without them."""
    path = chance_file(lay, tile)
    if not path.exists():
        return None, 0
    table = read_parquet(path)
    n_shifted = int(json.loads((table.schema.metadata or {}).get(CHANCE_SOURCES_KEY.encode(), b"0")))
    return _normalised(table), n_shifted


def worker_count(cfg: Config, workers: int | None) -> int:
    """Workers to use: ``workers``, else ``run.workers``; 0 or less means one per core."""
    n = cfg.run.workers if workers is None else workers
    return n if n and n > 0 else (os.cpu_count() or 1)


def _worker_init(parent_pid: int) -> None:
    """Start of a pool worker: die with the parent, and let go of the inherited lock descriptor."""
    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, signal.SIGKILL)  # PR_SET_PDEATHSIG (Linux): a killed run leaves no orphan writers
    except (OSError, AttributeError):
        pass
    if os.getppid() != parent_pid:
        os._exit(1)
    close_inherited_lock()


#: Consecutive tiles given to a pool worker at a time: enough for its tile cache to serve most
#: neighbour reads (see selector.store.tilecache), few enough that the workers stay evenly busy.
CHUNK_TILES = 16


def chunks(items: list, workers: int) -> list[list]:
    """``items`` cut into runs of consecutive tiles, at most :data:`CHUNK_TILES` long, at least four per worker."""
    size = max(1, min(CHUNK_TILES, len(items) // (4 * max(1, workers))))
    return [items[i:i + size] for i in range(0, len(items), size)]


def _local_pool(cfg: Config, items: list, n: int):
    import multiprocessing as mp
    from concurrent.futures.process import BrokenProcessPool

    ctx = mp.get_context("fork") if "fork" in mp.get_all_start_methods() else None
    if ctx is not None:
        galactic_matrix()  # built once here (astropy frames are slow to start); forked workers inherit it
    pool = ProcessPoolExecutor(max_workers=min(n, len(items)), mp_context=ctx, initializer=_worker_init,
                               initargs=(os.getpid(),))
    finished = False
    try:
        futures = {pool.submit(run_tiles, cfg, chunk): chunk for chunk in chunks(items, n)}
        for f in as_completed(futures):
            try:
                outcomes = f.result()
            except BrokenProcessPool:
                message = "its worker process died (killed, or out of memory?); run again to retry"
                outcomes = [failure(t, message) for t, _ in futures[f]]
            for out in outcomes:
                yield out.tile, out
        finished = True
    finally:
        if finished:
            pool.shutdown(wait=True)  # every worker has exited and been reaped when the run goes on
        else:  # interrupted or abandoned: do not wait for tiles nobody will record
            pool.shutdown(wait=False, cancel_futures=True)


def _dask(cfg: Config, items: list, *, workers: int, scheduler: str | None, note):
    try:
        from distributed import Client, LocalCluster
        from distributed import as_completed as dask_as_completed
    except ImportError:
        raise SelectorError("run.executor = 'dask' needs the dask[distributed] package; install it with "
                            "`pip install 'quasar-selector[cluster]'`") from None
    import logging
    import uuid
    import warnings

    cluster = None
    try:
        if scheduler:
            client = Client(scheduler, timeout="20s")
            note(f"Dask scheduler {scheduler}: {len(client.scheduler_info().get('workers', {}))} workers")
        else:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # "port 8787 in use": its status page moves to a free port
                cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                                       dashboard_address=None, silence_logs=logging.ERROR)
            client = Client(cluster)
            note(f"local Dask cluster with {workers} worker processes")
    except (OSError, TimeoutError) as exc:
        if cluster is not None:
            cluster.close()
        raise SelectorError(f"cannot reach the Dask scheduler at {scheduler} ({one_line(exc)}); check "
                            "run.scheduler / --scheduler, or leave it out for a local cluster") from None
    token = uuid.uuid4().hex[:12]
    try:
        futures = {client.submit(run_tile, cfg, t, p, key=f"selector-tile-{t}-{token}", pure=False, retries=0): t
                   for t, p in items}
        for f in dask_as_completed(list(futures)):
            t = futures[f]
            if f.status == "finished":
                yield t, f.result()
            else:
                exc = f.exception()
                yield t, failure(t, f"the Dask worker running it failed ({one_line(exc)}); run again to retry")
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def execute(cfg: Config, items: list, *, executor: str, workers: int, scheduler: str | None = None,
            note=print):
    """Run the planned tiles; yield ``(tile, TileOutcome)`` as tiles finish, in any order.

    Parameters
    ----------
    cfg : Config
    items : list of (int, TilePlan)
        The tiles to do, in the order to start them.
    executor : {"local", "dask"}
    workers : int
        Local worker processes (or local Dask workers); one means in this process.
    scheduler : str, optional
        Dask scheduler address; a local Dask cluster when not given.
    note : callable
        Where to say which executor was started.
    """
    if not items:
        return
    if executor == "dask":
        yield from _dask(cfg, items, workers=workers, scheduler=scheduler, note=note)
    elif workers == 1 or len(items) == 1:
        try:
            for chunk in chunks(items, 1):
                for out in run_tiles(cfg, chunk):
                    yield out.tile, out
        finally:
            TILE_CACHE.clear()  # this is the caller's process: give the decoded tiles back
    else:
        yield from _local_pool(cfg, items, workers)


_FAULT_COUNTS: dict = {}


def fault(event: str) -> None:
    """Kill this process with SIGKILL at the moment named by ``$SELECTOR_TEST_KILL_AT`` (tests)."""
    spec = os.environ.get(KILL_AT_ENV)
    if not spec:
        return
    name, _, count = spec.partition("@")
    if name != event:
        return
    _FAULT_COUNTS[event] = _FAULT_COUNTS.get(event, 0) + 1
    if _FAULT_COUNTS[event] >= int(count or 1):
        sys.stdout.flush()
        sys.stderr.flush()
        os.kill(os.getpid(), signal.SIGKILL)
