"""Merge benchmark: the run's merge of per-tile candidates, beside a plain pyarrow read-sort-write of the same rows.

A script, not a test: it prints measurements side by side with a reference measured in the same run
on the same machine, and asserts nothing about time.

What it does
------------
1. Takes the schema and the values of real candidates from a small demo run (``selector demo``,
   run here at ``--demo-scale`` unless ``--demo DIR`` names a finished one): its configuration, its
   classifier model (so the merge adopts spectroscopic redshifts and flags luminosities as a run
   with a model does), and every tile's ``candidates.parquet`` and ``cutflow.json``.
2. Writes synthetic per-tile outputs the way a run leaves them, with the run's own writers
   (``store.io.write_parquet`` with the tile's provenance, ``store.io.write_json``), for each case
   (``--cases``): ``N@T`` is N candidates spread evenly over T tiles. Rows are drawn from the demo's
   candidates; each gets a new unique ``astro_id`` and its tile, and the ranking tie-breaks
   (``quasar_log_odds``, ``colour_excess_mag``) a little noise, so the sort is not decided by the ids.
   Each tile's cut-flow keeps the demo's stages, with counts falling to its candidates.
3. For each case, in child processes whose resources are read with ``os.wait4``:

   * ``merge``: what the run does after its tiles are done, timed inside the child after the imports
     and the run's provenance (one per run, not per tile): the chance-match totals read from every
     tile's ``cutflow.json`` (``chance_total``), the merge (``merge.merge``: ranked list in ECSV,
     CSV and Parquet, cut-flow, provenance) and the commit record (``commit``: size and SHA-256 of
     every merged file);
   * ``reference``: ``pyarrow.parquet.read_table`` of each tile file, one ``concat_tables`` and
     ``sort_by`` on the same keys, then ``pyarrow.csv.write_csv`` and ``pyarrow.parquet.write_table``
     (LZ4) of the sorted rows: what pyarrow alone takes to read, rank and write the same rows, with
     everything in memory and without the text formatting of ECSV;
   * ``baseline``: a process that imports the package and reads the configuration, the floor under
     every memory figure.

   ``--repeat`` alternates merge and reference that many times; the medians are printed.

The figures
-----------
candidates/s
    Candidates divided by the timed wall seconds inside the child.
peak RSS
    ``ru_maxrss`` of the child process (``os.wait4``); the benchmark's own process imports nothing
    but numpy, since Linux carries a process's high-water mark across ``exec``.
md5
    Of every merged file of each case, so that two checkouts (``--package``) can be compared: the
    merged files hold no times, so equal inputs must give equal md5s.

Usage
-----
::

    PYTHONPATH=. .venv/bin/python benchmarks/merge.py                    # 2e5 and 2e6 over 768 tiles; 12,288 tiles
    PYTHONPATH=. .venv/bin/python benchmarks/merge.py --cases 20000@768 --demo /tmp/demo --keep --work /tmp/mb
    PYTHONPATH=. .venv/bin/python benchmarks/merge.py --work /tmp/mb --reuse --package /path/to/other/checkout

``--work`` (default a new temporary folder) is removed at the end unless ``--keep``; ``--reuse``
takes the demo and the cases already written there. At 2e6 candidates the tile files take about
1.5 GB and the merged lists about 5 GB.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
DEFAULT_CASES = "200000@768,2000000@768,24576@12288"
MERGED = ("candidates.ecsv", "candidates.csv", "candidates.parquet", "cutflow.csv", "provenance.json")


# ---------------------------------------------------------------------------------------------- children


def _demo_config(demo: Path):
    """The demo's configuration as its second run has it: with its classifier and redshift model, ranked by
    expected luminosity (so the merge adopts spectroscopic redshifts and flags luminosities)."""
    from selector.settings.config import from_dict, load_config, plain
    from selector.store.layout import classifier_dir

    cfg = load_config(demo / "demo.toml")
    model = classifier_dir(cfg) / "quasar_classifier.skops"
    if not model.exists():
        return cfg
    data = plain(cfg)
    data["classifier"]["model"] = str(model)
    data["ranking"]["order"] = "expected_luminosity"
    return from_dict(data, base_dir=cfg.base_dir)


def child_write(args) -> None:
    """In a child process: the synthetic tile outputs of one case, from the demo's candidates."""
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    from selector.store.io import DurableBatch, write_json, write_parquet
    from selector.store.layout import layout_of, tile_name

    demo = Path(args.demo)
    lay = layout_of(_demo_config(demo))
    source = Path(str(lay.run_tiles_dir) + ".demo")
    tiles = sorted(p for p in source.iterdir() if (p / "candidates.parquet").exists())
    parts = [pq.read_table(p / "candidates.parquet") for p in tiles]
    template = pa.concat_tables([t.replace_schema_metadata(None) for t in parts if t.num_rows])
    meta = parts[0].schema.metadata
    tile_prov = json.loads(meta[b"provenance"])
    record = json.loads((tiles[0] / "cutflow.json").read_text())
    stages = [name for name, _ in record["cutflow"]]
    rng = np.random.default_rng(args.seed)
    case = Path(args.case)
    out = case / "tiles"
    n_tiles, total = args.tiles, args.candidates
    per_tile = np.full(n_tiles, total // n_tiles)
    per_tile[: total % n_tiles] += 1
    summaries = []
    batch = DurableBatch(sync=False)
    t0 = time.perf_counter()
    for t in range(n_tiles):
        n = int(per_tile[t])
        part = template.take(pa.array(rng.integers(0, template.num_rows, n)))
        ids = (np.int64(t) << 32) + np.arange(n, dtype=np.int64)
        part = part.set_column(part.schema.get_field_index("astro_id"), "astro_id", pa.array(ids))
        part = part.set_column(part.schema.get_field_index("tile"), "tile", pa.array(np.full(n, t, np.int64)))
        for name in ("quasar_log_odds", "colour_excess_mag"):
            if name in part.column_names:
                i = part.schema.get_field_index(name)
                noisy = pc.add(part.column(i), pa.array(rng.normal(0.0, 0.05, n)))
                part = part.set_column(i, part.schema.field(i), noisy)
        folder = out / tile_name(t)
        folder.mkdir(parents=True, exist_ok=True)
        part = part.replace_schema_metadata(meta)
        write_parquet(part, folder / "candidates.parquet", {"provenance": {**tile_prov, "tile": t}}, batch=batch)
        # every stage keeps a share of the tile's sources, down to its candidates
        rows = 12 * n + 40
        counts = np.linspace(rows, n, len(stages)).round().astype(int).tolist()
        counts[-1] = n
        flow = [[name, c] for name, c in zip(stages, counts)]
        write_json({**record, "tile": t, "rows": rows, "rejects": 0, "cutflow": flow}, folder / "cutflow.json",
                   batch=batch)
        summaries.append({"tile": t, "rows": rows, "rejects": 0, "candidates": n, "cutflow": flow})
        if t % 1000 == 999:  # a batch holds its files' names until committed
            batch.commit()
            batch = DurableBatch(sync=False)
    batch.commit()
    (case / "summaries.json").write_text(json.dumps(summaries))
    print(json.dumps({"write_s": time.perf_counter() - t0}))


def child_merge(args) -> None:
    """In a child process: the run's merge step on one case (the demo's run tiles point at it)."""
    from selector.jobs.run.commit import commit, withdraw
    from selector.jobs.run.merge import TileSummary, chance_total, merge, provenance
    from selector.store.layout import layout_of

    cfg = _demo_config(Path(args.demo))
    lay = layout_of(cfg)
    summaries = [TileSummary.from_record(r) for r in json.loads((Path(args.case) / "summaries.json").read_text())]
    prov = provenance(cfg)
    t0 = time.perf_counter()
    chance = chance_total(cfg, [s.tile for s in summaries])
    t1 = time.perf_counter()
    merge_prov = {**prov, "complete": True, "failed_tiles": [], "chance_counterparts": chance}
    withdraw(lay)
    merged = merge(cfg, summaries, merge_prov)
    t2 = time.perf_counter()
    commit(cfg, lay, merge_prov, merge_key="benchmark")
    t3 = time.perf_counter()
    print(json.dumps({"candidates": merged.candidates, "tiles": merged.tiles, "chance_s": t1 - t0,
                      "merge_s": t2 - t1, "commit_s": t3 - t2, "wall_s": t3 - t0,
                      "module": sys.modules[merge.__module__].__file__}))


def child_reference(args) -> None:
    """In a child process: pyarrow alone reads, ranks and writes the same rows."""
    import pyarrow as pa
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    from selector.core.selection import rank_keys

    order = _demo_config(Path(args.demo)).ranking.order
    case = Path(args.case)
    summaries = json.loads((case / "summaries.json").read_text())
    scratch = case / "reference"
    scratch.mkdir(exist_ok=True)
    t0 = time.perf_counter()
    parts = [pq.read_table(case / "tiles" / f"tile{s['tile']:08d}" / "candidates.parquet") for s in summaries]
    table = pa.concat_tables([p.replace_schema_metadata(None) for p in parts])
    table = table.sort_by(rank_keys(table.column_names, order))
    t1 = time.perf_counter()
    pacsv.write_csv(table, scratch / "candidates.csv")
    pq.write_table(table, scratch / "candidates.parquet", compression="lz4", row_group_size=1 << 20)
    t2 = time.perf_counter()
    shutil.rmtree(scratch)
    print(json.dumps({"candidates": table.num_rows, "read_sort_s": t1 - t0, "write_s": t2 - t1, "wall_s": t2 - t0}))


def child_baseline(args) -> None:
    """In a child process: the package imported and the configuration read, nothing else."""
    from selector.jobs.run.merge import merge  # noqa: F401

    _demo_config(Path(args.demo))
    print(json.dumps({}))


# ---------------------------------------------------------------------------------------------- parent


def _env(package: Path) -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(package)] + [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p])
    return env


def timed(label: str, cmd: list[str], log_path: Path, env: dict) -> dict:
    """Run one child; its wall time, peak RSS (``os.wait4``) and last JSON line."""
    t0 = time.perf_counter()
    with open(log_path, "w") as out:
        proc = subprocess.Popen(cmd, stdout=out, stderr=subprocess.STDOUT, env=env, cwd=log_path.parent)
    _, status, usage = os.wait4(proc.pid, 0)
    if os.waitstatus_to_exitcode(status):
        tail = "\n".join(log_path.read_text(errors="replace").splitlines()[-15:])
        raise SystemExit(f"{label} failed; its output is in {log_path}:\n{tail}")
    lines = log_path.read_text(errors="replace").strip().splitlines()
    out = json.loads(lines[-1]) if lines and lines[-1].startswith("{") else {}
    out.update(process_s=time.perf_counter() - t0, peak_mib=usage.ru_maxrss / 1024.0)
    return out


def _md5(path: Path) -> str:
    h = hashlib.md5()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 22), b""):
            h.update(block)
    return h.hexdigest()


def _cases(text: str) -> list[tuple[int, int]]:
    out = []
    for item in text.split(","):
        n, _, t = item.partition("@")
        out.append((int(float(n)), int(float(t))))
    return out


def _point_tiles(run_tiles: Path, case: Path) -> None:
    """The demo's run tiles folder becomes a link to the case's tiles (the demo's own kept beside)."""
    if run_tiles.is_symlink():
        run_tiles.unlink()
    run_tiles.symlink_to(case / "tiles", target_is_directory=True)


def _child(mode: str, args, work: Path, case: Path | None, extra=()) -> list[str]:
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", mode, "--demo", str(work / "demo")]
    if case is not None:
        cmd += ["--case", str(case)]
    return cmd + list(extra)


def main(argv=None) -> None:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--cases", default=DEFAULT_CASES, help="comma-separated CANDIDATES@TILES (default %(default)s)")
    p.add_argument("--repeat", type=int, default=1, help="alternated merge/reference pairs per case")
    p.add_argument("--demo", help="a finished `selector demo` folder to take the candidates from")
    p.add_argument("--demo-scale", type=float, default=0.1)
    p.add_argument("--work", help="work folder (default: a new temporary folder)")
    p.add_argument("--keep", action="store_true", help="keep the work folder")
    p.add_argument("--reuse", action="store_true", help="use the demo and cases already in --work")
    p.add_argument("--no-reference", action="store_true")
    p.add_argument("--package", default=str(ROOT), help="checkout whose selector the children import")
    p.add_argument("--seed", type=int, default=7)
    p.add_argument("--child", choices=("write", "merge", "reference", "baseline"), help=argparse.SUPPRESS)
    p.add_argument("--case", help=argparse.SUPPRESS)
    p.add_argument("--tiles", type=int, help=argparse.SUPPRESS)
    p.add_argument("--candidates", type=int, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.child:
        {"write": child_write, "merge": child_merge, "reference": child_reference,
         "baseline": child_baseline}[args.child](args)
        return

    work = Path(args.work) if args.work else Path(tempfile.mkdtemp(prefix="merge-bench-"))
    work.mkdir(parents=True, exist_ok=True)
    if any(work.iterdir()) and not args.reuse:
        raise SystemExit(f"{work}: not empty; name an empty folder, or pass --reuse")
    env = _env(Path(args.package))
    demo = work / "demo"
    if not demo.exists():
        if args.demo:
            shutil.copytree(args.demo, demo, symlinks=True)
        else:
            print(f"demo at scale {args.demo_scale} ...", flush=True)
            timed("demo", [sys.executable, "-m", "selector.cli", "demo", "--out", str(demo), "--scale",
                           str(args.demo_scale)], work / "demo.log", _env(ROOT))
    run_tiles = demo / "output" / "run" / "tiles"
    kept = Path(str(run_tiles) + ".demo")
    if not kept.exists():
        run_tiles.rename(kept)
    try:
        baseline = timed("baseline", _child("baseline", args, work, None), work / "baseline.log", env)
        print(f"baseline (import and config): peak RSS {baseline['peak_mib']:.0f} MiB")
        print(f"{'case':>16} {'':>10} {'wall s':>8} {'cand/s':>11} {'peak MiB':>9}   parts")
        for n, t in _cases(args.cases):
            case = work / f"case-{n}-{t}"
            if not (case / "summaries.json").exists():
                shutil.rmtree(case, ignore_errors=True)
                case.mkdir()
                w = timed("write", _child("write", args, work, case, ["--tiles", str(t), "--candidates", str(n),
                                                                       "--seed", str(args.seed)]),
                          case / "write.log", _env(ROOT))
                print(f"  (wrote {n:,} candidates in {t:,} tiles in {w['write_s']:.1f} s)", flush=True)
            _point_tiles(run_tiles, case)
            merges, refs = [], []
            for _ in range(args.repeat):
                merges.append(timed("merge", _child("merge", args, work, case), case / "merge.log", env))
                if not args.no_reference:
                    refs.append(timed("reference", _child("reference", args, work, case),
                                      case / "reference.log", env))
            _report(f"{n:,}@{t:,}", merges, refs, baseline)
            sums = {name: _md5(demo / "output" / "run" / name) for name in MERGED}
            (case / "md5.json").write_text(json.dumps(sums, indent=1))
            print("    md5 " + " ".join(f"{name.split('.')[-1]}={s[:12]}" for name, s in sums.items()), flush=True)
    finally:
        if run_tiles.is_symlink():
            run_tiles.unlink()
        if kept.exists() and not run_tiles.exists():
            kept.rename(run_tiles)
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)


def _median(xs):
    return float(np.median(xs)) if xs else float("nan")


def _report(label: str, merges: list[dict], refs: list[dict], baseline: dict) -> None:
    n = merges[0]["candidates"]
    wall = _median([m["wall_s"] for m in merges])
    peak = _median([m["peak_mib"] for m in merges])
    parts = (f"tile records {_median([m['chance_s'] for m in merges]):.2f} s, merge "
             f"{_median([m['merge_s'] for m in merges]):.2f} s, commit {_median([m['commit_s'] for m in merges]):.2f} s"
             f"; {1e3 * wall / merges[0]['tiles']:.2f} ms a tile")
    print(f"{label:>16} {'merge':>10} {wall:8.2f} {n / wall:11,.0f} {peak:9.0f}   {parts}")
    if refs:
        rwall = _median([r["wall_s"] for r in refs])
        rpeak = _median([r["peak_mib"] for r in refs])
        print(f"{'':>16} {'reference':>10} {rwall:8.2f} {n / rwall:11,.0f} {rpeak:9.0f}   read+sort "
              f"{_median([r['read_sort_s'] for r in refs]):.2f} s, write {_median([r['write_s'] for r in refs]):.2f} s;"
              f" merge / reference time {wall / rwall:.2f}")
    print(f"{'':>16} {'':>10} peak above baseline: merge {peak - baseline['peak_mib']:.0f} MiB", flush=True)


if __name__ == "__main__":
    main()
