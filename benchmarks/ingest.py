"""Ingest throughput and peak memory, against a plain pyarrow read of the same file in the same run.

A synthetic astrometric catalogue (the roles ingest needs plus one optical band; 11 columns, int64 id
and float64 values) is written as one Parquet file in a temporary folder, in pieces so that writing it
needs little memory. By default the sources are spread uniformly over a spherical cap of 400 square
degrees straddling RA = 0/360 (``--sky patch``, ``--patch-deg2``): 10 million rows there is about
25 000 sources per square degree, the density of a billion-row all-sky catalogue, so tiles hold as
many rows as they would in real use. ``--sky all`` spreads the rows over the whole sky instead; at
10 million rows and order 5 that is about 800 rows per tile, which measures the fixed cost per tile
file rather than the cost per row.

Each measurement runs in its own child process, so its peak resident memory (``ru_maxrss``) belongs to
that measurement alone:

* ``baseline``: import selector and pyarrow, do nothing (the floor every process pays);
* ``read``: stream the same columns with ``pyarrow.parquet.ParquetFile.iter_batches`` in chunks of
  ``--chunk-rows``, the least any reader of the file must do;
* ``copy``: read the same columns in the same chunks and write them to one Parquet file with the tile
  files' writer options: the least a tiling ingest could do (read every row once, write it once);
* ``ingest``: :func:`selector.jobs.ingest.ingest_catalogue` on the file, which is single-process, so
  its rows per second are rows per second per core.

``--reject-share 0.2`` makes a fifth of the rows invalid (declination beyond 90°), to time the reject
path against a clean file of the same size.

Both sizes (``--rows`` and ``--rows / --second-ratio``) are measured, so the reader sees whether the
peak memory grows with the number of rows. Ingest holds up to ``selector.ingest._SPOOL_ROWS`` rows in
memory before spooling to disk, so its peak memory rises up to that size and stays flat beyond it: at
the default 10 million rows the second size (1 million) never spools, and ``--second-ratio 4`` compares
two spooled sizes. Targets (from the issue): ingest ≥ 1.5e6 rows/s per core, peak memory independent of
the total number of rows.

Usage::

    python benchmarks/ingest.py --rows 10000000 --chunk-rows 1000000 --order 5
    python benchmarks/ingest.py --rows 1000000 --profile    # also print a cProfile of the ingest
"""

from __future__ import annotations

import argparse
import json
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from selector.store.layout import Layout  # noqa: E402  (a light module: paths only)

COLUMNS = ["sid", "ra", "dec", "plx", "eplx", "pmra", "pmdec", "epmra", "epmdec", "g", "eg"]
_WRITE_PIECE_ROWS = 1_000_000


def _positions(rng, n, sky, patch_deg2):
    if sky == "all":
        return rng.uniform(0.0, 360.0, n), np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n)))
    # uniform in a cap centred on (RA, Dec) = (0, +30), straddling the RA = 0/360 seam
    area_sr = patch_deg2 * (np.pi / 180.0) ** 2
    cos_max = 1.0 - area_sr / (2.0 * np.pi)
    rho = np.arccos(rng.uniform(cos_max, 1.0, n))
    phi = rng.uniform(0.0, 2.0 * np.pi, n)
    d0 = np.radians(30.0)
    sin_dec = np.sin(d0) * np.cos(rho) + np.cos(d0) * np.sin(rho) * np.cos(phi)
    dec = np.arcsin(np.clip(sin_dec, -1.0, 1.0))
    ra = np.arctan2(np.sin(phi) * np.sin(rho) * np.cos(d0), np.cos(rho) - np.sin(d0) * sin_dec)
    return np.mod(np.degrees(ra), 360.0), np.degrees(dec)


def write_catalogue(path: Path, rows: int, sky: str, patch_deg2: float, seed: int, reject_share: float = 0.0) -> None:
    """Write the synthetic catalogue piece by piece (vectorised within a piece)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(seed)
    writer = None
    try:
        for start in range(0, rows, _WRITE_PIECE_ROWS):
            n = min(_WRITE_PIECE_ROWS, rows - start)
            ra, dec = _positions(rng, n, sky, patch_deg2)
            if reject_share:
                dec = np.where(rng.random(n) < reject_share, 95.0, dec)  # rejected: dec_out_of_range
            g = rng.uniform(15.0, 21.0, n)
            table = pa.table({
                "sid": np.arange(start + 1, start + n + 1, dtype=np.int64), "ra": ra, "dec": dec,
                "plx": rng.normal(0.0, 0.3, n), "eplx": rng.uniform(0.02, 1.0, n),
                "pmra": rng.normal(0.0, 0.5, n), "pmdec": rng.normal(0.0, 0.5, n),
                "epmra": rng.uniform(0.02, 1.0, n), "epmdec": rng.uniform(0.02, 1.0, n),
                "g": g, "eg": 0.002 * 10 ** (0.2 * (g - 15.0)),
            })
            if writer is None:
                writer = pq.ParquetWriter(path, table.schema)
            writer.write_table(table, row_group_size=_WRITE_PIECE_ROWS)
    finally:
        if writer is not None:
            writer.close()


def _config(folder: Path, chunk_rows: int, order: int):
    from selector.settings.config import from_dict

    return from_dict({
        "project": {"output_dir": "out"},
        "tiling": {"order": order},
        "astrometric": {
            "files": ["astro.parquet"], "epoch_jyear": 2016.0, "chunk_rows": chunk_rows,
            # the catalogue has no position errors; a run's probabilistic match needs one (ingest does not)
            "position_floor_arcsec": 0.001,
            "columns": {"id": "sid", "ra": "ra", "dec": "dec", "parallax": "plx", "parallax_error": "eplx",
                        "pmra": "pmra", "pmdec": "pmdec", "pmra_error": "epmra", "pmdec_error": "epmdec"},
            "magnitudes": [{"band": "broad", "column": "g", "error_column": "eg", "system": "ab"}],
        },
        # required by the configuration, never read here
        "infrared": {"files": ["none.parquet"], "epoch_jyear": 2016.0, "columns": {"id": "i", "ra": "r", "dec": "d"},
                     "position_floor_arcsec": 0.1,
                     "magnitudes": [{"band": "3.4", "column": "a"}, {"band": "4.6", "column": "b"}]},
    }, base_dir=folder)


def _usage():
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime, r.ru_maxrss / 1024.0  # CPU s, MiB (Linux reports KiB)


def child(mode: str, folder: Path, chunk_rows: int, order: int, profile: bool) -> dict:
    """Run one measurement in this (fresh) process and return its numbers."""
    import pyarrow.parquet as pq

    import selector.jobs.ingest  # noqa: F401  (the import cost is part of every mode's floor)

    cpu0, _ = _usage()
    t0 = time.perf_counter()
    rows = 0
    if mode == "read":
        pf = pq.ParquetFile(folder / "astro.parquet", pre_buffer=False)  # as the ingest reader does
        for batch in pf.iter_batches(batch_size=chunk_rows, columns=COLUMNS):
            rows += batch.num_rows
    elif mode == "copy":
        # the least a tiling ingest could do: read every row once and write it once, with the
        # options the tile files are written with
        from selector.store.io import parquet_writer_options

        pf = pq.ParquetFile(folder / "astro.parquet", pre_buffer=False)
        schema = pf.schema_arrow
        with pq.ParquetWriter(folder / "copy.parquet", schema, **parquet_writer_options(schema)) as writer:
            for batch in pf.iter_batches(batch_size=chunk_rows, columns=COLUMNS):
                writer.write_batch(batch)
                rows += batch.num_rows
    elif mode == "ingest":
        from selector.jobs.ingest import ingest_catalogue

        cfg = _config(folder, chunk_rows, order)
        if profile:
            import cProfile
            import pstats

            prof = cProfile.Profile()
            summary = prof.runcall(ingest_catalogue, cfg, "astrometric", lambda *a: None)
            stats = pstats.Stats(prof, stream=sys.stderr).sort_stats("cumulative")
            stats.print_stats(35)
            stats.sort_stats("tottime").print_stats(25)
        else:
            summary = ingest_catalogue(cfg, "astrometric", log=lambda *a: None)
        rows = summary.rows_in
        if summary.accepted + sum(summary.rejected.values()) != rows:
            raise SystemExit(f"ingest lost rows: {rows} in, {summary.accepted} accepted, {summary.rejected} rejected")
        rejected = sum(summary.rejected.values())
    wall = time.perf_counter() - t0
    cpu1, peak = _usage()
    out = {"mode": mode, "rows": rows, "wall_s": wall, "cpu_s": cpu1 - cpu0, "peak_rss_mib": peak}
    if mode == "ingest":
        out["rejected"] = rejected
    return out


def _run_child(mode, folder, args) -> dict:
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", mode, "--folder", str(folder),
           "--chunk-rows", str(args.chunk_rows), "--order", str(args.order)]
    if args.profile and mode == "ingest":
        cmd.append("--profile")
    out = subprocess.run(cmd, capture_output=True, text=True)
    if out.returncode:
        raise SystemExit(f"the {mode} measurement failed:\n{out.stderr}")
    if args.profile and mode == "ingest":
        print(out.stderr, file=sys.stderr)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=int, default=10_000_000, help="rows of the larger catalogue")
    p.add_argument("--second-ratio", type=int, default=10, help="the second catalogue has rows / this")
    p.add_argument("--chunk-rows", type=int, default=1_000_000, help="astrometric.chunk_rows")
    p.add_argument("--order", type=int, default=5, help="tiling.order")
    p.add_argument("--sky", choices=("all", "patch"), default="patch", help="a cap of --patch-deg2, or the whole sky")
    p.add_argument("--patch-deg2", type=float, default=400.0, help="area of the cap for --sky patch")
    p.add_argument("--seed", type=int, default=7)
    p.add_argument("--reject-share", type=float, default=0.0,
                   help="share of rows made invalid (declination beyond 90°), to time the reject path")
    p.add_argument("--profile", action="store_true", help="print a cProfile of the larger ingest to stderr")
    p.add_argument("--workdir", default=None, help="folder for the temporary files (default: system temp)")
    p.add_argument("--child", default=None, help=argparse.SUPPRESS)
    p.add_argument("--folder", default=None, help=argparse.SUPPRESS)
    args = p.parse_args(argv)

    if args.child:
        print(json.dumps(child(args.child, Path(args.folder), args.chunk_rows, args.order, args.profile)))
        return

    sizes = [args.rows, max(1, args.rows // args.second_ratio)]
    where = "whole sky" if args.sky == "all" else f"a {args.patch_deg2:g} deg² cap"
    print(f"synthetic astrometric catalogue, {len(COLUMNS)} columns, uniform over {where}; "
          f"order {args.order}, chunk_rows {args.chunk_rows:,}")
    print("ingest is single-process: its rows/s are rows/s per core; 'per CPU-s' divides by the CPU time of all\n"
          "its threads (pyarrow decodes in a few), which is steadier than wall time on a shared machine")
    from selector.jobs.ingest import _SPOOL_ROWS

    print(f"ingest keeps up to {_SPOOL_ROWS:,} rows in memory before spooling to disk; "
          "sizes below that never touch the spool")
    results = []
    base = Path(tempfile.mkdtemp(prefix="selector-bench-", dir=args.workdir))
    try:
        baseline = _run_child("baseline", base, args)
        for i, rows in enumerate(sizes):
            folder = base / f"size{i}"
            folder.mkdir()
            t0 = time.perf_counter()
            write_catalogue(folder / "astro.parquet", rows, args.sky, args.patch_deg2, args.seed + i, args.reject_share)
            size_mib = (folder / "astro.parquet").stat().st_size / 2**20
            print(f"  wrote {rows:,} rows ({size_mib:,.0f} MiB) in {time.perf_counter() - t0:.1f} s")
            read = _run_child("read", folder, args)
            copy = _run_child("copy", folder, args)
            # profile only the larger size: the smaller one is there for the memory comparison
            ing = _run_child("ingest", folder, argparse.Namespace(**{**vars(args), "profile": args.profile and i == 0}))
            tiles_written = len(Layout(folder / "out").list_tiles("astrometric", args.order))
            results.append((rows, read, ing, tiles_written, copy))
            shutil.rmtree(folder)
    finally:
        shutil.rmtree(base, ignore_errors=True)

    print(f"\nbaseline process (imports only): peak RSS {baseline['peak_rss_mib']:,.0f} MiB")
    head = (f"{'rows':>12} {'tiles':>6} {'rejected':>9} {'read s':>8} {'copy s':>8} {'ingest s':>9} {'ingest/copy':>11} "
            f"{'ingest rows/s':>14} {'per CPU-s':>12} {'read RSS MiB':>13} {'ingest RSS MiB':>15} {'above floor':>12}")
    print(head)
    for rows, read, ing, ntiles, copy in results:
        print(f"{rows:>12,} {ntiles:>6} {ing['rejected']:>9,} {read['wall_s']:>8.2f} {copy['wall_s']:>8.2f} "
              f"{ing['wall_s']:>9.2f} {ing['wall_s'] / copy['wall_s']:>11.1f} {rows / ing['wall_s']:>14,.0f} "
              f"{rows / ing['cpu_s']:>12,.0f} {read['peak_rss_mib']:>13,.0f} {ing['peak_rss_mib']:>15,.0f} "
              f"{ing['peak_rss_mib'] - baseline['peak_rss_mib']:>12,.0f}")
    (big, _, ing_big, _, _), (small, _, ing_small, _, _) = results
    grow = (ing_big["peak_rss_mib"] - baseline["peak_rss_mib"]) / max(1.0, ing_small["peak_rss_mib"] - baseline["peak_rss_mib"])
    print("\nrows per CPU second (all threads), the floors beside the ingest:")
    print(f"{'rows':>12} {'read':>12} {'copy':>12} {'ingest':>12} {'ingest/copy':>12}")
    for rows, read, ing, _, copy in results:
        print(f"{rows:>12,} {rows / read['cpu_s']:>12,.0f} {rows / copy['cpu_s']:>12,.0f} {rows / ing['cpu_s']:>12,.0f} "
              f"{ing['cpu_s'] / copy['cpu_s']:>12.2f}")
    print(f"\npeak memory above the floor grows ×{grow:.2f} for ×{big / small:.0f} rows "
          f"(target: about ×1, independent of rows)")
    print(f"ingest rate {big / ing_big['wall_s']:,.0f} rows/s per core, {big / ing_big['cpu_s']:,.0f} rows per CPU "
          "second (target ≥ 1,500,000)")


if __name__ == "__main__":
    main()
