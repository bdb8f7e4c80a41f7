"""The candidate history: every candidate ``selector targets`` has listed, run by run, and the follow-up outcomes.

One SQLite file (:func:`selector.store.layout.history_file`), opened through :mod:`selector.store.db`:

- ``runs``: one row per recorded candidate list (its config hash and SHA-256, when);
- ``candidates``: every candidate ever listed, its latest status, score and position;
- ``scores``: score, rank and status of each candidate in each run;
- ``outcomes``: spectroscopic class and redshift recorded by ``selector outcome``;
- ``meta``: whether candidate ids are integers or text (fixed by the first run).

Ids are stored as text whatever their kind, so one schema serves both; :func:`read_history` and
:func:`training_labels` give them back with their kind.
"""

from __future__ import annotations

import sqlite3
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator, NamedTuple

import numpy as np
import pandas as pd
import pyarrow as pa

from selector.errors import InputError, SelectorError
from selector.settings.config import Config
from selector.store.db import connect, transaction, utc_now
from selector.store.layout import history_file

__all__ = [
    "STATUSES",
    "CandidateRun",
    "History",
    "Outcomes",
    "RunRecord",
    "id_kind_of",
    "ids_as_text",
    "observed_ids",
    "read_history",
    "score_history",
    "training_labels",
]

#: Candidate status in the history, after each run.
STATUSES = ("new", "unchanged", "score_changed", "dropped", "observed")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS runs (
    run INTEGER PRIMARY KEY, candidates_config_hash TEXT, candidates_sha256 TEXT NOT NULL,
    n_candidates INTEGER NOT NULL, recorded_utc TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS candidates (
    candidate_id TEXT PRIMARY KEY, status TEXT NOT NULL, first_run INTEGER NOT NULL, last_run INTEGER NOT NULL,
    score REAL NOT NULL, ra_deg REAL NOT NULL, dec_deg REAL NOT NULL);
CREATE TABLE IF NOT EXISTS scores (
    run INTEGER NOT NULL, candidate_id TEXT NOT NULL, score REAL NOT NULL, rank INTEGER NOT NULL,
    status TEXT NOT NULL, PRIMARY KEY (run, candidate_id));
CREATE TABLE IF NOT EXISTS outcomes (
    candidate_id TEXT PRIMARY KEY, spec_class TEXT NOT NULL, redshift REAL, source_file TEXT NOT NULL,
    recorded_utc TEXT NOT NULL);
"""


class CandidateRun(NamedTuple):
    """One candidate list as the history records it (arrays in rank order).

    Attributes
    ----------
    ids : numpy.ndarray of object
        Candidate ids as text (:func:`ids_as_text`).
    id_kind : str
        ``int`` or ``text``: the kind of the ids in the candidates file (:func:`id_kind_of`).
    score, ra_deg, dec_deg : numpy.ndarray of float
        Ranking score and ICRS position (deg).
    rank : numpy.ndarray of int
        Rank in the candidate list (1 = highest score).
    config_hash : str or None
        Config hash from the candidates' provenance.
    sha256 : str
        SHA-256 of the candidates file.
    """

    ids: np.ndarray
    id_kind: str
    score: np.ndarray
    rank: np.ndarray
    ra_deg: np.ndarray
    dec_deg: np.ndarray
    config_hash: str | None
    sha256: str


class RunRecord(NamedTuple):
    """What recording a candidate list gave.

    Attributes
    ----------
    run : int
        The run number (1, 2, ...).
    status : numpy.ndarray of str
        Status of every candidate of the list, in its order (one of :data:`STATUSES` but ``dropped``).
    reused : bool
        The list equals the latest recorded one, so it was not recorded again; ``run`` and
        ``status`` are that run's.
    counts : dict of str to int
        Candidates of the whole history by status, after this run (every one of :data:`STATUSES`).
    """

    run: int
    status: np.ndarray
    reused: bool
    counts: dict[str, int]


class Outcomes(NamedTuple):
    """Follow-up outcomes checked and ready to record.

    Attributes
    ----------
    ids : numpy.ndarray of object
        Candidate ids as text.
    labels : list of str
        ``quasar``, ``star`` or ``galaxy``.
    redshift : numpy.ndarray of float
        NaN where none was given.
    """

    ids: np.ndarray
    labels: list
    redshift: np.ndarray


def id_kind_of(ids: pa.Array | pa.ChunkedArray) -> str:
    """``int`` for integer candidate ids, else ``text``."""
    return "int" if pa.types.is_integer(ids.type) else "text"


def ids_as_text(ids: pa.Array | pa.ChunkedArray) -> np.ndarray:
    """Candidate ids as the history stores them (object array of str)."""
    return np.asarray(ids.cast(pa.string()).to_pylist(), dtype=object)


def _kind_name(kind: str) -> str:
    return "integers" if kind == "int" else "text"


class History:
    """The candidate history in one SQLite file.

    Parameters
    ----------
    path : pathlib.Path
        The database file.
    create : bool
        Create it (with its tables) when missing; else a missing file is a one-line error.
    """

    def __init__(self, path: Path, *, create: bool):
        self.path = Path(path)
        if not create and not self.path.exists():
            raise SelectorError(f"{self.path}: no candidate history yet; run `selector targets --config ...` first")
        try:
            self.db = connect(self.path, schema=_SCHEMA)
        except sqlite3.DatabaseError as exc:
            raise InputError(f"{self.path}: not a usable candidate history ({exc})") from None

    def close(self) -> None:
        self.db.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    @contextmanager
    def transaction(self) -> Iterator[History]:
        """One write transaction (see :func:`selector.store.db.transaction`)."""
        with transaction(self.db):
            yield self

    # --- ids -----------------------------------------------------------------------------------
    def id_kind(self) -> str | None:
        """``int`` or ``text`` as fixed by the first recorded run; None before any."""
        row = self.db.execute("SELECT value FROM meta WHERE key = 'id_kind'").fetchone()
        return None if row is None else row[0]

    def _check_id_kind(self, kind: str, where: str) -> None:
        known = self.id_kind()
        if known is None:
            self.db.execute("INSERT INTO meta (key, value) VALUES ('id_kind', ?)", (kind,))
        elif known != kind:
            raise InputError(f"{where}: candidate ids are {_kind_name(kind)} but the history holds "
                             f"{_kind_name(known)}; use a new targets.history_file")

    def _typed_ids(self, text_ids: list) -> pa.Array:
        if self.id_kind() == "int":
            return pa.array([int(i) for i in text_ids], pa.int64())
        return pa.array(text_ids, pa.string())

    def candidate_ids(self) -> set[str]:
        """Every candidate id ever listed (text)."""
        return {r[0] for r in self.db.execute("SELECT candidate_id FROM candidates")}

    def observed_ids(self) -> set[str]:
        """Ids of the candidates with a recorded follow-up outcome (status ``observed``)."""
        return {r[0] for r in self.db.execute("SELECT candidate_id FROM candidates WHERE status = 'observed'")}

    # --- runs ----------------------------------------------------------------------------------
    def record_run(self, cands: CandidateRun, *, tolerance: float, where: str) -> RunRecord:
        """Record a candidate list, inside the caller's :meth:`transaction`.

        A candidate is ``new`` when not listed before (or dropped since), ``observed`` once it has an
        outcome, else ``unchanged`` or ``score_changed`` (by more than ``tolerance``); candidates of
        the history missing from this list become ``dropped``. A list whose file and provenance
        equal those of the latest recorded run is not recorded again: its statuses are returned as
        stored, so repeating ``selector targets`` is harmless. ``where`` names the candidates file
        in the error when its kind of ids differs from the history's.
        """
        ids, score = cands.ids, cands.score
        self._check_id_kind(cands.id_kind, where)
        last = self.db.execute("SELECT run, candidates_config_hash, candidates_sha256 FROM runs "
                               "ORDER BY run DESC LIMIT 1").fetchone()
        prev = self.db.execute("SELECT candidate_id, status, score FROM candidates ORDER BY candidate_id").fetchall()
        prev_ids = np.asarray([r[0] for r in prev], dtype=object)
        prev_status = np.asarray([r[1] for r in prev], dtype=object)
        prev_score = np.asarray([r[2] for r in prev], dtype=float)
        where_prev = pd.Index(prev_ids).get_indexer(ids) if len(prev_ids) else np.full(len(ids), -1)
        if last is not None and (last[1], last[2]) == (cands.config_hash, cands.sha256) and np.all(where_prev >= 0):
            return RunRecord(int(last[0]), np.asarray(prev_status[where_prev].tolist(), dtype=str), True,
                             self.counts())
        run = 1 if last is None else int(last[0]) + 1
        found = where_prev >= 0
        # index -1 (not in the history) picks the blank appended at the end
        old_status = np.append(prev_status, "")[where_prev]
        old_score = np.append(prev_score, np.nan)[where_prev]
        with np.errstate(invalid="ignore"):
            same = np.abs(score - old_score) <= tolerance
        status = np.where(~found | (old_status == "dropped"), "new",
                          np.where(old_status == "observed", "observed", np.where(same, "unchanged", "score_changed")))
        present = np.zeros(len(prev_ids), bool)
        present[where_prev[found]] = True
        gone = ~present & (prev_status != "dropped") & (prev_status != "observed")
        n = len(ids)
        self.db.execute("INSERT INTO runs (run, candidates_config_hash, candidates_sha256, n_candidates, "
                        "recorded_utc) VALUES (?, ?, ?, ?, ?)", (run, cands.config_hash, cands.sha256, n, utc_now()))
        self.db.executemany(
            "INSERT INTO candidates (candidate_id, status, first_run, last_run, score, ra_deg, dec_deg) "
            "VALUES (?, ?, ?, ?, ?, ?, ?) ON CONFLICT (candidate_id) DO UPDATE SET status = excluded.status, "
            "last_run = excluded.last_run, score = excluded.score, ra_deg = excluded.ra_deg, dec_deg = excluded.dec_deg",
            zip(ids.tolist(), status.tolist(), [run] * n, [run] * n, score.tolist(), cands.ra_deg.tolist(),
                cands.dec_deg.tolist()))
        self.db.executemany("INSERT INTO scores (run, candidate_id, score, rank, status) VALUES (?, ?, ?, ?, ?)",
                            zip([run] * n, ids.tolist(), score.tolist(), cands.rank.tolist(), status.tolist()))
        self.db.executemany("UPDATE candidates SET status = 'dropped' WHERE candidate_id = ?",
                            ((i,) for i in prev_ids[gone].tolist()))
        return RunRecord(run, np.asarray(status.tolist(), dtype=str), False, self.counts())

    def counts(self) -> dict[str, int]:
        """Candidates of the history by status (every one of :data:`STATUSES`)."""
        counts = dict.fromkeys(STATUSES, 0)
        counts.update({s: n for s, n in self.db.execute("SELECT status, COUNT(*) FROM candidates GROUP BY status")})
        return counts

    # --- outcomes ------------------------------------------------------------------------------
    def store_outcomes(self, outcomes: Outcomes, source_file: str) -> None:
        """Record outcomes (replacing earlier ones of the same candidates) and mark the candidates
        ``observed``, inside the caller's :meth:`transaction`."""
        ids = outcomes.ids.tolist()
        stamp = utc_now()
        self.db.executemany(
            "INSERT INTO outcomes (candidate_id, spec_class, redshift, source_file, recorded_utc) VALUES "
            "(?, ?, ?, ?, ?) ON CONFLICT (candidate_id) DO UPDATE SET spec_class = excluded.spec_class, "
            "redshift = excluded.redshift, source_file = excluded.source_file, recorded_utc = excluded.recorded_utc",
            zip(ids, outcomes.labels, [None if np.isnan(v) else float(v) for v in outcomes.redshift],
                [source_file] * len(ids), [stamp] * len(ids)))
        self.db.executemany("UPDATE candidates SET status = 'observed' WHERE candidate_id = ?", ((i,) for i in ids))

    # --- reading -------------------------------------------------------------------------------
    def table(self) -> pa.Table:
        """Every candidate ever listed: status, first and last run (and when), latest score, outcome."""
        rows = self.db.execute(
            "SELECT c.candidate_id, c.status, c.first_run, f.recorded_utc, c.last_run, l.recorded_utc, c.score, "
            "(SELECT COUNT(*) FROM scores s WHERE s.candidate_id = c.candidate_id), o.spec_class, o.redshift "
            "FROM candidates c JOIN runs f ON f.run = c.first_run JOIN runs l ON l.run = c.last_run "
            "LEFT JOIN outcomes o ON o.candidate_id = c.candidate_id ORDER BY c.first_run, c.candidate_id").fetchall()
        cols = list(zip(*rows)) if rows else [[]] * 10
        return pa.table({
            "astro_id": self._typed_ids(list(cols[0])), "status": pa.array(cols[1], pa.string()),
            "first_run": pa.array(cols[2], pa.int64()), "first_seen_utc": pa.array(cols[3], pa.string()),
            "last_run": pa.array(cols[4], pa.int64()), "last_seen_utc": pa.array(cols[5], pa.string()),
            "score": pa.array(cols[6], pa.float64()), "n_runs": pa.array(cols[7], pa.int64()),
            "spec_class": pa.array(cols[8], pa.string()), "redshift": pa.array(cols[9], pa.float64()),
        })

    def scores(self, candidate_id) -> list[tuple[int, float, str]]:
        """(run, score, status) of one candidate in every run that listed it, oldest first."""
        return [(int(r), float(s), str(st)) for r, s, st in self.db.execute(
            "SELECT run, score, status FROM scores WHERE candidate_id = ? ORDER BY run", (str(candidate_id),))]

    def outcome_labels(self) -> pa.Table | None:
        """Recorded outcomes as ``astro_id``, ``label``, ``redshift`` sorted by id; None when there are none."""
        rows = self.db.execute("SELECT candidate_id, spec_class, redshift FROM outcomes ORDER BY candidate_id").fetchall()
        if not rows:
            return None
        ids, labels, z = zip(*rows)
        table = pa.table({"astro_id": self._typed_ids(list(ids)), "label": pa.array(labels, pa.string()),
                          "redshift": pa.array(z, pa.float64())})
        return table.sort_by([("astro_id", "ascending")])


# --- for a configuration ---------------------------------------------------------------------------

def read_history(cfg: Config) -> pa.Table:
    """Every candidate ever listed: status, first and last run (and when), latest score, outcome."""
    with History(history_file(cfg), create=False) as h:
        return h.table()


def score_history(cfg: Config, candidate_id) -> list[tuple[int, float, str]]:
    """(run, score, status) of one candidate in every run that listed it, oldest first."""
    with History(history_file(cfg), create=False) as h:
        return h.scores(candidate_id)


def observed_ids(cfg: Config) -> set[str]:
    """Ids (text) of the candidates with a recorded outcome; empty when there is no history yet."""
    path = history_file(cfg)
    if not path.exists():
        return set()
    with History(path, create=False) as h:
        return h.observed_ids()


def training_labels(cfg: Config) -> pa.Table:
    """Recorded follow-up outcomes as labelled examples: ``astro_id``, ``label``, ``redshift``.

    ``label`` is ``quasar``, ``star`` or ``galaxy``; ``redshift`` is null where none was given. An
    empty table (int64 ids) when nothing has been recorded yet.
    """
    empty = pa.table({"astro_id": pa.array([], pa.int64()), "label": pa.array([], pa.string()),
                      "redshift": pa.array([], pa.float64())})
    if cfg.targets is None or not history_file(cfg).exists():
        return empty
    with History(history_file(cfg), create=False) as h:
        labels = h.outcome_labels()
    return empty if labels is None else labels
