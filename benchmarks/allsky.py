"""Whole-sky benchmark: ingest and run on a mock sky of the full size, beside references of the same run.

A script, not a test: it prints measurements side by side with references measured in the same run
on the same machine, and asserts nothing about time.

What it does
------------
1. Writes an invented mock sky into a work folder, in chunks (``--chunk-rows``, default 2e6 rows), as
   several Parquet part files (``--part-rows``), so memory stays bounded whatever ``--rows`` is:

   * ``--rows`` astrometric rows (default 1e8) over the whole sphere. Galactic latitude comes from a
     mixture of a uniform-on-the-sphere component and a thin-disc component with density
     ∝ exp(−|b| / 10°) (Laplace in b), longitude is uniform; positions are turned from Galactic to
     ICRS unit vectors by one fixed rotation matrix, taken from astropy's Galactic frame once.
     Parallaxes and proper motions are mostly small (exponential parallaxes with a 0.4 mas mean, a
     few mas/yr of motion, a 0.5 % fast tail); 2 % of the rows, all in the uniform component, are
     extragalactic (zero true motion). Errors grow with a broad-band AB magnitude whose counts rise
     towards the faint end.
   * 0.6 × ``--rows`` infrared rows: 70 % of them are counterparts of astrometric rows, placed at the
     infrared epoch (the astrometric position moved back by its proper motion) with 0.3 arcsec of
     scatter; the rest are infrared-only sources with the same sky density. Magnitudes at 3.4 and
     4.6 µm (Vega), with stellar colours for most rows and red colours for most extragalactic ones.
   * a TOML configuration mapping those columns (``config.toml`` in the folder), at HEALPix order
     ``--order`` (default: 5 at 1e8 rows, one lower for every factor of 4 fewer rows, at least 2, so
     that a tile holds about 8 000 astrometric rows at every size).

2. Times, each in its own child process, whose resources are read with ``os.wait4``:

   * ``ingest, whole sky``: ``python -m selector.cli ingest --config config.toml`` (both catalogues);
   * ``run, 1 worker`` and ``run, 2 workers``: ``selector.run(config, workers=N, force=True)``, each
     after the run outputs of the one before are removed (not timed), in a
     small child of this script, which afterwards reads ``selector.status`` for the tile times;
   * ``CPU reference``: a fixed numpy workload (sorting and transcendental functions on a few
     million floats, no I/O), once in one process and then twice at once in two processes, for the
     machine's own 1 → 2 speed-up at that moment (the machine may be shared);
   * ``ingest, one patch``: after the whole-sky files are removed, the same number of rows drawn
     uniformly within one spherical cap of ``--patch-deg2`` (default 400 deg²) around RA 0°,
     Dec +30°, ingested at the same order (``--no-patch`` skips it).

Usage
-----
::

    PYTHONPATH=. .venv/bin/python benchmarks/allsky.py --rows 1e7        # a quick look, a few minutes
    PYTHONPATH=. .venv/bin/python benchmarks/allsky.py                   # 1e8 rows, order 5
    PYTHONPATH=. .venv/bin/python benchmarks/allsky.py --rows 2e5 --order 3 --keep --work /tmp/sky

The work folder (``--work``, default a new temporary folder under /tmp) is removed at the end unless
``--keep`` is given; a ``--work`` folder that already holds files is refused. Before writing, the
free space of the file system is checked against about 60 bytes per catalogue row (astrometric and
infrared) per copy, four copies (input files, ingest spool, tiles, run outputs; at 2e6 rows the work
folder peaked near 210 bytes per row of both catalogues), and the benchmark refuses to start if it is
short: about 38 GB at 1e8 rows. Memory stays near what one chunk of the mock (about 1 GB at 2e6
rows) and one ingest spool need, whatever ``--rows`` is.

The figures
-----------
rows/s/core
    Ingest: astrometric plus infrared rows per second of wall time; ingest is a single process, so
    this is per core. Run: astrometric rows per second of wall time divided by the workers.
rows/CPU s
    The same rows per second of CPU time (user + system) of the whole process tree, from
    ``os.wait4``: on a shared machine, where wall time includes waiting for a core, this is the
    steadier figure.
peak RSS
    ``ru_maxrss`` (the resident-set high-water mark) of a child process. For the ingest it is the
    ``selector ingest`` process. For a run it is shown twice: ``worker`` is the largest of the pool's
    worker processes, as each worker reports it with its tiles (``RunResult.timings``, also in the run
    log and manifest; with one worker the tiles run in the run's own process, so it is that process),
    and ``tree`` is what ``os.wait4`` reports for the run's process, the largest of it and its
    workers. A forked worker's RSS also counts the pages it shares with its parent, so it is an
    upper bound of the memory the worker adds. ``baseline`` is a process that only imports selector,
    the floor under every figure. Linux carries a process's high-water mark across ``exec``, so a child
    started by a large process would report at least that process's size: this is why the mock sky is
    written by a child too, and the benchmark's own process imports nothing but numpy.
serial share
    ``(wall − Σ tile time / workers) / wall``: the share of the run's wall time not explained by
    tile work spread evenly over the workers: interpreter start, imports, planning (including the
    fingerprints of unchanged files), merge, and imbalance among the workers. Σ tile time is the
    total of the tile times (``RunResult.timings.tile_s_total``: wall times measured inside the
    workers, so they include waiting for a core on a busy machine); the run's tile-work span
    (``timings.work_s``) is shown beside it, and the share of the tile time spent reading, matching,
    selecting and writing.
speed-up 1 → 2
    Wall time with one worker over wall time with two; also over the runs' tile-work spans, which
    leave out start-up, planning and merge. The reference job's speed-up is ``2 × t(1 job alone) /
    t(2 jobs at once)``: 2.0 on two idle cores. The ratio of the two says how much of the speed-up
    the machine allowed that the run did not take.
1.8e9 extrapolation
    Ingest time per astrometric row (the infrared catalogue at 0.6 rows per astrometric row
    included) and run time per astrometric row with two workers, times 1.8e9. It assumes the cost
    per row stays the same, which holds for the ingest's streaming part but not necessarily for the
    run: at 1.8e9 rows the tiles of the same order hold 18 times more rows, so fixed costs per tile
    shrink per row while the denser sky gives more candidate pairs per source.
whole-sky / one-patch ingest
    The whole-sky ingest's wall time over the one-patch ingest's: the cost of writing many tiles
    rather than few for the same rows (a target is to stay within 1.5×).
"""

from __future__ import annotations

import argparse
import json
import math
import os
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

#: Infrared rows per astrometric row, and the share of infrared rows that are counterparts.
IR_PER_ASTRO = 0.6
COUNTERPART_SHARE = 0.7
#: Share of the rows in the thin-disc component, and its scale height in Galactic latitude.
DISC_SHARE = 0.5
DISC_SCALE_DEG = 10.0
#: Share of extragalactic rows (zero true motion), all drawn from the uniform component.
EXTRAGALACTIC_SHARE = 0.02
ASTRO_EPOCH_JYEAR = 2016.0
IR_EPOCH_JYEAR = 2010.5
#: Disk needed per catalogue row for each copy on disk at once (input files, spool and tiles, run outputs).
BYTES_PER_ROW = 60
DISK_COPIES = 4
#: Size of the full catalogue the per-row rates are extrapolated to.
TARGET_ROWS = 1.8e9
_MAS_PER_RAD = 180.0 / math.pi * 3.6e6


# ----------------------------------------------------------------------------------------------
# The mock sky


def galactic_to_icrs() -> np.ndarray:
    """Rotation matrix taking Galactic unit vectors (columns) to ICRS ones, from astropy's frames once."""
    import astropy.units as u
    from astropy.coordinates import SkyCoord

    axes = SkyCoord(l=[0.0, 90.0, 0.0] * u.deg, b=[0.0, 0.0, 90.0] * u.deg, frame="galactic").icrs.cartesian
    return np.vstack([axes.x.value, axes.y.value, axes.z.value])  # column k is the image of Galactic axis k


def _unit(lon_rad, lat_rad) -> np.ndarray:
    c = np.cos(lat_rad)
    return np.stack([c * np.cos(lon_rad), c * np.sin(lon_rad), np.sin(lat_rad)], axis=1)


def _radec(xyz: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    ra = np.degrees(np.arctan2(xyz[:, 1], xyz[:, 0])) % 360.0
    dec = np.degrees(np.arcsin(np.clip(xyz[:, 2], -1.0, 1.0)))
    return ra, dec


class WholeSky:
    """Positions over the whole sphere, denser towards the Galactic plane.

    Parameters
    ----------
    rotation : ndarray, shape (3, 3)
        Galactic → ICRS rotation of column vectors (:func:`galactic_to_icrs`).
    """

    def __init__(self, rotation: np.ndarray):
        self.rotation = rotation

    def __call__(self, rng, n: int):
        """``n`` positions: ICRS RA and Dec in degrees, and whether each is drawn from the uniform part."""
        in_disc = rng.random(n) < DISC_SHARE
        sin_b = rng.uniform(-1.0, 1.0, n)  # uniform on the sphere
        k = int(in_disc.sum())
        # |b| from exp(-|b|/h) truncated at 90 deg, by inverting its distribution function
        h = DISC_SCALE_DEG
        abs_b = -h * np.log1p(-rng.random(k) * -np.expm1(-90.0 / h))
        sin_b[in_disc] = np.sin(np.radians(np.where(rng.random(k) < 0.5, -abs_b, abs_b)))
        lat = np.arcsin(sin_b)
        lon = rng.uniform(0.0, 2.0 * np.pi, n)
        ra, dec = _radec(_unit(lon, lat) @ self.rotation.T)
        return ra, dec, ~in_disc


class Patch:
    """Positions uniform in a spherical cap of ``area_deg2`` around (RA 0°, Dec ``centre_dec_deg``)."""

    def __init__(self, area_deg2: float, centre_dec_deg: float = 30.0):
        self.cos_radius = 1.0 - area_deg2 / (2.0 * np.pi * np.degrees(1.0) ** 2)
        d = np.radians(centre_dec_deg)
        # the cap is drawn around +z, then +z is turned onto the centre (a rotation about the y axis)
        self.rotation = np.array([[np.sin(d), 0.0, np.cos(d)], [0.0, 1.0, 0.0], [-np.cos(d), 0.0, np.sin(d)]])

    def __call__(self, rng, n: int):
        z = rng.uniform(self.cos_radius, 1.0, n)
        ra, dec = _radec(_unit(rng.uniform(0.0, 2.0 * np.pi, n), np.arcsin(z)) @ self.rotation.T)
        return ra, dec, np.ones(n, bool)


def _moved(ra_deg, dec_deg, east_mas, north_mas):
    """Positions displaced by small tangent-plane offsets (mas), on unit vectors, so the poles are ordinary."""
    ra, dec = np.radians(ra_deg), np.radians(dec_deg)
    p = _unit(ra, dec)
    east = np.stack([-np.sin(ra), np.cos(ra), np.zeros_like(ra)], axis=1)
    north = np.stack([-np.sin(dec) * np.cos(ra), -np.sin(dec) * np.sin(ra), np.cos(dec)], axis=1)
    q = p + (east * east_mas[:, None] + north * north_mas[:, None]) / _MAS_PER_RAD
    return _radec(q / np.linalg.norm(q, axis=1, keepdims=True))


def _faint_rising(rng, n, bright, faint, slope=0.3):
    """Magnitudes with counts rising as 10**(slope·m) between ``bright`` and ``faint``."""
    a, b = 10 ** (slope * bright), 10 ** (slope * faint)
    return np.log10(a + rng.random(n) * (b - a)) / slope


def sky_chunk(rng, positions, first_astro_id: int, first_ir_id: int, n: int):
    """One chunk: ``n`` astrometric rows and about ``IR_PER_ASTRO · n`` infrared rows, as two Arrow tables."""
    import pyarrow as pa

    ra, dec, uniform_part = positions(rng, n)
    extragalactic = uniform_part & (rng.random(n) < EXTRAGALACTIC_SHARE / (1.0 - DISC_SHARE))
    mag = _faint_rising(rng, n, 12.0, 21.0)
    err = 0.02 * 10 ** (0.2 * (mag - 15.0))  # mas and mas/yr: 0.02 at 15 mag, 0.5 at 22 mag
    fast = rng.random(n) < 0.005
    spread = np.where(fast, 40.0, 4.0)
    plx = np.where(extragalactic, 0.0, rng.exponential(0.4, n))
    pmra = np.where(extragalactic, 0.0, rng.normal(-1.5, 1.0, n) * spread / 4.0 + rng.normal(0.0, spread))
    pmdec = np.where(extragalactic, 0.0, rng.normal(-2.5, 1.0, n) * spread / 4.0 + rng.normal(0.0, spread))
    astro = pa.table({
        "src": np.arange(first_astro_id, first_astro_id + n, dtype=np.int64),
        "ra": ra, "dec": dec, "ra_err": 0.7 * err, "dec_err": 0.7 * err,
        "plx": plx + rng.normal(0.0, err), "plx_err": err,
        "pm_ra": pmra + rng.normal(0.0, 0.8 * err), "pm_dec": pmdec + rng.normal(0.0, 0.8 * err),
        "pm_ra_err": 0.8 * err, "pm_dec_err": 0.8 * err,
        "pm_corr": rng.uniform(-0.3, 0.3, n),
        "mag_broad": mag, "mag_broad_err": 0.001 * 10 ** (0.2 * (mag - 12.0)),
    })

    # counterparts: where the source was at the infrared epoch, plus the infrared position scatter
    has = rng.random(n) < IR_PER_ASTRO * COUNTERPART_SHARE
    k = int(has.sum())
    dt = IR_EPOCH_JYEAR - ASTRO_EPOCH_JYEAR
    c_ra, c_dec = _moved(ra[has], dec[has], pmra[has] * dt + rng.normal(0.0, 300.0, k),
                         pmdec[has] * dt + rng.normal(0.0, 300.0, k))
    red = extragalactic[has] & (rng.random(k) < 0.6)
    c_4p6 = mag[has] - np.where(extragalactic[has], 5.0, 2.0) + rng.normal(0.0, 0.6, k)
    c_colour = np.where(red, rng.normal(1.1, 0.25, k), rng.normal(0.05, 0.08, k))
    # infrared-only sources, with the same sky density
    m = round(n * IR_PER_ASTRO * (1.0 - COUNTERPART_SHARE))
    o_ra, o_dec, _ = positions(rng, m)
    o_4p6 = _faint_rising(rng, m, 11.0, 17.0)
    o_colour = rng.normal(0.3, 0.4, m)
    m4p6 = np.concatenate([c_4p6, o_4p6])
    m3p4 = m4p6 + np.concatenate([c_colour, o_colour])
    rows = k + m
    infrared = pa.table({
        "obj": np.arange(first_ir_id, first_ir_id + rows, dtype=np.int64),
        "ra": np.concatenate([c_ra, o_ra]), "dec": np.concatenate([c_dec, o_dec]),
        "pos_err": np.full(rows, 0.3),
        "m3p4": m3p4, "m3p4_err": 0.02 * 10 ** (0.4 * np.clip(m3p4 - 14.0, -3.0, 4.0)),
        "m4p6": m4p6, "m4p6_err": 0.03 * 10 ** (0.4 * np.clip(m4p6 - 14.0, -3.0, 4.0)),
    })
    return astro, infrared


def write_sky(folder: Path, rows: int, positions, chunk_rows: int, part_rows: int, seed: int, note) -> dict:
    """Write the two catalogues as Parquet part files, one chunk at a time; returns the row counts."""
    import pyarrow.parquet as pq

    rng = np.random.default_rng(seed)
    counts = {"astrometric": 0, "infrared": 0}
    writers: dict = {}
    part_rows = max(chunk_rows, part_rows // chunk_rows * chunk_rows)
    t0 = time.perf_counter()
    try:
        for start in range(0, rows, chunk_rows):
            n = min(chunk_rows, rows - start)
            part = start // part_rows
            tables = sky_chunk(rng, positions, counts["astrometric"] + 1, counts["infrared"] + 1, n)
            for kind, table in zip(("astrometric", "infrared"), tables):
                current = writers.get(kind)
                if current is None or current[0] != part:
                    if current is not None:
                        current[1].close()
                    (folder / kind).mkdir(parents=True, exist_ok=True)
                    writers[kind] = (part, pq.ParquetWriter(folder / kind / f"part-{part:04d}.parquet", table.schema))
                writers[kind][1].write_table(table)
                counts[kind] += table.num_rows
            if (start // chunk_rows) % 10 == 9:
                note(f"  {start + n:,} of {rows:,} astrometric rows written ({time.perf_counter() - t0:.0f} s)")
    finally:
        for _, writer in writers.values():
            writer.close()
    return counts


CONFIG = """\
# Written by benchmarks/allsky.py for its mock sky; relative paths are taken from this file's folder.
[project]
output_dir = "out"

[tiling]
order = {order}

[run]
progress_interval_s = 60.0

[astrometric]
files = ["astrometric"]
epoch_jyear = {astro_epoch}
chunk_rows = 1000000

[astrometric.columns]
id = "src"
ra = {{ column = "ra", unit = "deg" }}
dec = {{ column = "dec", unit = "deg" }}
ra_error = {{ column = "ra_err", unit = "mas" }}
dec_error = {{ column = "dec_err", unit = "mas" }}
parallax = {{ column = "plx", unit = "mas" }}
parallax_error = {{ column = "plx_err", unit = "mas" }}
pmra = {{ column = "pm_ra", unit = "mas / yr" }}
pmdec = {{ column = "pm_dec", unit = "mas / yr" }}
pmra_error = {{ column = "pm_ra_err", unit = "mas / yr" }}
pmdec_error = {{ column = "pm_dec_err", unit = "mas / yr" }}
pm_corr = "pm_corr"

[[astrometric.magnitudes]]
band = "broad"
column = "mag_broad"
error_column = "mag_broad_err"
system = "ab"

[infrared]
files = ["infrared"]
epoch_jyear = {ir_epoch}
chunk_rows = 1000000

[infrared.columns]
id = "obj"
ra = {{ column = "ra", unit = "deg" }}
dec = {{ column = "dec", unit = "deg" }}
position_error = {{ column = "pos_err", unit = "arcsec" }}

[[infrared.magnitudes]]
band = "3.4"
column = "m3p4"
error_column = "m3p4_err"
system = "vega"

[[infrared.magnitudes]]
band = "4.6"
column = "m4p6"
error_column = "m4p6_err"
system = "vega"
"""


def write_config(folder: Path, order: int) -> Path:
    path = folder / "config.toml"
    path.write_text(CONFIG.format(order=order, astro_epoch=ASTRO_EPOCH_JYEAR, ir_epoch=IR_EPOCH_JYEAR))
    from selector import load_config

    load_config(path)  # refused here, before any timing, if the package no longer accepts it
    return path


# ----------------------------------------------------------------------------------------------
# Child processes


def _env() -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT)] + [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p])
    return env


def _start(cmd: list[str], log_path: Path, env: dict, stderr_to_log: bool = True):
    with open(log_path, "w") as out:  # the child keeps its own copy of the descriptor
        return subprocess.Popen(cmd, stdout=out, stderr=subprocess.STDOUT if stderr_to_log else None, env=env,
                                cwd=log_path.parent)


def _finish(proc, label: str, log_path: Path) -> dict:
    """Wait for ``proc`` with ``os.wait4``: its exit status and the resources of its process tree."""
    _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode:
        tail = "\n".join(log_path.read_text(errors="replace").splitlines()[-15:])
        raise SystemExit(f"{label} failed (exit status {proc.returncode}); its output is in {log_path}:\n{tail}")
    return {"cpu_s": usage.ru_utime + usage.ru_stime, "tree_peak_mib": usage.ru_maxrss / 1024.0}


def timed(label: str, cmd: list[str], log_path: Path, env: dict | None = None, stderr_to_log: bool = True) -> dict:
    """Run one command as a child process; its wall time, CPU time, peak RSS and last JSON line, if any."""
    t0 = time.perf_counter()
    proc = _start(cmd, log_path, env or _env(), stderr_to_log)
    out = _finish(proc, label, log_path)
    out["wall_s"] = time.perf_counter() - t0
    lines = log_path.read_text(errors="replace").strip().splitlines()
    if lines and lines[-1].startswith("{"):
        out.update(json.loads(lines[-1]))
    return out


def child_write(args) -> None:
    """In a child process: write one mock sky and its config into ``args.folder``; a JSON line of figures."""
    folder = Path(args.folder)
    positions = WholeSky(galactic_to_icrs()) if args.sky == "all" else Patch(args.patch_deg2)
    t0 = time.perf_counter()
    counts = write_sky(folder, args.rows, positions, args.chunk_rows, args.part_rows, args.seed, _note)
    write_s = time.perf_counter() - t0
    write_config(folder, args.order)
    print(json.dumps({"counts": counts, "write_s": write_s, "input_bytes": _du(folder)}))


def child_run(config: str, workers: int) -> None:
    """In a child process: one forced run, then its timings and its workers' peak memories, as a JSON line."""
    import selector

    lines: list[str] = []
    t0 = time.perf_counter()
    result = selector.run(config, workers=workers, force=True, quiet=True, log=lines.append)
    inside_s = time.perf_counter() - t0
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    # the run reaps its pool before it returns: every worker is a finished child by now
    children = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0
    t = result.timings
    for line in lines:
        print(line)
    print(selector.status(config, runs=1))
    print(json.dumps({
        "ok": bool(result.ok), "tiles": result.tiles, "candidates": result.candidates,
        "run_call_s": inside_s, "tile_work_span_s": t.work_s, "tile_s_total": t.tile_s_total,
        "tile_s_max": t.tile_s_max, "plan_s": t.plan_s, "merge_s": t.merge_s, "read_s": t.read_s,
        "match_s": t.match_s, "select_s": t.select_s, "write_s": t.write_s,
        "parent_peak_mib": own, "children_peak_mib": children,
        # what each worker reported with its tiles (ru_maxrss after each tile); one worker: this process
        "worker_peak_mib": t.peak_worker_rss_mib, "workers_seen": len(t.worker_peak_rss_mib),
    }))


def cpu_workload() -> None:
    """A fixed CPU-bound numpy job (no I/O): sorts, trigonometry and a gather on 3e6 floats, repeated."""
    rng = np.random.default_rng(7)
    x = rng.random(3_000_000)
    total = 0.0
    for i in range(24):  # about 4 s of CPU: long enough to average over a shared machine's noise
        y = np.sort(x + i * 1e-3)
        z = np.arctan2(np.sin(y), np.cos(2.0 * y))
        total += float(z[np.argsort(x[: len(x) // 4])].sum())
    print(json.dumps({"checksum": total}))


def cpu_reference(folder: Path) -> dict:
    """The reference job once alone, then twice at once; returns both wall times and the speed-up."""
    env = _env()
    env.update(OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1")
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", "cpu"]
    one = timed("the CPU reference job", cmd, folder / "cpu-1.log", env)
    t0 = time.perf_counter()
    procs = [(_start(cmd, folder / f"cpu-2-{i}.log", env), folder / f"cpu-2-{i}.log") for i in range(2)]
    pair = [_finish(p, "the CPU reference job", log) for p, log in procs]
    wall2 = time.perf_counter() - t0
    return {"one_s": one["wall_s"], "one_cpu_s": one["cpu_s"], "pair_s": wall2,
            "pair_cpu_s": sum(p["cpu_s"] for p in pair), "speedup": 2.0 * one["wall_s"] / wall2}


# ----------------------------------------------------------------------------------------------
# The benchmark


def _note(msg: str) -> None:
    print(f"[{time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)


def _count(text: str) -> int:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number (write for example 1e7 or 10000000)") from None
    if value < 1000 or value != int(value):
        raise argparse.ArgumentTypeError(f"{text}: give a whole number of at least 1000 rows")
    return int(value)


def default_order(rows: int) -> int:
    """About 8 000 astrometric rows per tile: order 5 at 1e8 rows, one lower per factor 4, at least 2."""
    return int(min(5, max(2, round(5 + math.log(rows / 1e8, 4)))))


def disk_needed(rows: int) -> int:
    return int(BYTES_PER_ROW * rows * (1.0 + IR_PER_ASTRO) * DISK_COPIES)


def check_disk(folder: Path, rows: int) -> None:
    need = disk_needed(rows)
    free = shutil.disk_usage(folder).free
    if free < need:
        raise SystemExit(f"{folder}: {free / 1e9:.1f} GB free, but {rows:,} rows need about {need / 1e9:.1f} GB "
                         f"({BYTES_PER_ROW} bytes per row, {DISK_COPIES} copies); give --work on a larger file "
                         "system or fewer --rows")


def _du(folder: Path) -> int:
    return sum(p.stat().st_size for p in folder.rglob("*") if p.is_file())


def measure(args, work: Path, note) -> dict:
    """Every measurement, each in a child process; this process stays small (see the module notes)."""
    here = str(Path(__file__).resolve())
    sizes = ["--rows", str(args.rows), "--chunk-rows", str(args.chunk_rows), "--part-rows", str(args.part_rows),
             "--seed", str(args.seed), "--order", str(args.order), "--patch-deg2", str(args.patch_deg2)]

    def write(folder: Path, sky: str) -> dict:
        folder.mkdir()
        return timed(f"writing the {sky} mock sky", [sys.executable, here, "--child", "write", "--sky", sky,
                                                     "--folder", str(folder), *sizes],
                     folder / "write.log", stderr_to_log=False)

    def ingest(folder: Path, label: str) -> dict:
        note(f"{label} (order {args.order}) ...")
        return timed(label, [sys.executable, "-m", "selector.cli", "ingest", "--config", str(folder / "config.toml")],
                     folder / "ingest.log")

    out: dict = {"rows": args.rows}
    note("baseline: a process that only imports selector ...")
    out["baseline"] = timed("the baseline", [sys.executable, "-c", "import selector.api"], work / "baseline.log")
    sky = work / "sky"
    note(f"writing the whole-sky mock: {args.rows:,} astrometric rows in chunks of {args.chunk_rows:,}")
    written = write(sky, "all")
    out.update(counts=written["counts"], write_s=written["write_s"], input_bytes=written["input_bytes"])
    out["ingest"] = ingest(sky, "ingest, whole sky")
    out["tiles_bytes"] = _du(sky / "out")
    for workers in (1, 2):
        # both runs start from no run outputs: a forced run over an earlier one's files also pays for
        # freeing their blocks, which on a disk mounted with online discard costs milliseconds per file and
        # would be charged to the second run alone
        shutil.rmtree(sky / "out" / "run", ignore_errors=True)
        note(f"run, {workers} worker{'s' if workers > 1 else ''} ...")
        out[f"run{workers}"] = timed(f"the run with {workers} workers",
                                     [sys.executable, here, "--child", "run", "--config", str(sky / "config.toml"),
                                      "--workers", str(workers)], sky / f"run-{workers}.log")
    out["all_bytes"] = _du(sky)
    note("CPU reference job, 1 process then 2 at once ...")
    out["cpu"] = cpu_reference(sky)
    if args.keep:
        note(f"kept: {sky}")
    else:
        shutil.rmtree(sky)

    if not args.no_patch:
        check_disk(work, args.rows)
        patch = work / "patch"
        note(f"writing the one-patch mock: {args.rows:,} astrometric rows within {args.patch_deg2:g} deg^2")
        out["patch_counts"] = write(patch, "patch")["counts"]
        out["patch"] = ingest(patch, "ingest, one patch")
        if args.keep:
            note(f"kept: {patch}")
        else:
            shutil.rmtree(patch)
    return out


def _fmt(value, spec: str) -> str:
    return "n/a" if value is None else format(value, spec)


def report(r: dict, order: int) -> str:
    n = r["rows"]
    n_all = r["counts"]["astrometric"] + r["counts"]["infrared"]
    ing, run1, run2, cpu, patch = r["ingest"], r["run1"], r["run2"], r["cpu"], r.get("patch")
    lines = [(f"whole sky: {r['counts']['astrometric']:,} astrometric + {r['counts']['infrared']:,} infrared rows, "
              f"order {order} ({12 * 4 ** order:,} tiles, {run2.get('tiles', 0):,} with astrometric rows), "
              f"{run2.get('candidates', 0):,} candidates"),
             (f"disk: input {r['input_bytes'] / 1e9:.2f} GB, ingested tiles {r['tiles_bytes'] / 1e9:.2f} GB, "
              f"everything after the runs {r['all_bytes'] / 1e9:.2f} GB "
              f"({r['all_bytes'] / n_all:.0f} bytes per row of both catalogues)"),
             f"mock sky written in {r['write_s']:.1f} s (not a measurement of selector)", ""]
    head = (f"{'':30}{'wall s':>9}{'CPU s':>9}{'peak MiB':>10}{'rows/s/core':>13}{'rows/CPU s':>12}"
            "    reference: ratio")
    lines += [head, "-" * (len(head) + 20)]

    def row(label, m, rows, workers, ref=""):
        lines.append(f"{label:30}{m['wall_s']:>9.1f}{m['cpu_s']:>9.1f}{m['tree_peak_mib']:>10.0f}"
                     f"{rows / m['wall_s'] / workers:>13,.0f}{rows / m['cpu_s']:>12,.0f}    {ref}")

    row("ingest, whole sky", ing, n_all, 1,
        f"one patch: {ing['wall_s'] / patch['wall_s']:.2f}× its wall, {ing['cpu_s'] / patch['cpu_s']:.2f}× its CPU"
        if patch else "")
    if patch:
        row("ingest, one patch", patch, r["patch_counts"]["astrometric"] + r["patch_counts"]["infrared"], 1)
    row("run, 1 worker", run1, n, 1)
    row("run, 2 workers", run2, n, 2, f"1 worker: {run1['wall_s'] / run2['wall_s']:.2f}× as fast")
    base = r["baseline"]
    lines.append(f"{'baseline: import selector':30}{base['wall_s']:>9.1f}{base['cpu_s']:>9.1f}"
                 f"{base['tree_peak_mib']:>10.0f}{'':25}    the floor of every process above")
    lines.append(f"{'CPU reference, 1 job':30}{cpu['one_s']:>9.1f}{cpu['one_cpu_s']:>9.1f}")
    lines.append(f"{'CPU reference, 2 jobs at once':30}{cpu['pair_s']:>9.1f}{cpu['pair_cpu_s']:>9.1f}"
                 f"{'':35}    1 job: {cpu['speedup']:.2f}× the work per second")
    lines.append("(rows: astrometric + infrared for the ingest, astrometric for the run; CPU s: the whole process "
                 "tree)")
    lines.append("")

    def share(m, workers):
        if m.get("tile_s_total") is None:
            return None
        return (m["wall_s"] - m["tile_s_total"] / workers) / m["wall_s"]

    ref = cpu["speedup"]
    wall_speedup = run1["wall_s"] / run2["wall_s"]
    work1, work2 = run1.get("tile_work_span_s"), run2.get("tile_work_span_s")
    work_speedup = work1 / work2 if work1 and work2 else None
    w = 46
    lines.append(f"{'':{w}}{'run':>10}{'reference':>11}{'ratio':>8}")
    lines.append(f"{'speed-up 1 → 2 workers, wall':{w}}{wall_speedup:>10.2f}{ref:>11.2f}{wall_speedup / ref:>8.2f}")
    lines.append(f"{'speed-up 1 → 2 workers, tile-work span':{w}}{_fmt(work_speedup, '.2f'):>10}{ref:>11.2f}"
                 f"{_fmt(work_speedup and work_speedup / ref, '.2f'):>8}")
    for label, m, workers in (("1 worker", run1, 1), ("2 workers", run2, 2)):
        lines.append(f"{'serial share, ' + label:{w}}{_fmt(share(m, workers), '.1%'):>10}"
                     f"    wall {m['wall_s']:.1f} s, Σ tile {_fmt(m.get('tile_s_total'), '.1f')} s, tile-work span "
                     f"{_fmt(m.get('tile_work_span_s'), '.1f')} s, slowest tile {_fmt(m.get('tile_s_max'), '.2f')} s")
    lines.append(f"{'peak RSS of one worker, 2 workers [MiB]':{w}}{run2['worker_peak_mib']:>10.0f}"
                 f"    ({run2.get('workers_seen', 0)} workers; run process {run2['parent_peak_mib']:.0f}, tree "
                 f"{run2['tree_peak_mib']:.0f}, baseline {r['baseline']['tree_peak_mib']:.0f})")
    lines.append(f"{'peak RSS, 1 worker (in the run process) [MiB]':{w}}{run1['worker_peak_mib']:>10.0f}"
                 f"    ingest {ing['tree_peak_mib']:.0f}")
    for label, m in (("1 worker", run1), ("2 workers", run2)):
        if m.get("read_s") is not None:
            total = m["tile_s_total"] or 1.0
            lines.append(f"{'tile time by stage, ' + label:{w}}{'':>10}    read {m['read_s'] / total:.0%}, match "
                         f"{m['match_s'] / total:.0%}, select {m['select_s'] / total:.0%}, write "
                         f"{m['write_s'] / total:.0%} of {total:.1f} s; plan {m['plan_s']:.1f} s, merge "
                         f"{m['merge_s']:.2f} s ({m['candidates'] / max(m['merge_s'], 1e-9):,.0f} candidates/s)")
    lines.append("")
    ingest_per_row = ing["wall_s"] / n
    run_per_row = run2["wall_s"] / n
    t_ing, t_run = TARGET_ROWS * ingest_per_row, TARGET_ROWS * run_per_row
    lines.append(f"extrapolated to {TARGET_ROWS:.1e} astrometric rows (+{IR_PER_ASTRO:g}× infrared) on two cores, "
                 "from this run's per-row rates:")
    lines.append(f"  ingest (one process) {t_ing / 3600:7.2f} h   ({ingest_per_row * 1e6:.2f} µs per astrometric row)")
    lines.append(f"  run, 2 workers       {t_run / 3600:7.2f} h   ({run_per_row * 1e6:.2f} µs per astrometric row)")
    lines.append(f"  together             {(t_ing + t_run) / 3600:7.2f} h")
    c_ing, c_run = TARGET_ROWS * ing["cpu_s"] / n, TARGET_ROWS * run2["cpu_s"] / n / 2
    lines.append(f"  from CPU time instead (two idle cores, the run's work split evenly): ingest {c_ing / 3600:.2f} h "
                 f"+ run {c_run / 3600:.2f} h = {(c_ing + c_run) / 3600:.2f} h")
    if not run1.get("ok", True) or not run2.get("ok", True):
        lines.append("WARNING: a run reported failed tiles; see run-*.log in the work folder (--keep)")
    if run1.get("tile_s_total") is None or run1.get("tile_work_span_s") is None:
        lines.append("note: the tile times could not be read from `selector status` or the run summary; "
                     "their wording changed, so the serial share is not shown")
    return "\n".join(lines)


def main(argv=None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=_count, default=100_000_000, help="astrometric rows (default 1e8)")
    p.add_argument("--order", type=int, default=None, help="tiling.order (default: 5 at 1e8 rows, lower below)")
    p.add_argument("--work", type=Path, default=None, help="work folder (default: a new folder under /tmp)")
    p.add_argument("--keep", action="store_true", help="keep the work folder and its catalogues, tiles and logs")
    p.add_argument("--chunk-rows", type=_count, default=2_000_000, help="rows generated and written at a time")
    p.add_argument("--part-rows", type=_count, default=10_000_000, help="astrometric rows per Parquet part file")
    p.add_argument("--patch-deg2", type=float, default=400.0, help="area of the one-patch reference")
    p.add_argument("--no-patch", action="store_true", help="skip the one-patch ingest reference")
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--child", choices=("write", "run", "cpu"), help=argparse.SUPPRESS)
    p.add_argument("--config", help=argparse.SUPPRESS)
    p.add_argument("--folder", help=argparse.SUPPRESS)
    p.add_argument("--sky", choices=("all", "patch"), help=argparse.SUPPRESS)
    p.add_argument("--workers", type=int, default=1, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.order is None:
        args.order = default_order(args.rows)
    if args.child == "write":
        return child_write(args)
    if args.child == "run":
        return child_run(args.config, args.workers)
    if args.child == "cpu":
        return cpu_workload()

    if args.work is None:
        work = Path(tempfile.mkdtemp(prefix="selector-allsky-", dir="/tmp"))
    else:
        work = args.work.resolve()
        if work.exists() and any(work.iterdir()):
            raise SystemExit(f"{work}: the work folder already holds files; give an empty or new folder")
        work.mkdir(parents=True, exist_ok=True)
    try:
        check_disk(work, args.rows)
        _note(f"work folder {work}; order {args.order}; about {disk_needed(args.rows) / 1e9:.1f} GB of disk at most")
        results = measure(args, work, _note)
        if args.keep:
            (work / "results.json").write_text(json.dumps({"order": args.order, **results}, indent=1))
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)
    print(report(results, args.order))


if __name__ == "__main__":
    main()
