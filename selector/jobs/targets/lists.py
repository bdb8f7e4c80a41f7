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
3. the observable ones get a priority class from score, brightness and observable hours, and a
   short name of our own (:func:`short_names`);
4. the list is written in ECSV, CSV, VOTable and/or FITS: a compact list for the telescope
   (:data:`COMPACT_COLUMNS`), the full table beside it, and the compact list as plain fixed-width
   text (:func:`plain_text`), with a plain-text summary (hours per priority class, nights needed);
   every list and the candidates it was made from are kept in the candidate history
   (:mod:`selector.store.history`), which numbers the lists.

Positions are ICRS at the astrometric catalogue's epoch (the ``epoch_jyear`` column). They are not
moved to the observing date: every listed source passed a test that its proper motion is consistent
with zero, so moving it by its measured motion would add the motion's noise (about 0.3 mas/yr times
a decade, a few mas) and nothing else; either way the change is far below a slit or fibre.

Everything slow (reading, matching known objects, observability) is done before the candidate
history is opened for writing; its write transaction then holds only the history update and the
writing of the list files, so ``selector outcome`` is never kept waiting for long, and the history
is committed only once every list file is in place.
"""

from __future__ import annotations

import hashlib
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
from selector.core.columns import describe as describe_column
from selector.core.observability import (NightGrid, Observability, earth_rotation_table_end_mjd, night_grid,
                                         observability, priority_classes, sexagesimal)
from selector.core.photometry import vega_to_ab
from selector.core.selection import rank_candidates
from selector.errors import ConfigError, InputError, SelectorError, describe_rows
from selector.jobs.progress import Progress
from selector.jobs.targets.known import KnownMatch, KnownObjects, match_known, read_known
from selector.settings.config import Config, config_hash
from selector.store.history import (STATUSES, CandidateSet, History, ListRecord, id_kind_of, ids_as_text,
                                    observed_ids)
from selector.store.io import astropy_table, atomic_path, file_sha256, format_columns, provenance_path, read_parquet, write_table_file
from selector.store.layout import (history_file, layout_of, target_full_list, target_list, target_text_list,
                                   targets_file, targets_summary)
from selector.store.manifest import Manifest

__all__ = ["COMPACT_COLUMNS", "DROP_REASONS", "TargetsResult", "make_targets", "plain_text", "read_candidates",
           "short_names", "unit_of"]

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


# --- names of our own ---------------------------------------------------------------------------

#: Crockford's base-32 digits: 0-9 and the letters without I, L, O and U, which are misread as 1, 1,
#: 0 and V when a name is read aloud or typed at a telescope console.
BASE32_DIGITS = "0123456789ABCDEFGHJKMNPQRSTVWXYZ"
#: Hash digits in a short name: 40 bits, so two of 10,000 targets share them with probability
#: about 10⁸ / 2⁴¹ ≈ 5e-5 (the birthday bound); such a pair gets more digits.
NAME_DIGITS = 8


def _base32(digest: bytes) -> str:
    value = int.from_bytes(digest, "big")
    bits = len(digest) * 8
    return "".join(BASE32_DIGITS[(value >> (bits - 5 * (i + 1))) & 31] for i in range(bits // 5))


def short_names(ids_text, prefix: str) -> np.ndarray:
    """Short target names: ``<prefix>-<8 base-32 digits of the SHA-256 of the id>``, e.g. ``cand-7KQ2M9XA``.

    The name depends on the candidate's id alone, so a target keeps its name from list to list and
    from run to run; it carries no coordinates, so it cannot be mistaken for a catalogue
    designation. Within one list, targets whose first 8 digits coincide get as many more digits as
    it takes to tell them apart.

    Parameters
    ----------
    ids_text : sequence of str
        Candidate ids as text (:func:`selector.store.history.ids_as_text`); unique.
    prefix : str
        ``targets.name_prefix``.
    """
    codes = [_base32(hashlib.sha256(str(i).encode("utf-8")).digest()) for i in ids_text]
    digits = np.full(len(codes), NAME_DIGITS)
    while True:
        names = np.asarray([f"{prefix}-{c[:d]}" for c, d in zip(codes, digits)], dtype=str)
        if len(names) == 0:
            return np.zeros(0, dtype="U1")
        unique, inverse, counts = np.unique(names, return_inverse=True, return_counts=True)
        clash = counts[inverse] > 1
        if not clash.any():
            return names
        digits[clash] += 1


# --- the target list -----------------------------------------------------------------------------

#: Columns of the compact list, in order: what a telescope's target file needs.
COMPACT_COLUMNS = ("name", "astro_id", "ra_hms", "dec_dms", "ra_deg", "dec_deg", "frame", "epoch_jyear",
                   "opt_brightest_abmag", "opt_brightest_band", "ir_brightest_vegamag", "ir_brightest_band",
                   "priority", "best_night", "best_night_hours", "observable_hours")
#: The reference frame of every position we write.
FRAME = "ICRS"


@dataclass
class TargetsResult:
    """What ``selector targets`` produced (tables as written, counts, file paths)."""

    targets: object            # astropy Table: the full target list
    compact: object            # astropy Table: the compact list (COMPACT_COLUMNS)
    dropped: object            # astropy Table
    nights: object             # astropy Table
    counts: dict
    list_number: int           # the list's number in the candidate history
    from_run: int | None       # the run (manifest id) whose merge wrote the candidates
    summary: str
    outputs: dict = field(default_factory=dict)
    list_reused: bool = False  # same candidates and settings as the latest list: that list again


def _astropy_table(columns: dict, meta: dict):
    return astropy_table(columns, meta, lambda name: (unit_of(name), ""))


def make_targets(cfg: Config, new_only: bool = False, log=print) -> TargetsResult:
    """Build and write the follow-up target list; record it in the candidate history.

    Everything is read, checked and computed before anything is written. Then, in one short
    transaction of the candidate history, the list is recorded and the list files are written and
    renamed into place together; the history is committed only after that.

    With ``new_only`` only the targets that are not in the previous list (the list recorded before
    this command; the same list when nothing changed since) are written, to ``targets_new.*``; the
    list recorded still holds every target, so the next ``new_only`` compares with all of them.
    """
    if cfg.targets is None:
        raise ConfigError("the configuration has no [targets] section; add one (see configs/default.toml)")
    plan = _plan(cfg, log)
    with History(history_file(cfg), create=True) as hist, hist.transaction():
        record = hist.record_list(plan.history_entry, tolerance=cfg.targets.score_tolerance,
                                  where=str(plan.cand.path))
        result = _build_and_write(cfg, plan, record, new_only=new_only)
        hist.mark_listed(record.number, result.listed_ids)
    _log_result(result.result, log)
    return result.result


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
    history_entry: CandidateSet
    earth_rotation_end_mjd: float


def source_run(cfg: Config) -> int | None:
    """Id of the run whose merge wrote the current candidates: the latest run of the manifest that
    merged (a run that found its merged outputs up to date left them to an earlier one); None
    without a manifest."""
    path = layout_of(cfg).manifest
    if not path.exists():
        return None
    with Manifest(path, readonly=True) as man:
        merged = [r["run_id"] for r in man.runs() if r["merged"]]
    return int(merged[0]) if merged else None


def _plan(cfg: Config, log=print) -> _Plan:
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
    obs = _observability_shown(cfg, ra[todo], dec[todo], grid, log)
    entry = CandidateSet(ids_text, id_kind_of(ids), score, rank, ra, dec, cand.provenance.get("config_hash"),
                         file_sha256(cand.path), targets_hash=config_hash(cfg, ("targets",)),
                         from_run=source_run(cfg))
    return _Plan(cand, known, match, ra, dec, score, rank, reason, detail, todo, grid, obs, entry,
                 earth_rotation_table_end_mjd())


class Brightest(NamedTuple):
    """The brightest optical and infrared magnitude of each row, with its band ("" where none)."""

    opt_abmag: np.ndarray
    opt_band: np.ndarray
    ir_vegamag: np.ndarray
    ir_band: np.ndarray


def brightest(cand: pa.Table, rows: np.ndarray, cfg: Config) -> Brightest:
    """The brightest magnitudes of the rows ``rows`` of the candidates.

    Optical: the smallest AB magnitude among the configured optical bands. Infrared: the band with
    the largest flux density, found by comparing the bands in AB (Vega + the offsets of
    :data:`selector.core.photometry.VEGA_TO_AB_MAG`), given as its Vega magnitude like every
    infrared magnitude of the project. A band missing for a row is skipped; a row with none gets NaN.
    """
    def pick(bands, column_of, to_ab):
        have = [b for b in bands if column_of(b) in cand.column_names]
        n = len(rows)
        if not have or n == 0:
            return np.full(n, np.nan), np.full(n, "", dtype="U8")
        mags = np.stack([cand.column(column_of(b)).take(rows).to_numpy(zero_copy_only=False).astype(float)
                         for b in have], axis=1)
        ab = np.stack([to_ab(mags[:, i], b) for i, b in enumerate(have)], axis=1)
        none = ~np.isfinite(ab).any(axis=1)
        best = np.argmin(np.where(np.isfinite(ab), ab, np.inf), axis=1)
        mag = np.where(none, np.nan, mags[np.arange(n), best])
        band = np.where(none, "", np.asarray(have, dtype="U8")[best])
        return mag, band

    opt_mag, opt_band = pick(cfg.optical_bands(), schema.optical_mag_column, lambda m, b: m)
    ir_mag, ir_band = pick(cfg.infrared_bands(), schema.infrared_mag_column, vega_to_ab)
    return Brightest(opt_mag, opt_band, ir_mag, ir_band)


class _Written(NamedTuple):
    result: TargetsResult
    listed_ids: list      # ids (text) of every observable target, also those left out by --new-only


def _build_and_write(cfg: Config, plan: _Plan, record: ListRecord, *, new_only: bool) -> _Written:
    """Assemble the tables from the plan and the history's statuses, and write every file."""
    tcfg = cfg.targets
    cand, match, grid = plan.cand.table, plan.match, plan.grid
    ra, dec, score, rank, reason, detail = plan.ra, plan.dec, plan.score, plan.rank, plan.reason, plan.detail
    status = record.status
    ids_text = plan.history_entry.ids
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
    physical = {key: cand.column(col).to_numpy(zero_copy_only=False).astype(float)[kept]
                for key, col in (("lbol_erg_s", "lbol_erg_s"), ("redshift", "redshift")) if col in cand.column_names}
    prio = priority_classes(score[kept], rank[kept], mag[kept], obs.steps[keep_obs], step_min=tcfg.time_step_min,
                            priority=tcfg.priority, **physical)
    # listed order: priority class, then score, then rank
    order = np.lexsort((rank[kept], -score[kept], prio))
    listed_ids = ids_text[kept[order]].tolist()
    not_new = np.zeros(len(kept), bool)
    if new_only and record.previous_listed is not None:
        previous = record.previous_listed
        not_new = np.fromiter((i in previous for i in ids_text[kept]), bool, len(kept))
    all_prio = prio[order]
    order = order[~not_new[order]]
    rows = kept[order]
    best = obs.best_night[keep_obs][order]
    ra_hms, dec_dms = sexagesimal(ra[rows], dec[rows])
    bright = brightest(cand, rows, cfg)
    cols = {
        "name": short_names(ids_text[rows], tcfg.name_prefix), "astro_id": cand.column("astro_id").take(rows),
        "ra_hms": ra_hms, "dec_dms": dec_dms, "ra_deg": ra[rows], "dec_deg": dec[rows],
        "frame": np.full(len(rows), FRAME), "epoch_jyear": np.full(len(rows), float(cfg.astrometric.epoch_jyear)),
        "opt_brightest_abmag": bright.opt_abmag, "opt_brightest_band": bright.opt_band,
        "ir_brightest_vegamag": bright.ir_vegamag, "ir_brightest_band": bright.ir_band,
        "priority": prio[order].astype(np.int64),
        "best_night": np.asarray(grid.nights, dtype=str)[best] if len(best) else np.zeros(0, "U10"),
        "best_night_hours": obs.best_night_hours[keep_obs][order],
        "observable_hours": obs.hours[keep_obs][order],
        "rank": rank[rows], "score": score[rows], "nights_observable": obs.nights_observable[keep_obs][order],
        "transit_altitude_deg": transit[rows], "history_status": status[rows],
    }
    if match is not None and tcfg.known_action == "flag":
        cols.update(match.columns(rows))
    for name in cand.column_names:
        if name not in cols:
            cols[name] = cand.column(name).take(rows)

    minutes = tcfg.exposure_min + tcfg.overhead_min
    counts = {"candidates": n_in, "listed": len(rows), "not_new": int(not_new.sum()),
              "dropped": {code: int((reason == code).sum()) for code in DROP_REASONS},
              "priority": {str(c): int((prio[order] == c).sum()) for c in (1, 2, 3)},
              "hours": {str(c): int((prio[order] == c).sum()) * minutes / 60.0 for c in (1, 2, 3)},
              "observable": len(kept), "observable_priority": {str(c): int((all_prio == c).sum()) for c in (1, 2, 3)},
              "known_flagged": int((match.known_name[rows] != "").sum()) if match is not None else 0}
    if counts["listed"] + counts["not_new"] + sum(counts["dropped"].values()) != n_in:
        raise SelectorError("internal error: target accounting does not add up; nothing was written, please report this")

    prov = _provenance(cfg, plan, record)
    caution = "statistical candidates, spectroscopic confirmation needed"
    targets = _astropy_table(cols, {"description": f"follow-up targets, every column; {caution}",
                                    "selector_provenance": prov})
    compact = targets[list(COMPACT_COLUMNS)]
    compact.meta = {"description": f"follow-up targets, compact list for the telescope; positions {FRAME} at "
                                   f"epoch J{cfg.astrometric.epoch_jyear:g}; {caution}", "selector_provenance": prov}
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
    outputs.update({f"full_{fmt}": target_full_list(cfg, fmt, new_only=new_only) for fmt in tcfg.formats})
    outputs.update({"text": target_text_list(cfg, new_only=new_only),
                    "dropped": targets_file(cfg, "dropped"), "nights": targets_file(cfg, "nights"),
                    "summary": targets_summary(cfg, new_only=new_only), "provenance": targets_file(cfg, "provenance")})
    if known is not None and known.rejects is not None:
        outputs["known_rejects"] = targets_file(cfg, "known_rejects")
    with ExitStack() as stack:
        tmp = {k: stack.enter_context(atomic_path(p)) for k, p in outputs.items()}
        for fmt in tcfg.formats:
            write_table_file(compact, tmp[fmt], fmt)
            write_table_file(targets, tmp[f"full_{fmt}"], fmt)
        tmp["text"].write_text(plain_text(compact), encoding="utf-8")
        write_table_file(dropped, tmp["dropped"], "ecsv")
        write_table_file(nights, tmp["nights"], "ecsv")
        if "known_rejects" in tmp:
            rejects = {name: known.rejects.column(name) for name in known.rejects.column_names}
            write_table_file(_astropy_table(rejects, {"description": "rows of the known-objects files that were refused",
                                                      "selector_provenance": prov}), tmp["known_rejects"], "ecsv")
        tmp["summary"].write_text(summary, encoding="utf-8")
        tmp["provenance"].write_text(json.dumps(prov, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    result = TargetsResult(targets, compact, dropped, nights, counts, record.number, record.from_run, summary, outputs,
                           list_reused=record.reused)
    return _Written(result, listed_ids)


def plain_text(compact) -> str:
    """The compact list as plain text: one ``#`` line naming the columns, then one fixed-width row per target.

    Every line starts with two characters (``# `` on the header, two spaces on the rows) so that the
    columns line up under their names; columns are separated by two spaces and padded to the widest
    value (numbers right-aligned, text left-aligned). The file reads with any whitespace splitter
    (``str.split()``, ``numpy.genfromtxt(..., dtype=str)``, ``awk``) and by eye. Floats are written at
    the precision of the other text formats; a missing value is ``-``. No value holds a space:
    names, sexagesimal coordinates, bands and dates are single words.
    """
    table = format_columns(compact)
    columns = []
    for name in table.colnames:
        values = np.asarray(table[name])
        if values.dtype.kind == "f":
            d = _decimals(name)
            text = ["-" if not math.isfinite(v) else (f"{v:.{d}f}" if d is not None else repr(v))
                    for v in values.tolist()]
        else:
            text = ["-" if str(v) == "" else str(v) for v in values.tolist()]
        width = max([len(name)] + [len(t) for t in text])
        right = values.dtype.kind in "iuf"
        columns.append(([name] + text, width, right))

    def line(i):
        return "  ".join(cells[i].rjust(w) if right else cells[i].ljust(w) for cells, w, right in columns).rstrip()

    return "\n".join(("# " if i == 0 else "  ") + line(i) for i in range(len(table) + 1)) + "\n"


def _decimals(name: str) -> int | None:
    doc = describe_column(name)
    return None if doc is None else doc.decimals


def _provenance(cfg: Config, plan: _Plan, record: ListRecord) -> dict:
    import astropy

    tcfg = cfg.targets
    cand, known, grid = plan.cand, plan.known, plan.grid
    return {
        "candidates": {**cand.provenance, "file": provenance_path(cand.path, cfg.path(".")),
                       "sha256": plan.history_entry.sha256},
        "known_objects": None if known is None else {"files": known.source, "fingerprint": known.fingerprint},
        "targets_config_hash": plan.history_entry.targets_hash,
        "list_number": record.number,
        "from_run": record.from_run,
        "site": {"name": tcfg.site.name, "latitude_deg": tcfg.site.latitude_deg,
                 "longitude_deg": tcfg.site.longitude_deg, "height_m": tcfg.site.height_m},
        "nights": {"first": grid.nights[0], "last": grid.nights[-1], "count": len(grid.nights)},
        "positions": {"frame": FRAME, "epoch_jyear": cfg.astrometric.epoch_jyear,
                      "note": "catalogue positions, not moved to the observing date (zero-motion sources)"},
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


_SUMMARY_LABELS = {"known_object": "known objects removed", "observed": "outcome recorded, removed",
                   "below_altitude_limit": "never above the altitude limit",
                   "not_in_dark_time": "high only outside dark time", "moon_too_close": "too close to the Moon"}


def nights_needed(hours: float, dark_hours: np.ndarray) -> int | None:
    """Nights it takes to observe for ``hours``: the time packed end to end into the dark hours of
    the nights in date order, so the smallest k with Σ_{i<k} dark_hours[i] ≥ hours; None when the
    nights of the range do not hold that much dark time. A lower bound: it ignores when each target
    is up (see the summary's note)."""
    if hours <= 0:
        return 0
    total = np.cumsum(np.asarray(dark_hours, float))
    k = int(np.searchsorted(total, hours * (1 - 1e-12)))
    return None if k >= len(total) else k + 1


def _summary(cfg: Config, grid: NightGrid, counts: dict, *, history: ListRecord, new_only: bool,
             known: KnownObjects | None) -> str:
    """The plain-text summary: setting, where the candidates went, classes, time and nights, history."""
    tcfg, s, p = cfg.targets, cfg.targets.site, cfg.targets.priority
    limit = tcfg.altitude_limit_deg

    def row(label, value, note=""):
        return f"{label + ':':<36}{value:>8}" + (f"  {note}" if note else "")

    moon = (f"Moon distance >= {tcfg.moon_separation_min_deg:g} deg" if tcfg.moon_separation_min_deg is not None
            else "no Moon limit")
    from_run = f"run {history.from_run}" if history.from_run is not None else "candidates with no run manifest beside them"
    lines = [
        f"Follow-up targets for {s.name} (latitude {s.latitude_deg:+.4f} deg, longitude {s.longitude_deg:+.4f} deg, "
        f"height {s.height_m:.0f} m)",
        f"List {history.number} of the candidate history, made from {from_run}",
        f"Nights: evenings {grid.nights[0]} to {grid.nights[-1]} ({len(grid.nights)} nights); dark time (Sun below "
        f"{tcfg.sun_altitude_max_deg:g} deg) {grid.dark_hours.sum():.1f} h in all",
        f"Limits: altitude >= {limit:.2f} deg (airmass <= {1.0 / math.sin(math.radians(limit)):.3f}, refraction "
        f"ignored), {moon}; nights sampled every {tcfg.time_step_min} min",
        f"Positions: {FRAME}, epoch J{cfg.astrometric.epoch_jyear:g} (the astrometric catalogue's)",
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
        previous = "the previous list" if history.previous_listed is not None else "no previous list"
        lines.append(row(f"  in {previous}", counts["not_new"], "(left out: --new-only)"))
    lines.append(row("Targets listed", counts["listed"]))
    band = p.band[4:] if p.band.startswith("opt_") else f"[{p.band}]"
    for c in ("1", "2"):
        fraction, mag_max, hours_min = (getattr(p, f"class{c}_{k}") for k in ("score_top_fraction", "mag_max",
                                                                              "hours_min"))
        lines.append(row(f"  priority class {c}", counts["priority"][c],
                         f"score in the top {fraction:.0%}, {band} <= {mag_max:g} mag, >= {hours_min:g} h"))
    lines.append(row("  priority class 3", counts["priority"]["3"], "every other observable target"))

    minutes = tcfg.exposure_min + tcfg.overhead_min
    lines += ["", f"Time on the listed targets: {tcfg.exposure_min:g} min exposure + {tcfg.overhead_min:g} min "
                  f"overhead = {minutes:g} min per target (targets.exposure_min, targets.overhead_min)",
              f"  {'':<22}{'targets':>8}{'hours':>10}{'nights needed':>16}"]
    n_cum, h_cum = 0, 0.0
    for c, label in (("1", "priority class 1"), ("2", "classes 1 and 2"), ("3", "all classes")):
        n_cum += counts["priority"][c]
        h_cum += counts["hours"][c]
        k = nights_needed(h_cum, grid.dark_hours)
        nights = str(k) if k is not None else f"more than {len(grid.nights)}"
        lines.append(f"  {label:<22}{n_cum:>8}{h_cum:>10.1f}{nights:>16}")
    lines.append(f"  (hours in class 1: {counts['hours']['1']:.1f}, class 2: {counts['hours']['2']:.1f}, class 3: "
                 f"{counts['hours']['3']:.1f})")
    lines.append("  Nights needed: those hours packed end to end, class 1 first, into the dark time of the")
    lines.append(f"  nights in date order from {grid.nights[0]}; a lower bound, since it ignores when each target is up.")
    lines.append("")
    lines.append(f"Candidate history after list {history.number}: "
                 + ", ".join(f"{k} {history.counts[k]}" for k in STATUSES))
    return "\n".join(lines) + "\n"


def _log_result(result: TargetsResult, log) -> None:
    c = result.counts
    dropped = ", ".join(f"{k}: {v}" for k, v in c["dropped"].items() if v)
    hours = sum(c["hours"].values())
    log(f"targets: {c['listed']} listed of {c['candidates']} candidates (class 1: {c['priority']['1']}, "
        f"2: {c['priority']['2']}, 3: {c['priority']['3']}); {sum(c['dropped'].values())} dropped"
        + (f" ({dropped})" if dropped else "")
        + (f"; {c['not_new']} in the previous list, left out" if c["not_new"] else "")
        + f"; {hours:.1f} h of exposure and overhead")
    origin = f"from run {result.from_run}" if result.from_run is not None else "from candidates without a run manifest"
    if result.list_reused:
        log(f"list {result.list_number} ({origin}): the same candidates and settings as the latest list, so it is "
            "that list again; statuses are those it recorded")
    else:
        log(f"list {result.list_number} recorded in the candidate history ({origin})")
    folder = Path(next(iter(result.outputs.values()))).parent
    log(f"written to {folder}: " + ", ".join(Path(p).name for p in result.outputs.values()))


#: Targets whose observability is computed at a time (each is independent of the others), so the
#: progress line moves and the (targets × dark steps) altitude array stays small.
_OBSERVABILITY_BLOCK = 2000


def _observability_shown(cfg: Config, ra: np.ndarray, dec: np.ndarray, grid: NightGrid, log=print) -> Observability:
    """:func:`~selector.core.observability.observability` of every target, in blocks, with a progress line."""
    tcfg = cfg.targets
    parts = []
    with Progress("targets: observability computed", len(ra), unit="targets",
                  interval_s=cfg.run.progress_interval_s, log=log) as shown:
        shown.update(0)
        for lo in range(0, len(ra), _OBSERVABILITY_BLOCK):
            hi = min(lo + _OBSERVABILITY_BLOCK, len(ra))
            parts.append(observability(ra[lo:hi], dec[lo:hi], grid, tcfg.altitude_limit_deg,
                                       tcfg.moon_separation_min_deg))
            shown.update(hi)
    if len(parts) == 1:
        return parts[0]
    if not parts:
        return observability(ra, dec, grid, tcfg.altitude_limit_deg, tcfg.moon_separation_min_deg)
    return Observability(*(np.concatenate(values) for values in zip(*parts)))
