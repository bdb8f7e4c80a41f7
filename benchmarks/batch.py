"""Batch runs: speed-up from one to two workers (local processes and Dask), and the manifest's cost.

Builds the invented mock sky at the given scale, ingests it once, then recomputes every tile
(``force=True``) with each executor and worker count, all in this one process and on the same
files, and prints the times side by side with the one-worker time as the reference. The Dask
clusters are started before the clock starts (their start-up is printed separately), so the
ratios compare tile work, not cluster start-up. The machine is shared, so the same speed-up is
measured for a pure CPU job (one process against two) before and after, as the reference: the
batch speed-up can only be read against what the machine gave at the time.

The manifest's overhead is measured two ways: the time to record one tile (one SQLite
transaction, synchronous=FULL, on the run folder's file system) against the median time of a
tile's work, and the time per tile of a re-run with nothing to do.

Usage::

    python benchmarks/batch.py --scale 3 --order 3
"""

from __future__ import annotations

import argparse
import logging
import os
import statistics
import sys
import tempfile
import time
import warnings
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from selector.jobs import run as run_job  # noqa: E402
from selector.jobs.run.plan import tile_rel  # noqa: E402
from selector.demo import mocksky as demo
from selector.settings.config import load_config  # noqa: E402
from selector.jobs.ingest import ingest  # noqa: E402
from selector.store.layout import layout_of  # noqa: E402
from selector.store.manifest import Manifest  # noqa: E402


def _quiet(*args, **kwargs):
    pass


def _spin(seconds_of_work: int) -> float:
    """Pure-Python CPU work (no I/O, no threads), for the machine's own speed-up as a reference."""
    t0 = time.perf_counter()
    x = 0
    for i in range(seconds_of_work * 4_000_000):
        x += i * i % 7
    return time.perf_counter() - t0


def cpu_reference(jobs: int = 4) -> float:
    """Speed-up of ``jobs`` equal CPU-bound jobs from one process to two, right now on this machine."""
    import multiprocessing as mp

    t0 = time.perf_counter()
    for _ in range(jobs):
        _spin(1)
    one = time.perf_counter() - t0
    with mp.get_context("fork").Pool(2) as pool:
        t0 = time.perf_counter()
        pool.map(_spin, [1] * jobs)
        two = time.perf_counter() - t0
    return one / two


def _timed_run(cfg, **kwargs):
    t0 = time.perf_counter()
    result = run_job.run(cfg, quiet=True, log=_quiet, force=True, **kwargs)
    total = time.perf_counter() - t0
    with Manifest(layout_of(cfg).manifest) as man:
        work = man.run(result.run_id)["work_s"]
    return result, total, work


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scale", type=float, default=3.0, help="mock sky size (1.0: about 2e5 sources)")
    ap.add_argument("--order", type=int, default=3,
                    help="HEALPix order of the tiles (3 gives tiles of about 10^4 rows at scale 3, nearer to real ones)")
    ap.add_argument("--repeats", type=int, default=3, help="runs per setting; the fastest is kept")
    ap.add_argument("--no-dask", action="store_true", help="skip the Dask executor")
    args = ap.parse_args()

    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        demo.write_mock_sky(demo.make_mock_sky(seed=5, scale=args.scale), root / "catalogues")
        path = demo.write_demo_config(root)
        path.write_text(path.read_text().replace("[tiling]\norder = 4", f"[tiling]\norder = {args.order}"))
        cfg = load_config(path)
        assert cfg.tiling.order == args.order
        ingest(cfg, log=_quiet)
        first, _, _ = _timed_run(cfg, workers=1)
        print(f"load average before: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
        ref_before = cpu_reference()
        print(f"reference: a pure CPU job runs {ref_before:.2f}x faster on 2 processes than on 1 right now "
              "(2.00x on an idle 2-core machine)")
        print(f"mock sky at scale {args.scale}, order {args.order}: {first.tiles} tiles, {first.cutflow[0][1]:,} "
              f"usable astrometric rows, {first.candidates} candidates")

        settings = [("local", 1, None), ("local", 2, None)]
        clusters = {}
        if not args.no_dask:
            from distributed import LocalCluster

            logging.getLogger("distributed").setLevel(logging.ERROR)

            for n in (1, 2):
                t0 = time.perf_counter()
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")  # "port 8787 in use": the status page moves elsewhere
                    clusters[n] = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                                               dashboard_address=None, silence_logs=logging.ERROR)
                print(f"Dask local cluster with {n} worker(s) started in {time.perf_counter() - t0:.1f} s "
                      "(not counted below)")
                # one warm-up run, so imports in the workers are not counted either
                _timed_run(cfg, executor="dask", scheduler=clusters[n].scheduler_address)
            settings += [("dask", 1, clusters[1].scheduler_address), ("dask", 2, clusters[2].scheduler_address)]

        # settings interleaved within each repeat, so a change in the machine's load hits all of them
        times = {}
        for _ in range(args.repeats):
            for executor, n, address in settings:
                kw = {"workers": n} if executor == "local" else {"executor": "dask", "scheduler": address}
                _, total, work = _timed_run(cfg, **kw)
                best = times.get((executor, n))
                times[(executor, n)] = (total, work) if best is None or total < best[0] else best
        for c in clusters.values():
            c.close()

        ref_after = cpu_reference()
        print()
        print(f"reference CPU-job speed-up 1 → 2 processes: {ref_before:.2f}x before, {ref_after:.2f}x after")
        reference = (ref_before + ref_after) / 2
        print(f"{'executor':<8} {'workers':>7} {'run s':>8} {'tile work s':>12} {'speed-up (run)':>15} "
              f"{'speed-up (work)':>16} {'work / CPU reference':>21}")
        for (executor, n), (total, work) in times.items():
            ref_total, ref_work = times[(executor, 1)]
            print(f"{executor:<8} {n:>7} {total:>8.2f} {work:>12.2f} {ref_total / total:>14.2f}x "
                  f"{ref_work / work:>15.2f}x {(ref_work / work) / (reference if n == 2 else 1.0):>21.2f}")

        # --- the manifest's overhead ------------------------------------------------------------
        with Manifest(layout_of(cfg).manifest) as man:
            durations = [r["duration_s"] for r in man.tiles().values() if r["duration_s"]]
        median_tile = statistics.median(durations)
        # a scratch manifest beside the real one, so it lives on the same file system
        scratch = layout_of(cfg).manifest
        with Manifest(scratch.with_name("bench-" + scratch.name)) as man:
            run_id = man.begin_run(pid=0)
            n_rec = 300
            inputs = [tile_rel(cfg, "infrared", i) for i in range(18)]
            t0 = time.perf_counter()
            for t in range(n_rec):
                man.record_tile(run_id, t, "computed", status="done", match_key="m" * 64, selection_key="s" * 64,
                                inputs=inputs, inputs_key="i" * 64, content_key="c" * 64,
                                outputs={"features.parquet": [1, 2]}, rows=1000, rejects=0, candidates=3,
                                cutflow=[["input", 1000], ["matched", 600]], duration_s=0.1)
            per_record = (time.perf_counter() - t0) / n_rec
        t0 = time.perf_counter()
        idle = run_job.run(cfg, workers=2, quiet=True, log=_quiet)
        idle_s = time.perf_counter() - t0
        assert idle.actions["computed"] == 0
        print()
        print(f"recording one tile in the manifest: {per_record * 1e3:.2f} ms; median tile work "
              f"{median_tile * 1e3:.1f} ms; ratio {per_record / median_tile:.3f}")
        print(f"load average after: {os.getloadavg()[0]:.2f}")
        print(f"re-run with nothing to do: {idle_s:.2f} s for {idle.tiles} tiles = {idle_s / idle.tiles * 1e3:.2f} ms "
              f"per tile (against {median_tile * 1e3:.1f} ms of work per tile)")


if __name__ == "__main__":
    main()
