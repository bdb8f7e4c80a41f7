"""Follow-up target lists: ``selector targets``.

``selector targets`` turns the ranked candidates of ``selector run`` into a list for an observing
proposal:

1. candidates within ``known_radius_arcsec`` of a known object, or with a recorded follow-up
   outcome, are removed (or flagged);
2. every remaining candidate is followed through each night of the date range, sampled every
   ``time_step_min`` minutes: the hours of dark time (Sun below ``sun_altitude_max_deg``) during
   which it stands above the altitude limit and, optionally, far enough from the Moon, its best
   night and its altitude at transit (:mod:`selector.core.observability`). Candidates that are
   never observable are dropped, each with its reason;
3. the observable ones get a priority class from score, brightness and observable hours;
4. the list is written in ECSV, CSV, VOTable and/or FITS, with a plain-text summary; every
   candidate's history across runs is kept in SQLite (:mod:`selector.store.history`).

Everything slow (reading, matching known objects, observability) is done before the candidate
history is opened for writing; its write transaction then holds only the history update and the
writing of the list files, so ``selector outcome`` is never kept waiting for long, and the history
is committed only once every list file is in place.
"""

from __future__ import annotations

import json
import math
from contextlib import ExitStack
from dataclasses import dataclass, field
from pathlib import Path
from typing import NamedTuple

import numpy as np
import pyarrow as pa

from selector import __version__
from selector.core import schema
from selector.core.observability import (NightGrid, Observability, earth_rotation_table_end_mjd, night_grid,
                                         observability, priority_classes, sexagesimal)
from selector.core.selection import rank_candidates
from selector.errors import ConfigError, InputError, SelectorError, describe_rows
from selector.jobs.targets.known import KnownMatch, KnownObjects, match_known, read_known
from selector.settings.config import Config, config_hash
from selector.store.history import STATUSES, CandidateRun, History, RunRecord, id_kind_of, ids_as_text, observed_ids
from selector.store.io import atomic_path, file_sha256, read_parquet
from selector.store.layout import history_file, layout_of, target_list, targets_file, targets_summary

__all__ = ["DROP_REASONS", "TargetsResult", "make_targets", "read_candidates", "unit_of"]

#: Why a candidate is not on the list, in the order the reasons are tested.
DROP_REASONS = ("known_object", "observed", "below_altitude_limit", "not_in_dark_time", "moon_too_close")
_EXTRA_UNITS = {"observable_hours": "h", "best_night_hours": "h", "dark_hours": "h"}


def unit_of(column: str) -> str | None:
    """Unit of a target-list column: the project's name suffixes, plus the hour columns."""
    return _EXTRA_UNITS.get(column) or schema.unit_of(column)


def _band_column(band: str) -> str:
    if band.startswith("opt_"):
        return schema.optical_mag_column(band[4:])
    return schema.infrared_mag_column(band)


# --- inputs ------------------------------------------------------------------------------------

# "complete"/"failed_tiles": a list made from an incomplete run (--allow-incomplete) says so
_PROVENANCE_KEYS = ("config_hash", "match_config_hash", "input_fingerprints", "selector_version", "complete",
                    "failed_tiles")


class Candidates(NamedTuple):
    """The ranked candidates of ``selector run`` (score order, rank 1..N)."""

    table: pa.Table
    provenance: dict   # the run's config hashes, input fingerprints and version
    path: Path         # the file they came from


def read_candidates(cfg: Config) -> Candidates:
    """The ranked candidates, their provenance and the file they came from, checked for what the list needs."""
    path = layout_of(cfg).candidates
    if not path.exists():
        raise SelectorError(f"{path}: not found; run `selector run --config ...` first")
    table = read_parquet(path)
    if table.num_rows == 0:
        raise SelectorError(f"{path}: holds no candidates, so there is nothing to plan")
    need = ["astro_id", "ra_deg", "dec_deg"]
    need.append("p_quasar" if "p_quasar" in table.column_names else "criteria_score")
    band_col = _band_column(cfg.targets.priority.band)
    for col in need + [band_col]:
        if col not in table.column_names:
            raise InputError(f"{path}: column '{col}' is missing; re-run `selector run` with this configuration")
    ra = table.column("ra_deg").to_numpy(zero_copy_only=False)
    dec = table.column("dec_deg").to_numpy(zero_copy_only=False)
    bad = np.flatnonzero(~np.isfinite(ra) | ~np.isfinite(dec) | (np.abs(dec) > 90))
    if bad.size:
        raise InputError(f"{path}: {describe_rows(bad)} have no valid position (ra_deg, dec_deg); re-run `selector run`")
    if "rank" in table.column_names:
        table = table.sort_by([("rank", "ascending")])
    else:
        table = rank_candidates(table)
    prov_path = layout_of(cfg).provenance
    if prov_path.exists():
        data = json.loads(prov_path.read_text())
        prov = {k: data[k] for k in _PROVENANCE_KEYS if k in data}
    else:
        meta = table.schema.metadata or {}
        if b"provenance" not in meta:
            raise InputError(f"{path}: carries no provenance and {prov_path.name} is missing beside it; "
                             "re-run `selector run`")
        prov = json.loads(meta[b"provenance"])
    return Candidates(table, prov, path)


# --- the target list -----------------------------------------------------------------------------

@dataclass
class TargetsResult:
    """What ``selector targets`` produced (tables as written, counts, file paths)."""

    targets: object            # astropy Table
    dropped: object            # astropy Table
    nights: object             # astropy Table
    counts: dict
    history_run: int
    summary: str
    outputs: dict = field(default_factory=dict)
    history_reused: bool = False   # the candidates were those of the latest recorded run


_DESCRIPTIONS = {
    "priority": "priority class (1 highest); rule in the config's [targets.priority]",
    "rank": "rank in the candidate list of `selector run` (1 = highest score)",
    "ra_hms": "right ascension (ICRS), hours:minutes:seconds",
    "dec_dms": "declination (ICRS), degrees:arcminutes:arcseconds",
    "score": "ranking score: p_quasar when a classifier is configured, else criteria_score",
    "observable_hours": "dark hours above the altitude limit (and far from the Moon) over the date range",
    "nights_observable": "nights with some observable dark time",
    "best_night": "local evening date of the night with the most observable hours",
    "best_night_hours": "observable hours in the best night",
    "transit_altitude_deg": "geometric altitude at upper culmination (refraction ignored)",
    "history_status": "status in the candidate history: new, unchanged, score_changed or observed",
    "known_name": "nearest known object within targets.known_radius_arcsec",
    "known_class": "its class",
    "known_redshift": "its redshift",
    "known_sep_arcsec": "its separation",
    "reason": "why the candidate is not on the list",
    "detail": "the reason in words",
}


def _astropy_table(columns: dict, meta: dict):
    from astropy.table import Table

    t = Table()
    for name, values in columns.items():
        if isinstance(values, (pa.Array, pa.ChunkedArray)):
            if pa.types.is_string(values.type) or pa.types.is_large_string(values.type):
                values = np.asarray(values.fill_null("").to_pylist(), dtype=str)
            else:
                values = values.to_numpy(zero_copy_only=False)
        values = np.asarray(values)
        if values.dtype == object:
            values = values.astype(str)
        if values.dtype.kind == "U" and values.size == 0:
            values = np.zeros(0, dtype="U1")
        t[name] = values
        unit = unit_of(name)
        if unit:
            t[name].unit = unit
        if name in _DESCRIPTIONS:
            t[name].description = _DESCRIPTIONS[name]
    t.meta.update(meta)
    return t



def make_targets(cfg: Config, new_only: bool = False, log=print) -> TargetsResult:
    """Build and write the follow-up target list; update the candidate history.

    Everything is read, checked and computed before anything is written. Then, in one short
    transaction of the candidate history, the run is recorded and the list files are written and
    renamed into place together; the history is committed only after that.
    """
    if cfg.targets is None:
        raise ConfigError("the configuration has no [targets] section; add one (see configs/default.toml)")
    plan = _plan(cfg)
    with History(history_file(cfg), create=True) as hist, hist.transaction():
        record = hist.record_run(plan.history_entry, tolerance=cfg.targets.score_tolerance, where=str(plan.cand.path))
        result = _build_and_write(cfg, plan, record, new_only=new_only)
    _log_result(result, log)
    return result


@dataclass
class _Plan:
    """What is read and computed before the candidate history is opened for writing."""

    cand: Candidates
    known: KnownObjects | None
    match: KnownMatch | None      # None without a known-objects catalogue
    ra: np.ndarray
    dec: np.ndarray
    score: np.ndarray
    rank: np.ndarray
    reason: np.ndarray            # drop reason so far ("" = still a target), object array
    detail: np.ndarray            # the reason in words
    todo: np.ndarray              # rows given to the observability computation
    grid: NightGrid
    obs: Observability            # of the rows ``todo``
    history_entry: CandidateRun
    earth_rotation_end_mjd: float


def _plan(cfg: Config) -> _Plan:
    """Read the candidates and known objects, match them, and compute the observability of every
    candidate that can still be listed: all of the slow work, before any lock is taken."""
    tcfg = cfg.targets
    cand = read_candidates(cfg)
    known = read_known(cfg)
    table = cand.table
    n_in = table.num_rows
    ra = table.column("ra_deg").to_numpy(zero_copy_only=False).astype(float)
    dec = table.column("dec_deg").to_numpy(zero_copy_only=False).astype(float)
    score_col = "p_quasar" if "p_quasar" in table.column_names else "criteria_score"
    score = table.column(score_col).to_numpy(zero_copy_only=False).astype(float)
    rank = table.column("rank").to_numpy()
    ids = table.column("astro_id")
    ids_text = ids_as_text(ids)

    reason = np.full(n_in, "", dtype=object)
    detail = np.full(n_in, "", dtype=object)
    match = None
    if known is not None:
        match = match_known(ra, dec, known, tcfg.known_radius_arcsec)
        if tcfg.known_action == "remove":
            reason[match.hit] = "known_object"
            detail[match.hit] = match.detail()
    todo = reason == ""
    if tcfg.known_action == "remove":
        # candidates with an outcome are dropped once the history confirms it; outcomes are only
        # ever added, so computing without them now loses nothing (checked in the transaction)
        observed = observed_ids(cfg)
        if observed:
            todo &= np.fromiter((i not in observed for i in ids_text), bool, n_in)
    todo = np.flatnonzero(todo)
    grid = night_grid(tcfg.site, tcfg.start_date, tcfg.end_date, tcfg.sun_altitude_max_deg, tcfg.time_step_min,
                      moon=tcfg.moon_separation_min_deg is not None)
    obs = observability(ra[todo], dec[todo], grid, tcfg.altitude_limit_deg, tcfg.moon_separation_min_deg)
    entry = CandidateRun(ids_text, id_kind_of(ids), score, rank, ra, dec, cand.provenance.get("config_hash"),
                         file_sha256(cand.path))
    return _Plan(cand, known, match, ra, dec, score, rank, reason, detail, todo, grid, obs, entry,
                 earth_rotation_table_end_mjd())


def _build_and_write(cfg: Config, plan: _Plan, record: RunRecord, *, new_only: bool) -> TargetsResult:
    """Assemble the tables from the plan and the history's statuses, and write every file."""
    tcfg = cfg.targets
    cand, match, grid = plan.cand.table, plan.match, plan.grid
    ra, dec, score, rank, reason, detail = plan.ra, plan.dec, plan.score, plan.rank, plan.reason, plan.detail
    status, run = record.status, record.run
    n_in = cand.num_rows
    if tcfg.known_action == "remove":
        seen = (status == "observed") & (reason == "")
        reason[seen] = "observed"
        detail[seen] = "follow-up outcome recorded"
    still = reason[plan.todo] == ""
    todo = plan.todo[still]
    obs = plan.obs if still.all() else Observability(*(values[still] for values in plan.obs))
    if np.count_nonzero(reason == "") != len(todo):
        raise SelectorError(f"{history_file(cfg)}: the candidate history changed while the list was made; "
                            "run `selector targets` again")
    limit = tcfg.altitude_limit_deg
    reason[todo] = obs.reason
    transit = np.full(n_in, np.nan)
    transit[todo] = obs.transit_altitude_deg
    never = todo[obs.reason != ""]
    detail_text = {
        "below_altitude_limit": np.char.mod(f"transit altitude %.1f deg is below the limit of {limit:.1f} deg",
                                            transit[never]),
        "not_in_dark_time": f"above {limit:.1f} deg only outside dark time (Sun above "
                            f"{tcfg.sun_altitude_max_deg:g} deg) from {tcfg.start_date} to {tcfg.end_date}",
        "moon_too_close": f"within {tcfg.moon_separation_min_deg} deg of the Moon whenever dark and high enough",
    }
    for code, text in detail_text.items():
        sel = reason[never] == code
        detail[never[sel]] = text[sel] if isinstance(text, np.ndarray) else text

    listed = reason == ""
    keep_obs = obs.reason == ""
    kept = todo[keep_obs]
    mag = cand.column(_band_column(tcfg.priority.band)).to_numpy(zero_copy_only=False).astype(float)
    prio = priority_classes(score[kept], rank[kept], mag[kept], obs.steps[keep_obs], step_min=tcfg.time_step_min,
                            priority=tcfg.priority)
    not_new = np.zeros(len(kept), bool)
    if new_only:
        not_new = status[kept] != "new"
    # listed order: priority class, then score, then rank
    order = np.lexsort((rank[kept], -score[kept], prio))
    order = order[~not_new[order]]
    rows = kept[order]
    best = obs.best_night[keep_obs][order]
    ra_hms, dec_dms = sexagesimal(ra[rows], dec[rows])
    cols = {
        "priority": prio[order].astype(np.int64), "rank": rank[rows], "astro_id": cand.column("astro_id").take(rows),
        "ra_deg": ra[rows], "dec_deg": dec[rows], "ra_hms": ra_hms, "dec_dms": dec_dms, "score": score[rows],
        "observable_hours": obs.hours[keep_obs][order], "nights_observable": obs.nights_observable[keep_obs][order],
        "best_night": np.asarray(grid.nights, dtype=str)[best] if len(best) else np.zeros(0, "U10"),
        "best_night_hours": obs.best_night_hours[keep_obs][order], "transit_altitude_deg": transit[rows],
        "history_status": status[rows],
    }
    if match is not None and tcfg.known_action == "flag":
        cols.update(match.columns(rows))
    for name in cand.column_names:
        if name not in cols:
            cols[name] = cand.column(name).take(rows)

    counts = {"candidates": n_in, "listed": len(rows), "not_new": int(not_new.sum()),
              "dropped": {code: int((reason == code).sum()) for code in DROP_REASONS},
              "priority": {str(c): int((prio[order] == c).sum()) for c in (1, 2, 3)},
              "observable_hours": float(np.sum(cols["observable_hours"])),
              "known_flagged": int((match.known_name[rows] != "").sum()) if match is not None else 0}
    if counts["listed"] + counts["not_new"] + sum(counts["dropped"].values()) != n_in:
        raise SelectorError("internal error: target accounting does not add up; nothing was written, please report this")

    prov = _provenance(cfg, plan, run)
    meta = {"description": "follow-up targets; statistical candidates, spectroscopic confirmation needed",
            "selector_provenance": prov}
    targets = _astropy_table(cols, meta)
    gone = np.flatnonzero(~listed)
    gone = gone[np.argsort(rank[gone], kind="stable")]
    dropped_cols = {"rank": rank[gone], "astro_id": cand.column("astro_id").take(gone), "ra_deg": ra[gone],
                    "dec_deg": dec[gone], "score": score[gone], "reason": reason[gone].astype(str),
                    "detail": detail[gone].astype(str), "transit_altitude_deg": transit[gone]}
    if match is not None:
        dropped_cols.update(match.columns(gone))
    dropped = _astropy_table(dropped_cols, {"description": "candidates not on the target list, with the reason",
                                            "selector_provenance": prov})
    nights = _nights_table(grid, prov)
    known = plan.known
    summary = _summary(cfg, grid, counts, history=record, new_only=new_only, known=known)

    outputs = {fmt: target_list(cfg, fmt, new_only=new_only) for fmt in tcfg.formats}
    outputs.update({"dropped": targets_file(cfg, "dropped"), "nights": targets_file(cfg, "nights"),
                    "summary": targets_summary(cfg, new_only=new_only), "provenance": targets_file(cfg, "provenance")})
    if known is not None and known.rejects is not None:
        outputs["known_rejects"] = targets_file(cfg, "known_rejects")
    with ExitStack() as stack:
        tmp = {k: stack.enter_context(atomic_path(p)) for k, p in outputs.items()}
        for fmt in tcfg.formats:
            _write(targets, tmp[fmt], fmt, prov)
        _write(dropped, tmp["dropped"], "ecsv", prov)
        _write(nights, tmp["nights"], "ecsv", prov)
        if "known_rejects" in tmp:
            rejects = {name: known.rejects.column(name) for name in known.rejects.column_names}
            _write(_astropy_table(rejects, {"description": "rows of the known-objects files that were refused"}),
                   tmp["known_rejects"], "ecsv", prov)
        tmp["summary"].write_text(summary, encoding="utf-8")
        tmp["provenance"].write_text(json.dumps(prov, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    return TargetsResult(targets, dropped, nights, counts, run, summary, outputs, history_reused=record.reused)


def _provenance(cfg: Config, plan: _Plan, run: int) -> dict:
    import astropy

    tcfg = cfg.targets
    cand, known, grid = plan.cand, plan.known, plan.grid
    return {
        "candidates": {**cand.provenance, "file": cand.path.name, "sha256": plan.history_entry.sha256},
        "known_objects": None if known is None else {"files": known.source, "fingerprint": known.fingerprint},
        "targets_config_hash": config_hash(cfg, ("targets",)),
        "history_run": run,
        "site": {"name": tcfg.site.name, "latitude_deg": tcfg.site.latitude_deg,
                 "longitude_deg": tcfg.site.longitude_deg, "height_m": tcfg.site.height_m},
        "nights": {"first": grid.nights[0], "last": grid.nights[-1], "count": len(grid.nights)},
        "method": "geometric altitude from the hour angle (apparent sidereal time, true equator and equinox of "
                  "date); refraction ignored; Sun, Moon and sidereal time from astropy, bundled Earth-rotation data",
        "earth_rotation_table_end_mjd": plan.earth_rotation_end_mjd,
        "astropy_version": astropy.__version__,
        "selector_version": __version__,
    }


def _nights_table(grid: NightGrid, prov: dict):
    from astropy.time import Time

    def iso(mjd):
        out = np.full(len(mjd), "", dtype="U19")
        ok = np.isfinite(mjd)
        if ok.any():
            t = Time(mjd[ok], format="mjd", scale="utc")
            t.precision = 0
            out[ok] = t.isot
        return out

    return _astropy_table({"night": np.asarray(grid.nights, dtype=str), "dusk_utc": iso(grid.dusk_mjd),
                           "dawn_utc": iso(grid.dawn_mjd), "dark_hours": grid.dark_hours},
                          {"description": f"nights at {grid.site.name}: dark time with the Sun below "
                                          f"{grid.sun_altitude_max_deg:g} deg", "selector_provenance": prov})


def _write(table, tmp: Path, fmt: str, prov: dict) -> None:
    """One table in one format, at a temporary path. Provenance: ECSV in its header, FITS as a JSON
    header card, VOTable as an INFO element; CSV has no place for it (provenance.json lies beside)."""
    if fmt == "ecsv":
        table.write(tmp, format="ascii.ecsv", overwrite=True)
    elif fmt == "csv":
        plain = table.copy(copy_data=False)
        plain.meta.clear()
        plain.write(tmp, format="ascii.csv", overwrite=True)
    elif fmt == "fits":
        out = table.copy(copy_data=False)
        out.meta = {"PROVJSON": json.dumps(prov, sort_keys=True, separators=(",", ":"))}
        out.write(tmp, format="fits", overwrite=True)
    elif fmt == "votable":
        from astropy.io.votable import from_table, writeto
        from astropy.io.votable.tree import Info

        out = table.copy(copy_data=False)
        out.meta = {"description": table.meta.get("description", "")}
        vot = from_table(out)
        vot.get_first_table().infos.append(Info(name="selector_provenance",
                                                value=json.dumps(prov, sort_keys=True, separators=(",", ":"))))
        writeto(vot, str(tmp))
    else:
        raise ValueError(fmt)


_SUMMARY_LABELS = {"known_object": "known objects removed", "observed": "outcome recorded, removed",
                   "below_altitude_limit": "never above the altitude limit",
                   "not_in_dark_time": "high only outside dark time", "moon_too_close": "too close to the Moon"}


def _summary(cfg: Config, grid: NightGrid, counts: dict, *, history: RunRecord, new_only: bool,
             known: KnownObjects | None) -> str:
    """The plain-text summary: setting, where the candidates went, classes, hours, history."""
    tcfg, s, p = cfg.targets, cfg.targets.site, cfg.targets.priority
    limit = tcfg.altitude_limit_deg

    def row(label, value, note=""):
        return f"{label + ':':<36}{value:>8}" + (f"  {note}" if note else "")

    moon = (f"Moon distance >= {tcfg.moon_separation_min_deg:g} deg" if tcfg.moon_separation_min_deg is not None
            else "no Moon limit")
    lines = [
        f"Follow-up targets for {s.name} (latitude {s.latitude_deg:+.4f} deg, longitude {s.longitude_deg:+.4f} deg, "
        f"height {s.height_m:.0f} m)",
        f"Nights: evenings {grid.nights[0]} to {grid.nights[-1]} ({len(grid.nights)} nights); dark time (Sun below "
        f"{tcfg.sun_altitude_max_deg:g} deg) {grid.dark_hours.sum():.1f} h in all",
        f"Limits: altitude >= {limit:.2f} deg (airmass <= {1.0 / math.sin(math.radians(limit)):.3f}, refraction "
        f"ignored), {moon}; nights sampled every {tcfg.time_step_min} min",
        "",
        row("Candidates read", counts["candidates"]),
    ]
    for code in DROP_REASONS:
        if counts["dropped"][code] or code in ("below_altitude_limit", "not_in_dark_time"):
            lines.append(row("  " + _SUMMARY_LABELS[code], counts["dropped"][code]))
    if known is None:
        lines.append("  (no known-objects catalogue configured)")
    elif known.rejects is not None:
        refused = ", ".join(f"{k}: {v}" for k, v in known.rejected.items()) or "none"
        lines.append(f"  (known objects from {known.source}: {known.rows_in} rows, {known.table.num_rows} used; "
                     f"refused: {refused}; see known_rejects.ecsv)")
    elif tcfg.known_action == "flag":
        lines.append(row("  known objects flagged", counts["known_flagged"], "(kept on the list)"))
    if new_only:
        lines.append(row("  not new since the previous run", counts["not_new"], "(left out: --new-only)"))
    lines.append(row("Targets listed", counts["listed"]))
    band = p.band[4:] if p.band.startswith("opt_") else f"[{p.band}]"
    for c in ("1", "2"):
        fraction, mag_max, hours_min = (getattr(p, f"class{c}_{k}") for k in ("score_top_fraction", "mag_max",
                                                                              "hours_min"))
        lines.append(row(f"  priority class {c}", counts["priority"][c],
                         f"score in the top {fraction:.0%}, {band} <= {mag_max:g} mag, >= {hours_min:g} h"))
    lines.append(row("  priority class 3", counts["priority"]["3"], "every other observable target"))
    lines.append(f"Total observable hours of the listed targets: {counts['observable_hours']:.1f} h")
    lines.append("")
    lines.append(f"Candidate history after run {history.run}: "
                 + ", ".join(f"{k} {history.counts[k]}" for k in STATUSES))
    return "\n".join(lines) + "\n"


def _log_result(result: TargetsResult, log) -> None:
    c = result.counts
    dropped = ", ".join(f"{k}: {v}" for k, v in c["dropped"].items() if v)
    log(f"targets: {c['listed']} listed of {c['candidates']} candidates (class 1: {c['priority']['1']}, "
        f"2: {c['priority']['2']}, 3: {c['priority']['3']}); {sum(c['dropped'].values())} dropped"
        + (f" ({dropped})" if dropped else "")
        + (f"; {c['not_new']} not new, left out" if c["not_new"] else "")
        + f"; {c['observable_hours']:.1f} observable hours in all")
    if result.history_reused:
        log(f"candidate history: these candidates were already recorded as run {result.history_run}; "
            "statuses are those of that run")
    folder = Path(next(iter(result.outputs.values()))).parent
    log(f"written to {folder}: " + ", ".join(Path(p).name for p in result.outputs.values()))

