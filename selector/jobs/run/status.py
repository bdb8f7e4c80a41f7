"""``selector status``: a plain-text view of the run manifest."""

from __future__ import annotations

import numpy as np

from selector.jobs.run.progress import clock, duration_s
from selector.settings.config import Config
from selector.store.layout import layout_of
from selector.store.manifest import Manifest, pid_alive


def status_text(cfg: Config, runs: int = 10, failed_only: bool = False) -> str:
    """A plain-text view of the manifest: recent runs, tiles by state, rows and timings, failures."""
    lay = layout_of(cfg)
    path = lay.manifest
    if not path.exists():
        return f"{lay.run_dir}: no runs yet (no {path.name}); start one with `selector run --config ...`"
    with Manifest(path, readonly=True) as man:
        recent = man.runs(runs)
        tiles_ = man.tiles()
        for r in recent:
            if r["status"] == "running":  # its totals are written at the end: count what it has done so far
                r.update(man.actions(r["run_id"]))
    lines = []
    failed = {t: r for t, r in tiles_.items() if r["status"] == "failed"}
    if not failed_only:
        lines.append(f"run folder: {lay.run_dir}")
        lines.append(f"{'run':>4}  {'started (UTC)':<25}  {'took':>8}  {'status':<11}  {'computed':>8}  {'reselect':>8}  "
                     f"{'checked':>7}  {'reused':>7}  {'failed':>6}  {'candidates':>10}")
        for r in recent:
            status = r["status"]
            if status == "running" and not pid_alive(r["pid"]):
                status = "died"
            took = clock(duration_s(r["started_utc"], r["ended_utc"])) if r["ended_utc"] else "-"
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
