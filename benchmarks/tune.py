"""Time of `selector tune` on a large feature cache, beside a full re-run of the same rows.

A synthetic sky is written to a temporary folder: ``--rows`` astrometric sources spread uniformly
over a spherical cap straddling RA = 0/360 (``--patch-deg2``; 10 million rows over 400 deg² is
25 000 per deg², the density of a billion-row all-sky catalogue), each with an infrared
counterpart within a fraction of an arcsecond, so the feature cache holds about ``--rows`` rows. A
few per cent are zero-motion sources with red infrared colours, the rest move and are blue, so the
cut-flow has realistic proportions. The sky is ingested and run once (``full run``: load, match,
select, write, merge, timed); then a selection setting is changed and

* ``tune``: :func:`selector.tune.tune` reads the needed columns of every tile and re-evaluates the
  changed selection over all rows (what ``selector tune`` does before printing; the "before" is the
  run's own record), in this process and as the ``selector tune`` command in a fresh one (which
  adds the interpreter start and the imports);
* ``re-select``: ``selector run`` with the changed setting, which re-applies the selection tile by
  tile from the same cache and rewrites the outputs (the run's own way of doing the same);

are timed in the same process. Target (from the issue): tune ≤ 5 s for 10⁷ cached rows.

Usage::

    python benchmarks/tune.py --rows 10000000
    python benchmarks/tune.py --rows 1000000 --keep /tmp/tune-bench   # keep the folder; --reuse it later
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from selector.jobs import run as run_job  # noqa: E402
from selector.jobs import ingest, tune
from selector.settings.config import load_config  # noqa: E402
from selector.store.layout import layout_of

_PIECE = 1_000_000

CONFIG = """
[project]
output_dir = "out"

[tiling]
order = {order}

[astrometric]
files = ["astro"]
epoch_jyear = 2016.0
[astrometric.columns]
id = "sid"
ra = "ra"
dec = "dec"
parallax = "plx"
parallax_error = "eplx"
pmra = "pmra"
pmdec = "pmdec"
pmra_error = "epmra"
pmdec_error = "epmdec"
pm_corr = "corr"
[[astrometric.magnitudes]]
band = "broad"
column = "g"
system = "ab"

[infrared]
files = ["ir"]
epoch_jyear = 2010.0
[infrared.columns]
id = "irid"
ra = "ra"
dec = "dec"
[[infrared.magnitudes]]
band = "3.4"
column = "m3p4"
error_column = "e_m3p4"
[[infrared.magnitudes]]
band = "4.6"
column = "m4p6"
error_column = "e_m4p6"
[[infrared.magnitudes]]
band = "12"
column = "m12"

[match]
radius_arcsec = 2.0
max_proper_motion_mas_yr = 500.0

[run]
workers = {workers}
"""


def _cap(rng, n, patch_deg2):
    """Uniform points in a cap of the given area centred on (RA, Dec) = (0, +30)."""
    area_sr = patch_deg2 * (np.pi / 180.0) ** 2
    cos_max = 1.0 - area_sr / (2.0 * np.pi)
    rho = np.arccos(rng.uniform(cos_max, 1.0, n))
    phi = rng.uniform(0.0, 2.0 * np.pi, n)
    d0 = np.radians(30.0)
    z = np.sin(d0) * np.cos(rho) + np.cos(d0) * np.sin(rho) * np.cos(phi)
    dec = np.degrees(np.arcsin(np.clip(z, -1, 1)))
    ra = np.degrees(np.arctan2(np.sin(rho) * np.sin(phi), np.cos(d0) * np.cos(rho) - np.sin(d0) * np.sin(rho) * np.cos(phi)))
    return np.mod(ra, 360.0), dec


def write_sky(folder: Path, rows: int, patch_deg2: float, seed: int = 7) -> None:
    """Astrometric and infrared Parquet files, written a million rows at a time."""
    rng = np.random.default_rng(seed)
    (folder / "astro").mkdir(parents=True)
    (folder / "ir").mkdir(parents=True)
    for k, start in enumerate(range(0, rows, _PIECE)):
        n = min(_PIECE, rows - start)
        ra, dec = _cap(rng, n, patch_deg2)
        agn = rng.random(n) < 0.03
        pm_scale = np.where(agn, 0.0, rng.lognormal(1.0, 1.0, n))
        e = 10 ** rng.uniform(-1.5, 0.3, n)  # mas
        astro = {
            "sid": np.arange(start, start + n, dtype=np.int64) + 1,
            "ra": ra, "dec": dec,
            "plx": np.where(agn, 0.0, rng.lognormal(-0.5, 1.0, n)) + e * rng.standard_normal(n), "eplx": e,
            "pmra": pm_scale * rng.standard_normal(n) + 1.1 * e * rng.standard_normal(n),
            "pmdec": pm_scale * rng.standard_normal(n) + e * rng.standard_normal(n),
            "epmra": 1.1 * e, "epmdec": e, "corr": rng.uniform(-0.3, 0.3, n),
            "g": rng.uniform(14.0, 21.0, n),
        }
        m4p6 = rng.uniform(10.0, 16.5, n)
        w12 = np.where(agn, rng.normal(1.1, 0.25, n), rng.normal(0.05, 0.1, n))
        offset = rng.normal(0.0, 0.15 / 3600.0, (2, n))
        ir = {
            "irid": np.char.add("I", np.arange(start, start + n).astype(str)),
            "ra": np.mod(ra + offset[0] / np.cos(np.radians(dec)), 360.0), "dec": np.clip(dec + offset[1], -90, 90),
            "m3p4": m4p6 + w12, "e_m3p4": np.full(n, 0.03), "m4p6": m4p6, "e_m4p6": np.full(n, 0.05),
            "m12": np.where(rng.random(n) < 0.3, m4p6 - np.where(agn, 2.8, 0.2), np.nan),
        }
        pq.write_table(pa.table(astro), folder / "astro" / f"part-{k:03d}.parquet")
        pq.write_table(pa.table(ir), folder / "ir" / f"part-{k:03d}.parquet")


def _timed(label, fn):
    t0 = time.perf_counter()
    out = fn()
    dt = time.perf_counter() - t0
    print(f"{label:<44} {dt:8.2f} s", flush=True)
    return out, dt


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--patch-deg2", type=float, default=400.0)
    ap.add_argument("--order", type=int, default=5)
    ap.add_argument("--workers", type=int, default=0, help="run workers (0: one per core)")
    ap.add_argument("--keep", type=Path, default=None, help="build in this folder and keep it")
    ap.add_argument("--reuse", type=Path, default=None, help="a folder kept by --keep: skip building and the full run")
    args = ap.parse_args(argv)

    folder = args.reuse or args.keep or Path(tempfile.mkdtemp(prefix="selector-tune-bench-"))
    config_path = folder / "bench.toml"
    t_full = None
    try:
        if args.reuse is None:
            folder.mkdir(parents=True, exist_ok=True)
            config_path.write_text(CONFIG.format(order=args.order, workers=args.workers))
            print(f"{args.rows:,d} rows over {args.patch_deg2:g} deg², order {args.order}, in {folder}")
            _timed("write the synthetic catalogues", lambda: write_sky(folder, args.rows, args.patch_deg2))
            cfg = load_config(config_path)
            _timed("ingest (both catalogues)", lambda: ingest.ingest(cfg, log=lambda *a: None))
            _, t_full = _timed("full run (load, match, select, write, merge)",
                               lambda: run_job.run(cfg, quiet=True, log=lambda *a: None))
        cfg = load_config(config_path)
        # a change from what the run records (a kept folder may already hold an earlier change)
        recorded_cfg, _ = tune.run_config(layout_of(cfg).run_dir, base_dir=folder)
        change = ["motion.parallax_snr_max=4", 'colours.criteria=["assef2018_r75"]']
        if not tune.setting_changes(recorded_cfg, tune.with_settings(recorded_cfg, change)):
            change = ["motion.parallax_snr_max=3", 'colours.criteria=["stern2012"]']
        out, t_tune = _timed("tune: read the cache + re-evaluate", lambda: tune.tune(config_path, change))
        n = out.cache.n_rows
        print(f"{'  of which reading the cache':<44} {out.cache.seconds:8.2f} s")
        print(f"{'  of which the evaluation':<44} {out.after.seconds:8.2f} s")
        _, t_eval = _timed("tune: re-evaluate once more (cache in memory)", lambda: tune.evaluate(out.cache, out.after.cfg))
        cmd = [sys.executable, "-m", "selector.cli", "tune", "--config", str(config_path)]
        cmd += [a for s in change for a in ("--set", s)]
        _, t_cmd = _timed("`selector tune` command (fresh process)",
                          lambda: subprocess.run(cmd, check=True, capture_output=True))
        print()
        print(tune.format_outcome(out))
        print()
        _, t_resel = _timed("re-select through `selector run` (tile by tile)",
                            lambda: tune.write_results(out.after, log=lambda *a: None))
        print()
        print(f"cached rows: {n:,d}")
        print(f"tune (read + evaluate):        {t_tune:6.2f} s   target ≤ 5 s for 10⁷ cached rows")
        print(f"`selector tune` command:       {t_cmd:6.2f} s   (with interpreter start and imports)")
        print(f"re-select with `selector run`: {t_resel:6.2f} s   ratio {t_resel / t_tune:5.1f}×")
        if t_full is not None:
            print(f"full run of the same rows:     {t_full:6.2f} s   ratio {t_full / t_tune:5.1f}×")
        print(f"one evaluation in memory:      {t_eval:6.2f} s   ({n / max(t_eval, 1e-9) / 1e6:.1f} M rows/s)")
    finally:
        if args.keep is None and args.reuse is None:
            shutil.rmtree(folder, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
