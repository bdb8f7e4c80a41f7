"""Running every tile, night after night: the manifest, resumption, executors, merge, provenance.

A run goes through four steps, all recorded in the run manifest (:mod:`selector.manifest`):

1. **Lock.** ``run/.lock`` is held with ``flock`` for the whole run, so a second run on the same
   folder is refused; the kernel drops the lock when the process dies, however it dies.
2. **Plan.** Each tile's record holds the keys its outputs were made from: the match key
   (matching sections of the config and software version), the content key of the rows it read
   (its own file, and the part of every neighbour file within its margins), the selection key
   (selection sections, classifier model file, version) and the size and modification time of its
   output files. Input files are fingerprinted by SHA-256, remembered by size and modification
   time, so an unchanged night reads nothing. A tile is then *reused* (nothing to do), *re-selected*
   (the selection changed: cuts re-applied to its feature cache), *checked* (an input file
   changed: its rows are re-read and compared, and it is recomputed only if what it uses changed)
   or *computed*.
3. **Work.** :func:`run_tile` does one tile on any executor (in-process, a local process pool,
   or Dask) and writes its files atomically; the manifest records it when its result arrives.
   A tile whose input is damaged fails alone, with its error recorded.
4. **Merge.** The per-tile candidates are merged into the ranked list, the cut-flows summed, the
   rows accounted for, and the provenance written, each file atomically. Merged files depend only
   on the tiles' outputs and the configuration, never on times, so a resumed run ends with the
   same bytes as an uninterrupted one.
"""

from __future__ import annotations

import fcntl
import json
import os
import shutil
import signal
import socket
import sys
import time
import traceback
from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor, as_completed
from dataclasses import dataclass, field
from pathlib import Path
import numpy as np
import pyarrow as pa
from selector import __version__
from selector.core import schema, tiles
from selector.core.frames import galactic_matrix
from selector.settings.config import MATCH_SECTIONS, SELECTION_SECTIONS, Config, config_hash
from selector.errors import InputError, SelectorError
from selector.store.io import file_sha256, read_parquet, write_json, write_parquet, write_table, write_text
from selector.store.keys import combined_digest, digest, match_key, model_key, model_path, model_sha, result_config, selection_key, table_digest
from selector.store.manifest import Manifest, pid_alive, utc_now
from selector.core.selection import check_accounting, rank_candidates
from selector.store.tilereader import load_tile
from selector.core.tilematch import match_tile
from selector.jobs.run.tile import select_tile, tile_output_dir
from selector.jobs.train import load_scorer


#: Files of a tile that depend only on the matching (the feature cache).
FEATURE_FILES = ("features.parquet", "infrared.parquet")


#: Files of a tile that the selection writes.
SELECTION_FILES = ("candidates.parquet", "rejects.parquet", "cutflow.json")


#: Merged outputs, in the order they are written.
MERGED_FILES = ("ecsv", "csv", "parquet", "cutflow", "provenance")


#: Environment variable naming a moment at which the run kills itself with SIGKILL (tests only):
#: ``planned``, ``tile@N`` (N-th tile result received, not yet recorded), ``recorded@N``,
#: ``merge:<ecsv|csv|parquet|cutflow|provenance>`` (after writing that merged file) or ``merged``.
KILL_AT_ENV = "SELECTOR_TEST_KILL_AT"


# a file modified this recently may still change within the file system's timestamp resolution,
# so its fingerprint is re-read next time instead of being trusted from size and time
_FRESH_NS = 2_000_000_000


@dataclass
class RunResult:
    """What a run did.

    Attributes
    ----------
    ok : bool
        Every tile finished and the merged outputs are complete.
    tiles : int
        Tiles in the merged outputs.
    candidates : int
        Rows of the ranked list.
    cutflow : list of (stage, rows left)
        Summed over the merged tiles.
    outputs : dict
        Paths of the merged outputs.
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


def _rel(cfg: Config, kind: str, tile: int) -> str:
    return f"{kind}/order{cfg.tiling.order:02d}/tile{int(tile):08d}.parquet"


def _ingest_summaries(cfg: Config) -> dict:
    out = {}
    for kind in ("astrometric", "infrared"):
        path = cfg.tiles_dir / kind / "summary.json"
        if not path.exists():
            raise SelectorError(f"{path}: not found; run `selector ingest --config ...` first")
        try:
            out[kind] = json.loads(path.read_text())
        except ValueError:
            raise SelectorError(f"{path}: damaged (not JSON); run `selector ingest --config ...` again") from None
        order = out[kind].get("order")
        if order is not None and int(order) != cfg.tiling.order:
            raise SelectorError(f"{path}: the {kind} tiles were ingested at order {order} but tiling.order = "
                                f"{cfg.tiling.order}; run `selector ingest --config ...` again")
    return out


def provenance(cfg: Config) -> dict:
    """Config hashes, input fingerprints (from the ingest summaries), model file and package version."""
    summaries = _ingest_summaries(cfg)
    return {
        "config_hash": config_hash(cfg, tuple(result_config(cfg))),
        "match_config_hash": config_hash(cfg, MATCH_SECTIONS),
        "selection_config_hash": config_hash(cfg, SELECTION_SECTIONS),
        "classifier_model_sha256": model_sha(cfg),
        "input_fingerprints": {k: s["input_fingerprints"] for k, s in summaries.items()},
        "selector_version": __version__,
    }


_LOCK_FD: int | None = None


class RunLock:
    """Exclusive use of a run folder for one process, released by the kernel when it dies.

    Raises
    ------
    SelectorError
        When another process holds the folder; the message names the folder and that process.
    """

    def __init__(self, run_dir: Path):
        self.path = Path(run_dir) / ".lock"
        self.fd = None

    def __enter__(self):
        global _LOCK_FD
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            raise SelectorError(f"{self.path.parent}: cannot write the run folder ({exc.strerror}); check "
                                "project.output_dir") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = os.pread(fd, 200, 0).decode(errors="replace").strip() or "another process"
            os.close(fd)
            raise SelectorError(f"{self.path.parent}: another `selector run` is using this folder ({holder}); wait "
                                "for it to finish (`selector status --config ...` shows its progress) or give "
                                "this run another project.output_dir") from None
        except OSError as exc:
            os.close(fd)
            raise SelectorError(f"{self.path}: cannot lock the run folder ({exc.strerror}); its file system does "
                                "not support locks, so put project.output_dir on one that does") from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"pid {os.getpid()} on {socket.gethostname()}, since {utc_now()}\n".encode(), 0)
        self.fd = _LOCK_FD = fd
        return self

    def __exit__(self, *exc):
        global _LOCK_FD
        if self.fd is not None:
            os.ftruncate(self.fd, 0)
            fcntl.flock(self.fd, fcntl.LOCK_UN)
            os.close(self.fd)
            self.fd = _LOCK_FD = None


def run_lock(cfg: Config) -> RunLock:
    """The lock of ``cfg``'s run folder, for anything else that rewrites tile results."""
    return RunLock(cfg.run_dir)


_SCORERS: dict = {}


def _scorer(cfg: Config, model: tuple[str, str] | None):
    if model is None:
        return None
    if model not in _SCORERS:
        _SCORERS.clear()
        _SCORERS[model] = load_scorer(model[0], cfg)
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


def _check_columns(cfg: Config, kind: str, path: Path, table: pa.Table) -> None:
    missing = [c for c in _required_columns(cfg, kind) if c not in table.column_names]
    if missing:
        raise InputError(f"{path}: column '{missing[0]}' is missing ({len(missing)} of the ingested {kind} columns "
                         f"are); this is not a tile of this configuration, run `selector ingest --config ...` again")


def _normalised(features: pa.Table) -> pa.Table:
    # the same table whether it comes from the match or from the cache file, so both give equal bytes
    return features.replace_schema_metadata(None).combine_chunks()


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    first = text[0] if text else ""
    if isinstance(exc, SelectorError):
        return first
    return f"{type(exc).__name__}: {first} (unexpected; the run log has the traceback)"


def run_tile(cfg: Config, tile: int, plan: dict | None = None) -> dict:
    """Do one tile's work and write its files; the unit of work of every executor.

    Parameters
    ----------
    cfg : Config
    tile : int
    plan : dict, optional
        What to do, as made by the planner: ``mode`` is ``compute`` (load, match, select),
        ``check`` (load; match and select only if the rows read differ from ``content_key``, else
        re-select only if ``select`` is true) or ``select`` (re-apply the selection to the
        feature cache; needs ``rows``). Also ``match_key``, ``selection_key`` and ``model``
        (classifier path and SHA-256, or None). Default: compute with ``cfg``'s keys.

    Returns
    -------
    dict
        ``tile``, ``action`` (``computed``, ``reselected``, ``verified`` or ``failed``),
        ``duration_s``; for finished tiles ``rows``, ``rejects``, ``candidates``, ``cutflow``; after
        loading, ``inputs`` (each consulted tile file, relative to the tiles folder, and whether it
        existed) and ``content_key``; for failures ``error`` (one line) and ``traceback``.
        Exceptions never escape: a tile's failure is its result.
    """
    t0 = time.perf_counter()
    if plan is None:
        sha = model_sha(cfg)
        plan = {"mode": "compute", "match_key": match_key(cfg),
                "selection_key": selection_key(cfg, model_key(cfg, sha)),
                "model": (str(model_path(cfg)), sha) if sha else None}
    try:
        out = _work(cfg, int(tile), plan)
    except Exception as exc:  # a tile's failure must not end the run: it is recorded instead
        out = {"tile": int(tile), "action": "failed", "error": _one_line(exc),
               "traceback": None if isinstance(exc, SelectorError) else traceback.format_exc()}
    out["duration_s"] = time.perf_counter() - t0
    return out


def _work(cfg: Config, tile: int, plan: dict) -> dict:
    folder = tile_output_dir(cfg, tile)
    mode = plan["mode"]
    out = {"tile": tile}
    features = None
    if mode in ("compute", "check"):
        consulted, digests = {}, {}

        def on_input(kind, t, path, part):
            rel = _rel(cfg, kind, t)
            consulted[rel] = part is not None
            if part is None:
                return
            if t == tile and kind == "astrometric" or kind == "infrared":
                _check_columns(cfg, kind, path, part)
            if part.num_rows:
                digests[rel] = table_digest(part)

        own, neighbours, infrared = load_tile(cfg, tile, on_input)
        content_key = combined_digest(digests)
        rows = own.num_rows
        out.update(inputs=sorted(consulted.items()), content_key=content_key, rows=rows)
        if mode == "check" and content_key == plan.get("content_key"):
            if not plan.get("select"):
                out["action"] = "verified"
                return out
            mode = "select"
        else:
            m = match_tile(own, neighbours, infrared, tile, cfg.match.radius_arcsec, cfg.epoch_difference_yr,
                           cfg.tiling.order)
            features = _normalised(m.features)
            match_prov = {"provenance": {"tile": tile, "match_key": plan["match_key"], "content_key": content_key,
                                         "selector_version": __version__}}
            write_parquet(features, folder / "features.parquet", match_prov)
            # the blend count of every infrared source the tile owns, matched or not
            write_parquet(m.infrared, folder / "infrared.parquet", match_prov)
            out["action"] = "computed"
    else:
        rows = int(plan["rows"])
    if features is None:
        features = _normalised(read_parquet(folder / "features.parquet"))
        out["action"] = "reselected"
    result = select_tile(cfg, tile, rows, features, _scorer(cfg, plan.get("model")))
    check_accounting(result.n_rows, result.rejects.num_rows, result.cutflow)
    tile_prov = {"tile": tile, "match_key": plan["match_key"], "selection_key": plan["selection_key"],
                 "selector_version": __version__}
    write_parquet(result.candidates, folder / "candidates.parquet", {"provenance": tile_prov})
    write_parquet(result.rejects, folder / "rejects.parquet")
    write_json({"tile": tile, "rows": result.n_rows, "rejects": result.rejects.num_rows, "cutflow": result.cutflow},
               folder / "cutflow.json")
    out.update(rows=result.n_rows, rejects=result.rejects.num_rows, candidates=result.candidates.num_rows,
               cutflow=[[n, int(c)] for n, c in result.cutflow])
    return out


def _worker_count(cfg: Config, workers: int | None) -> int:
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
    if _LOCK_FD is not None:
        try:
            os.close(_LOCK_FD)  # closing a copy never releases the parent's flock
        except OSError:
            pass


def _failure(tile: int, message: str) -> dict:
    return {"tile": int(tile), "action": "failed", "error": message, "duration_s": 0.0}


def _local_pool(cfg: Config, items: list, n: int):
    import multiprocessing as mp
    from concurrent.futures.process import BrokenProcessPool

    ctx = mp.get_context("fork") if "fork" in mp.get_all_start_methods() else None
    if ctx is not None:
        galactic_matrix()  # built once here (astropy frames are slow to start); forked workers inherit it
    pool = ProcessPoolExecutor(max_workers=min(n, len(items)), mp_context=ctx, initializer=_worker_init,
                               initargs=(os.getpid(),))
    try:
        futures = {pool.submit(run_tile, cfg, t, p): t for t, p in items}
        for f in as_completed(futures):
            t = futures[f]
            try:
                yield t, f.result()
            except BrokenProcessPool:
                yield t, _failure(t, "its worker process died (killed, or out of memory?); run again to retry")
    finally:
        pool.shutdown(wait=False, cancel_futures=True)


def _dask(cfg: Config, items: list, n: int, scheduler: str | None, note):
    try:
        from distributed import Client, LocalCluster
        from distributed import as_completed as dask_as_completed
    except ImportError:
        raise SelectorError("run.executor = 'dask' needs the dask[distributed] package; install it with "
                            "`pip install 'selector[cluster]'`") from None
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
                cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                                       dashboard_address=None, silence_logs=logging.ERROR)
            client = Client(cluster)
            note(f"local Dask cluster with {n} worker processes")
    except (OSError, TimeoutError) as exc:
        if cluster is not None:
            cluster.close()
        raise SelectorError(f"cannot reach the Dask scheduler at {scheduler} ({_one_line(exc)}); check "
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
                yield t, _failure(t, f"the Dask worker running it failed ({_one_line(exc)}); run again to retry")
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def _execute(cfg: Config, items: list, executor: str, n: int, scheduler: str | None, note):
    """Yield ``(tile, result)`` as tiles finish, in any order."""
    if not items:
        return
    if executor == "dask":
        yield from _dask(cfg, items, n, scheduler, note)
    elif n == 1 or len(items) == 1:
        for t, p in items:
            yield t, run_tile(cfg, t, p)
    else:
        yield from _local_pool(cfg, items, n)


_FAULT_COUNTS: dict = {}


def _fault(event: str) -> None:
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


class _Reporter:
    """Messages to the user, a progress display on a terminal (plain lines otherwise), the run log."""

    def __init__(self, log, quiet: bool, verbose: bool, log_path: Path, interval_s: float, stream=None):
        self.log, self.quiet, self.verbose = log, quiet, verbose
        self.stream = stream or sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.interval_s = interval_s
        log_path.parent.mkdir(parents=True, exist_ok=True)
        self.file = open(log_path, "a", encoding="utf-8", buffering=1)
        self.shown = False
        self.t0 = time.monotonic()
        self.last_line = float("-inf")
        self.last_draw = float("-inf")

    def _to_file(self, msg: str) -> None:
        stamp = utc_now()
        for line in str(msg).splitlines() or [""]:
            self.file.write(f"{stamp} {line}\n")

    def _clear(self) -> None:
        if self.shown:
            self.stream.write("\r\033[K")
            self.stream.flush()
            self.shown = False

    def info(self, msg: str) -> None:
        self._to_file(msg)
        if not self.quiet:
            self._clear()
            self.log(msg)

    def detail(self, msg: str) -> None:
        self._to_file(msg)
        if self.verbose and not self.quiet:
            self._clear()
            self.log(msg)

    def always(self, msg: str) -> None:
        self._to_file(msg)
        self._clear()
        self.log(msg)

    def to_file(self, msg: str) -> None:
        self._to_file(msg)

    def progress(self, done: int, total: int, rows: int, failed: int, final: bool = False) -> None:
        now = time.monotonic()
        elapsed = max(now - self.t0, 1e-9)
        rate = done / elapsed
        left = (total - done) / rate if rate > 0 else float("nan")
        line = f"tiles {done:,}/{total:,}" + (f" ({failed} failed)" if failed else "") + f" · {rows:,} rows"
        if done == 0:
            line += " · starting"
        elif done < total:
            line += f" · {rate:.1f} tiles/s · about {_clock(left)} left"
        else:
            line += f" · {rate:.1f} tiles/s · {_clock(elapsed)} elapsed"
        due = final or now - self.last_line >= self.interval_s
        if due:
            self._to_file(line)
            self.last_line = now
        if self.quiet:
            return
        if self.tty:
            if final or now - self.last_draw >= 0.1:
                self.stream.write("\r" + line + "\033[K" + ("\n" if final else ""))
                self.stream.flush()
                self.shown = not final
                self.last_draw = now
        elif due:
            self.stream.write(line + "\n")
            self.stream.flush()

    def close(self) -> None:
        self._clear()
        self.file.close()


def _clock(seconds: float) -> str:
    s = int(round(seconds))
    return f"{s // 3600}:{s % 3600 // 60:02d}:{s % 60:02d}" if s >= 3600 else f"{s // 60}:{s % 60:02d}"


def _scan_inputs(cfg: Config, man: Manifest, extra: set, threads: int) -> dict:
    """SHA-256 of every tile file (relative path → digest, None if absent); unchanged files are not read."""
    root = cfg.tiles_dir
    paths = set(extra)
    for kind in ("astrometric", "infrared"):
        for t in tiles.list_tiles(root, kind, cfg.tiling.order):
            paths.add(_rel(cfg, kind, t))
    cache = man.file_cache()
    out, todo = {}, []
    for rel in sorted(paths):
        try:
            st = os.stat(root / rel)
        except FileNotFoundError:
            out[rel] = None
            continue
        known = cache.get(rel)
        if known and known[0] == st.st_size and known[1] == st.st_mtime_ns:
            out[rel] = known[2]
        else:
            todo.append((rel, st))
    now_ns = time.time_ns()
    with ThreadPoolExecutor(max_workers=max(1, threads)) as pool:  # hashlib releases the GIL
        digests = list(pool.map(lambda item: _file_digest(root / item[0]), todo))
    rows = []
    for (rel, st), file_digest in zip(todo, digests):
        out[rel] = file_digest
        if file_digest == _UNREADABLE:
            continue  # the tiles that read it will fail on it, each with the reason
        mtime = -1 if now_ns - st.st_mtime_ns < _FRESH_NS else st.st_mtime_ns
        rows.append((rel, st.st_size, mtime, file_digest))
    man.store_files(rows, [p for p in cache if out.get(p) in (None, _UNREADABLE)])
    return out


_UNREADABLE = "unreadable"


def _file_digest(path: Path) -> str | None:
    try:
        return file_sha256(path)
    except FileNotFoundError:
        return None
    except OSError:
        return _UNREADABLE


def _output_stats(cfg: Config, tile: int, names) -> dict | None:
    folder = tile_output_dir(cfg, tile)
    out = {}
    for name in names:
        try:
            st = os.stat(folder / name)
        except FileNotFoundError:
            return None
        out[name] = [st.st_size, st.st_mtime_ns]
    return out


def _outputs_intact(cfg: Config, rec: dict, names) -> bool:
    recorded = rec.get("outputs") or {}
    now = _output_stats(cfg, rec["tile"], names)
    return now is not None and all(recorded.get(n) == now[n] for n in names)


def _inputs_key(inputs: list, shas: dict) -> str:
    return combined_digest({rel: shas.get(rel) for rel in inputs})


def _plan(cfg: Config, records: dict, tile_ids: list, shas: dict, mkey: str, skey: str, model, force: bool):
    plans, reused = {}, []
    for t in tile_ids:
        rec = records.get(t)
        base = {"match_key": mkey, "selection_key": skey, "model": model}
        if (force or rec is None or rec["status"] != "done" or rec["match_key"] != mkey or not rec.get("inputs")
                or not _outputs_intact(cfg, rec, FEATURE_FILES)):
            plans[t] = {**base, "mode": "compute"}
            continue
        reselect = rec["selection_key"] != skey or not _outputs_intact(cfg, rec, SELECTION_FILES)
        if _inputs_key(rec["inputs"], shas) != rec["inputs_key"]:
            plans[t] = {**base, "mode": "check", "content_key": rec["content_key"], "select": reselect}
        elif reselect:
            plans[t] = {**base, "mode": "select", "rows": rec["rows"]}
        else:
            reused.append(t)
    return plans, reused


def run(cfg: Config, workers: int | None = None, executor: str | None = None, scheduler: str | None = None,
        quiet: bool = False, verbose: bool = False, log=print, *, force: bool = False,
        config_path: str | os.PathLike | None = None) -> RunResult:
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
    n = _worker_count(cfg, workers)
    run_dir = cfg.run_dir
    with RunLock(run_dir), Manifest(run_dir / "manifest.sqlite") as man:
        man.mark_dead_runs()
        run_id = man.begin_run(pid=os.getpid(), host=socket.gethostname(), version=__version__,
                               executor=executor, workers=n)
        log_path = run_dir / "logs" / f"run-{run_id}.log"
        rep = _Reporter(log, quiet, verbose, log_path, cfg.run.progress_interval_s)
        man.update_run(run_id, log_file=str(log_path))
        try:
            result = _run(cfg, man, run_id, rep, executor, n, scheduler, force, config_path)
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
            man.end_run(run_id, "failed", message=_one_line(exc))
            rep.to_file(traceback.format_exc())
            rep.close()
            raise
        rep.close()
        result.run_id, result.log_file = run_id, log_path
        return result


def _run(cfg, man, run_id, rep, executor, n, scheduler, force, config_path) -> RunResult:
    prov = provenance(cfg)
    ingest = _ingest_summaries(cfg)
    man.update_run(run_id, config_hash=prov["config_hash"], match_hash=prov["match_config_hash"],
                   selection_hash=prov["selection_config_hash"])
    rep.to_file(f"run {run_id}: selector {__version__}, executor {executor}, {n} workers, pid {os.getpid()}")
    expected_rows = {int(k): int(v) for k, v in ingest["astrometric"].get("rows_per_tile", {}).items()}
    # a tile the ingest wrote but whose file is gone is listed too: it fails, named, instead of vanishing
    tile_ids = sorted(set(tiles.list_tiles(cfg.tiles_dir, "astrometric", cfg.tiling.order))
                      | {t for t, n_rows in expected_rows.items() if n_rows})
    records = man.tiles()
    mkey = match_key(cfg)
    sha = prov["classifier_model_sha256"]
    skey = selection_key(cfg, model_key(cfg, sha))
    model = (str(model_path(cfg)), sha) if sha else None
    recorded_inputs = {rel for rec in records.values() for rel in (rec.get("inputs") or [])}
    shas = _scan_inputs(cfg, man, recorded_inputs, n)
    plans, reused = _plan(cfg, records, tile_ids, shas, mkey, skey, model, force)
    stale = sorted(set(records) - set(tile_ids))
    man.plan(sorted(plans), stale)
    for t in stale:  # tiles gone from the ingested catalogue must not be merged
        shutil.rmtree(tile_output_dir(cfg, t), ignore_errors=True)
    # temporary files of writes cut short by a killed run (only tiles never recorded can have them)
    for folder in [cfg.run_dir] + [tile_output_dir(cfg, t) for t in plans]:
        for tmp in folder.glob(".*.tmp"):
            tmp.unlink(missing_ok=True)
    modes = {m: sum(p["mode"] == m for p in plans.values()) for m in ("compute", "check", "select")}
    rep.info(f"run {run_id}: {len(tile_ids)} tiles — {modes['compute']} to compute, {modes['select']} to re-select, "
             f"{modes['check']} to check (an input file changed), {len(reused)} unchanged")
    man.update_run(run_id, tiles=len(tile_ids), reused=len(reused))
    _fault("planned")

    # biggest tiles first, so no worker is left with a large tile at the end
    items = sorted(plans.items(), key=lambda kv: (-expected_rows.get(kv[0], 0), kv[0]))
    actions = dict.fromkeys(("computed", "reselected", "verified", "failed"), 0)
    actions["reused"] = len(reused)
    done_rows, t_work = 0, time.monotonic()
    if items:
        rep.progress(0, len(items), 0, 0)
    for t, res in _execute(cfg, items, executor, n, scheduler, rep.info):
        _fault("tile")
        res = _record(cfg, man, run_id, t, plans[t], res, shas, records.get(t), expected_rows)
        _fault("recorded")
        actions[res["action"]] += 1
        done_rows += int(res.get("rows") or 0)
        if res["action"] == "failed":
            rep.detail(f"tile {t}: FAILED: {res['error']}")
            if res.get("traceback"):
                rep.to_file(res["traceback"])
        else:
            rep.detail(f"tile {t}: {res['action']}, {res['rows']:,} rows, {res.get('candidates', 0):,} candidates, "
                       f"{res['duration_s']:.2f} s")
        rep.progress(sum(actions.values()) - len(reused), len(items), done_rows, actions["failed"])
    if items:
        rep.progress(len(items), len(items), done_rows, actions["failed"], final=True)
    work_s = time.monotonic() - t_work
    man.update_run(run_id, computed=actions["computed"], reselected=actions["reselected"],
                   verified=actions["verified"], failed=actions["failed"], work_s=work_s)

    records = man.tiles()
    failed = {t: records[t]["error"] for t in tile_ids if records[t]["status"] != "done"}
    finished = [t for t in tile_ids if t not in failed]
    summaries = [{"tile": t, "rows": records[t]["rows"], "rejects": records[t]["rejects"],
                  "candidates": records[t]["candidates"], "cutflow": records[t]["cutflow"]} for t in finished]
    complete = not failed
    merge_prov = {**prov, "complete": complete, "failed_tiles": sorted(failed)}
    outputs = _merged_paths(cfg)
    mkey_now = digest("merge", merge_prov, [(t, records[t]["match_key"], records[t]["content_key"],
                                           records[t]["selection_key"]) for t in finished])
    state = man.get("merge") or {}
    up_to_date = (state.get("key") == mkey_now and state.get("outputs") == _file_stats(outputs.values()))
    if failed and not cfg.run.merge_incomplete:
        result = _result_from_records(summaries, outputs)
        merged = False
        rep.always(f"{len(failed)} tiles failed; run.merge_incomplete = false, so the merged outputs in {cfg.run_dir} "
                   "were left as they were")
    elif up_to_date and not force:
        result = _result_from_records(summaries, outputs)
        merged = False
    else:
        result = merge(cfg, summaries, merge_prov, fault=_fault)
        merged = True
        man.set("merge", {"key": mkey_now, "outputs": _file_stats(outputs.values())})
    _fault("merged")
    lines = account(summaries, result.candidates, ingest, failed, expected_rows)
    result.failed, result.actions, result.merged, result.complete = failed, actions, merged, complete
    result.ok, result.accounting = complete, lines
    status = "ok" if complete else "incomplete"
    man.end_run(run_id, status, rows=sum(s["rows"] for s in summaries), candidates=result.candidates,
                merged=int(merged), message=None if complete else f"{len(failed)} tiles failed")
    _summarise(cfg, rep, run_id, result, work_s, config_path)
    return result


def _record(cfg, man, run_id, t, plan, res, shas, old, expected_rows) -> dict:
    """Check a tile's result against the ingest summary and store it in the manifest."""
    if res["action"] != "failed" and t in expected_rows and res["rows"] != expected_rows[t]:
        res = {**res, "action": "failed",
               "error": f"{cfg.tiles_dir / _rel(cfg, 'astrometric', t)}: holds {res['rows']:,} rows but the ingest "
                        f"summary says {expected_rows[t]:,}; the tiles changed after ingest, run `selector ingest "
                        "--config ...` again"}
    if res["action"] == "failed":
        man.record_tile(run_id, t, "failed", status="failed", error=res["error"], duration_s=res["duration_s"])
        return res
    fields = {"status": "done", "error": None, "duration_s": res["duration_s"], "match_key": plan["match_key"],
              "selection_key": plan["selection_key"]}
    if "inputs" in res:
        inputs = [rel for rel, _ in res["inputs"]]
        for rel, existed in res["inputs"]:
            if rel not in shas or (shas[rel] is None) == existed:
                # appeared or vanished while the run went on: fingerprint what is there now
                shas[rel] = _file_digest(cfg.tiles_dir / rel)
        fields.update(inputs=inputs, inputs_key=_inputs_key(inputs, shas), content_key=res["content_key"])
    if res["action"] != "verified":
        fields.update(rows=res["rows"], rejects=res["rejects"], candidates=res["candidates"], cutflow=res["cutflow"],
                      outputs=_output_stats(cfg, t, FEATURE_FILES + SELECTION_FILES))
    else:
        res = {**res, "rows": old["rows"], "candidates": old["candidates"]}
    man.record_tile(run_id, t, res["action"], **fields)
    return res


def _file_stats(paths) -> list:
    out = []
    for p in paths:
        try:
            st = os.stat(p)
            out.append([Path(p).name, st.st_size, st.st_mtime_ns])
        except FileNotFoundError:
            out.append([Path(p).name, None, None])
    return out


def _merged_paths(cfg: Config) -> dict:
    d = cfg.run_dir
    return {"ecsv": d / "candidates.ecsv", "csv": d / "candidates.csv", "parquet": d / "candidates.parquet",
            "cutflow": d / "cutflow.csv", "provenance": d / "provenance.json"}


def _result_from_records(summaries, outputs) -> RunResult:
    flow = total_cutflow(summaries)
    return RunResult(True, len(summaries), sum(int(s["cutflow"][-1][1]) for s in summaries) if summaries else 0,
                     flow, outputs)


def _summarise(cfg, rep, run_id, result: RunResult, work_s: float, config_path) -> None:
    a = result.actions
    rep.info(format_cutflow(result.cutflow))
    for line in result.accounting:
        rep.info(line)
    rep.always(f"run {run_id}: {a['computed']} tiles computed, {a['reselected']} re-selected, {a['verified']} "
               f"checked unchanged, {a['reused']} reused, {a['failed']} failed ({work_s:.1f} s of tile work); "
               f"{result.candidates:,} candidates in {result.outputs['ecsv']}"
               + ("" if result.merged else " (already up to date)"))
    if result.failed:
        where = f"--config {config_path}" if config_path else "--config <your config file>"
        rep.always(f"INCOMPLETE: {len(result.failed)} of {len(result.failed) + result.tiles} tiles failed"
                   + (" (the merged list holds the finished tiles only; its provenance says complete: false):"
                      if result.merged else ":"))
        shown = sorted(result.failed.items())
        for t, err in shown[:20]:
            rep.always(f"  tile {t}: {err}")
        if len(shown) > 20:
            rep.always(f"  ... and {len(shown) - 20} more (`selector status {where} --failed` lists them all)")
        rep.always(f"fix the files named above (a damaged ingested tile: run `selector ingest {where}` again), then "
                   f"run `selector run {where}`: only the failed tiles are recomputed")
    rep.info(f"run log: {result.log_file or cfg.run_dir / 'logs' / f'run-{run_id}.log'}")


def total_cutflow(summaries: list[dict]) -> list[tuple[str, int]]:
    """Sum per-tile cut-flows stage by stage (every tile runs the same stages)."""
    if not summaries:
        return [("input", 0)]
    names = [name for name, _ in summaries[0]["cutflow"]]
    totals = dict.fromkeys(names, 0)
    for s in summaries:
        stages = [name for name, _ in s["cutflow"]]
        if stages != names:
            raise SelectorError(f"internal error: tile {s['tile']} has cut-flow stages {stages}, tile "
                                f"{summaries[0]['tile']} has {names}; re-run with --force")
        for name, count in s["cutflow"]:
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


def account(summaries: list[dict], n_candidates: int, ingest: dict | None = None, failed: dict | None = None,
            expected_rows: dict | None = None) -> list[str]:
    """Check that every row is accounted for, per tile and in total; returns the summary lines.

    Per tile: rows = tile rejects + cut-flow input, and the cut-flow never increases. In total:
    Σ tile rows = candidates + Σ rows removed by each cut + Σ tile rejects; and, against the ingest
    summary, catalogue rows = ingest rejects + rows of the finished tiles + rows of failed tiles.

    Raises
    ------
    SelectorError
        When a count does not add up (an internal error: nothing is trusted).
    """
    failed = failed or {}
    for s in summaries:
        check_accounting(int(s["rows"]), int(s["rejects"]), [tuple(x) for x in s["cutflow"]])
    flow = total_cutflow(summaries)
    rows = sum(int(s["rows"]) for s in summaries)
    rejects = sum(int(s["rejects"]) for s in summaries)
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


def _ranked_table(cfg: Config, candidates: pa.Table, prov: dict):
    """The merged ranked list as an astropy Table with units and provenance in its metadata."""
    from astropy.table import Table

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


def merge(cfg: Config, summaries: list[dict], prov: dict, fault=None) -> RunResult:
    """Union of the per-tile candidates (each source owned by one tile), ranked; cut-flow totals.

    Parameters
    ----------
    cfg : Config
    summaries : list of dict
        One per tile to merge: ``tile``, ``rows``, ``rejects``, ``cutflow``.
    prov : dict
        Provenance written into every merged file (no times in it, so equal inputs give equal bytes).
    fault : callable, optional
        Called with ``"merge:<name>"`` after each file is written (the resumption tests use it).
    """
    fault = fault or (lambda event: None)
    summaries = sorted(summaries, key=lambda s: s["tile"])
    parts = []
    for s in summaries:
        path = tile_output_dir(cfg, s["tile"]) / "candidates.parquet"
        part = read_parquet(path).replace_schema_metadata(None)
        if part.num_rows != int(s["cutflow"][-1][1]):
            raise SelectorError(f"internal error: {path} holds {part.num_rows} candidates but the tile's cut-flow "
                                f"ends with {s['cutflow'][-1][1]}; re-run with --force")
        parts.append(part)
    candidates = pa.concat_tables(parts, promote_options="permissive") if parts else pa.table({"astro_id": []})
    ids = candidates.column("astro_id").to_numpy(zero_copy_only=False) if candidates.num_rows else np.zeros(0)
    if len(np.unique(ids)) != len(ids):
        raise SelectorError("internal error: a source appears in more than one tile's candidates")
    flow = total_cutflow(summaries)
    if candidates.num_rows:
        # every merged format carries the same ranked rows, the Parquet copy included
        candidates = rank_candidates(candidates)
    table = _ranked_table(cfg, candidates, prov) if candidates.num_rows else None
    outputs = _merged_paths(cfg)
    if table is None:
        from astropy.table import Table

        table = Table({"rank": np.zeros(0, np.int64), "astro_id": np.zeros(0, np.int64)})
        table.meta["selector_provenance"] = prov
    write_table(table, outputs["ecsv"], "ecsv")
    fault("merge:ecsv")
    write_table(table, outputs["csv"], "csv")
    fault("merge:csv")
    write_parquet(candidates, outputs["parquet"], {"provenance": prov})
    fault("merge:parquet")
    write_text("stage,left\n" + "".join(f"{n},{c}\n" for n, c in flow), outputs["cutflow"])
    fault("merge:cutflow")
    rejects = sum(int(s["rejects"]) for s in summaries)
    rows = sum(int(s["rows"]) for s in summaries)
    write_json({**prov, "tiles": len(summaries), "rows": rows, "tile_rejects": rejects,
                "candidates": len(table), "cutflow": flow, "config": result_config(cfg)}, outputs["provenance"])
    fault("merge:provenance")
    return RunResult(True, len(summaries), len(table), flow, outputs)


def status_text(cfg: Config, runs: int = 10, failed_only: bool = False) -> str:
    """A plain-text view of the manifest: recent runs, tiles by state, rows and timings, failures."""
    path = cfg.run_dir / "manifest.sqlite"
    if not path.exists():
        return f"{cfg.run_dir}: no runs yet (no manifest.sqlite); start one with `selector run --config ...`"
    with Manifest(path, readonly=True) as man:
        recent = man.runs(runs)
        tiles_ = man.tiles()
        for r in recent:
            if r["status"] == "running":  # its totals are written at the end: count what it has done so far
                r.update(man.actions(r["run_id"]))
    lines = []
    failed = {t: r for t, r in tiles_.items() if r["status"] == "failed"}
    if not failed_only:
        lines.append(f"run folder: {cfg.run_dir}")
        lines.append(f"{'run':>4}  {'started (UTC)':<25}  {'took':>8}  {'status':<11}  {'computed':>8}  {'reselect':>8}  "
                     f"{'checked':>7}  {'reused':>7}  {'failed':>6}  {'candidates':>10}")
        for r in recent:
            status = r["status"]
            if status == "running" and not pid_alive(r["pid"]):
                status = "died"
            took = _clock(_duration(r["started_utc"], r["ended_utc"])) if r["ended_utc"] else "-"
            lines.append(f"{r['run_id']:>4}  {r['started_utc']:<25}  {took:>8}  {status:<11}  "
                         f"{r['computed'] or 0:>8}  {r['reselected'] or 0:>8}  {r['verified'] or 0:>7}  "
                         f"{r['reused'] or 0:>7}  {r['failed'] or 0:>6}  "
                         f"{'' if r['candidates'] is None else format(r['candidates'], ','):>10}")
        counts = {s: sum(1 for r in tiles_.values() if r["status"] == s) for s in ("done", "failed", "pending")}
        done = [r for r in tiles_.values() if r["status"] == "done"]
        lines.append(f"tiles: {len(tiles_)} — {counts['done']} done, {counts['failed']} failed, "
                     f"{counts['pending']} pending")
        if done:
            rows = sum(r["rows"] or 0 for r in done)
            cands = sum(r["candidates"] or 0 for r in done)
            durations = np.array([r["duration_s"] or 0.0 for r in done])
            lines.append(f"rows in done tiles: {rows:,}; candidates: {cands:,}")
            lines.append(f"tile times (last work): median {np.median(durations):.2f} s, max {durations.max():.2f} s, "
                         f"total {durations.sum():.1f} s")
    if failed:
        lines.append(f"failed tiles ({len(failed)}):")
        for t, r in sorted(failed.items()):
            lines.append(f"  tile {t} (run {r['run_id']}): {r['error']}")
        lines.append("fix the files named above, then `selector run --config ...` again: only these tiles are redone")
    elif failed_only:
        lines.append("no failed tiles")
    return "\n".join(lines)


def _duration(start: str, end: str) -> float:
    import datetime

    return (datetime.datetime.fromisoformat(end) - datetime.datetime.fromisoformat(start)).total_seconds()
