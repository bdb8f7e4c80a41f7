"""End-to-end throughput: tiles in, ranked list out, for a large synthetic patch of sky.

Prints rows per second per core for `selector run` (ingest is timed separately, as a reference),
and the peak resident memory of the busiest worker, at two sizes so one can see whether memory
follows the tile size (it should) or the catalogue size (it should not).

    python benchmarks/pipeline.py --rows 10000000 --area-deg2 400 --workers 2

Synthetic sky: a cap of the given area at Dec +30 with uniform density (by default 25 000
astrometric sources per deg², a typical mid-latitude density for space astrometry to 21 mag), zero
motion for 20 % of sources and disc-like motions for the rest; the infrared catalogue holds noisy
counterparts of 45 % of the sources plus 5 % infrared-only ones.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from selector.settings.config import from_dict  # noqa: E402


def cap_points(rng, n, area_deg2, centre_dec=30.0):
    """Uniform points in a spherical cap of the given area around (RA 0, centre_dec)."""
    cos_r = 1 - area_deg2 / (2 * np.pi * (180 / np.pi) ** 2)
    z = rng.uniform(cos_r, 1, n)
    phi = rng.uniform(0, 2 * np.pi, n)
    s = np.sqrt(1 - z * z)
    local = np.stack([z, s * np.cos(phi), s * np.sin(phi)], axis=1)  # cap around +x
    d = np.radians(centre_dec)
    rot = np.array([[np.cos(d), 0, -np.sin(d)], [0, 1, 0], [np.sin(d), 0, np.cos(d)]])
    xyz = local @ rot.T
    ra = np.degrees(np.arctan2(xyz[:, 1], xyz[:, 0])) % 360
    dec = np.degrees(np.arcsin(np.clip(xyz[:, 2], -1, 1)))
    return ra, dec


def write_sky(folder: Path, n: int, area: float, seed: int = 1, parts: int = 10):
    rng = np.random.default_rng(seed)
    (folder / "astro").mkdir(parents=True, exist_ok=True)
    ir_ra, ir_dec, ir_w2 = [], [], []
    per = n // parts
    for p in range(parts):
        ra, dec = cap_points(rng, per, area)
        g = rng.uniform(14, 21, per)
        err = 0.02 * 10 ** (0.2 * (g - 15))
        moving = rng.random(per) > 0.2
        pmra = np.where(moving, rng.normal(0, 6, per), 0) + rng.normal(0, err)
        pmdec = np.where(moving, rng.normal(-3, 6, per), 0) + rng.normal(0, err)
        plx = np.where(moving, rng.exponential(0.8, per), 0) + rng.normal(0, err)
        pq.write_table(pa.table({
            "id": np.arange(p * per, (p + 1) * per, dtype=np.int64), "ra": ra, "dec": dec,
            "plx": plx, "eplx": err, "pmra": pmra, "pmdec": pmdec, "epmra": err, "epmdec": err,
            "g": g, "eg": np.full(per, 0.01),
        }), folder / "astro" / f"part-{p:03d}.parquet")
        has = rng.random(per) < 0.45
        ir_ra.append(ra[has] + rng.normal(0, 0.3 / 3600, has.sum()) / np.cos(np.radians(dec[has])))
        ir_dec.append(dec[has] + rng.normal(0, 0.3 / 3600, has.sum()))
        ir_w2.append(rng.uniform(11, 17, has.sum()))
    extra_ra, extra_dec = cap_points(rng, n // 20, area)
    ir_ra = np.concatenate(ir_ra + [extra_ra]) % 360
    ir_dec = np.concatenate(ir_dec + [extra_dec])
    m4p6 = np.concatenate(ir_w2 + [rng.uniform(11, 17, len(extra_ra))])
    m = len(ir_ra)
    m3p4 = m4p6 + np.where(rng.random(m) < 0.05, rng.normal(1.0, 0.2, m), rng.normal(0.05, 0.05, m))
    pq.write_table(pa.table({
        "ir": np.arange(m, dtype=np.int64), "ra": ir_ra, "dec": ir_dec,
        "m3p4": m3p4, "e_m3p4": np.full(m, 0.03), "m4p6": m4p6, "e_m4p6": np.full(m, 0.05),
    }), folder / "ir.parquet")
    return m


def config(folder: Path, order: int, workers: int, out: str):
    return from_dict({
        "project": {"output_dir": out},
        "tiling": {"order": order},
        "run": {"workers": workers},
        "astrometric": {"files": ["astro"], "epoch_jyear": 2016.0, "columns": {
            "id": "id", "ra": "ra", "dec": "dec", "parallax": "plx", "parallax_error": "eplx", "pmra": "pmra",
            "pmdec": "pmdec", "pmra_error": "epmra", "pmdec_error": "epmdec"},
            "magnitudes": [{"band": "g", "column": "g", "error_column": "eg", "system": "ab"}]},
        "infrared": {"files": ["ir.parquet"], "epoch_jyear": 2010.5, "columns": {"id": "ir", "ra": "ra", "dec": "dec"},
                     "magnitudes": [{"band": "3.4", "column": "m3p4", "error_column": "e_m3p4"},
                                    {"band": "4.6", "column": "m4p6", "error_column": "e_m4p6"}]},
    }, base_dir=folder)


def _child(args) -> None:
    """In a fresh process: ingest or run the sky in ``args.folder``; one JSON line of figures."""
    cfg = config(Path(args.folder), args.order, args.workers, "out")
    t0 = time.perf_counter()
    if args.child == "ingest":
        from selector.jobs.ingest import ingest

        ingest(cfg, log=lambda *a: None)
        print(json.dumps({"ingest_s": time.perf_counter() - t0}))
        return
    from selector.jobs.run import run

    result = run(cfg, workers=args.workers, quiet=True, force=True)
    t = result.timings
    print(json.dumps({"run_s": time.perf_counter() - t0, "tiles": result.tiles, "candidates": result.candidates,
                      "tile_s_total": t.tile_s_total, "work_s": t.work_s, "merge_s": t.merge_s,
                      # each worker's own high-water mark, returned with its tiles (a running maximum over the
                      # process's children would mix the two sizes, and the ingest, into one figure)
                      "peak_worker_mib": t.peak_worker_rss_mib}))


def _in_child(mode: str, folder: Path, order: int, workers: int) -> dict:
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", mode, "--folder", str(folder),
           "--order", str(order), "--workers", str(workers)]
    out = subprocess.run(cmd, capture_output=True, text=True)
    if out.returncode:
        raise SystemExit(f"the {mode} step failed:\n{out.stderr}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def measure(n: int, area: float, order: int, workers: int):
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        m = write_sky(folder, n, area)
        # each step in its own process, so that the workers' memory is theirs alone (a forked worker
        # starts with its parent's resident pages)
        ingest = _in_child("ingest", folder, order, workers)
        run = _in_child("run", folder, order, workers)
        return {"rows": n, "ir_rows": m, **ingest, **run}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--area-deg2", type=float, default=400.0)
    ap.add_argument("--order", type=int, default=5)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--child", choices=("ingest", "run"), help=argparse.SUPPRESS)
    ap.add_argument("--folder", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        return _child(args)
    small = measure(args.rows // 5, args.area_deg2 / 5, args.order, args.workers)
    big = measure(args.rows, args.area_deg2, args.order, args.workers)
    print(f"{'':24}{'1/5 size':>14}{'full size':>14}")
    for key, fmt in (("rows", "{:,d}"), ("ir_rows", "{:,d}"), ("tiles", "{:,d}"), ("candidates", "{:,d}"),
                     ("ingest_s", "{:.1f}"), ("run_s", "{:.1f}"), ("work_s", "{:.1f}"), ("tile_s_total", "{:.1f}"),
                     ("merge_s", "{:.2f}"), ("peak_worker_mib", "{:.0f}")):
        print(f"{key:24}{fmt.format(small[key]):>14}{fmt.format(big[key]):>14}")
    for label, r in (("1/5 size", small), ("full size", big)):
        rate = r["rows"] / r["run_s"] / args.workers
        print(f"{label}: run {rate:,.0f} astrometric rows/s per core over {args.workers} workers "
              f"(target >= 500,000); ingest {r['rows'] / r['ingest_s']:,.0f} rows/s (one process); "
              f"run/ingest time ratio {r['run_s'] / r['ingest_s']:.2f}")
    print(f"peak worker memory full/small: {big['peak_worker_mib'] / small['peak_worker_mib']:.2f} "
          "(same density: near 1 means memory follows the tile size, not the catalogue size)")


if __name__ == "__main__":
    main()
