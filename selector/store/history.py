"""The candidate history: every target list ``selector targets`` has made, the candidates it read, and the follow-up outcomes.

Two words, used the same way in the command's help, the README, the summary and here:

- a **run** is one ``selector run``; its id is the one in the run manifest (``selector status``);
- a **list** is one target list made by ``selector targets``, numbered 1, 2, ... in this history.
  A list records the candidates it was made from (and the id of the run whose merge wrote them),
  their statuses, and which of them it listed as observable targets. Making a list again from the
  same candidates with the same ``[targets]`` settings records nothing new: it is the same list.

One SQLite file (:func:`selector.store.layout.history_file`), opened through :mod:`selector.store.db`:

- ``lists``: one row per list (the run it came from, the candidates' config hash and SHA-256, the
  hash of ``[targets]``, how many candidates and targets, when);
- ``candidates``: every candidate ever read, its latest status, score and position;
- ``scores``: score, rank and status of each candidate in each list, and whether it was listed;
- ``outcomes``: spectroscopic class and redshift recorded by ``selector outcome``;
- ``meta``: whether candidate ids are integers or text (fixed by the first list), the schema version.

A history written before lists were named (tables ``runs``, columns ``run``) is renamed in place the
first time it is opened; its old lists count as having listed nothing, so the first
``--new-only`` after that lists every target.

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
from selector.store.db import Database, connect, transaction, utc_now
from selector.store.layout import history_file

__all__ = [
    "STATUSES",
    "CandidateSet",
    "History",
    "ListRecord",
    "Outcomes",
    "id_kind_of",
    "ids_as_text",
    "observed_ids",
    "read_history",
    "score_history",
    "training_labels",
]

#: Candidate status in the history, after each list.
STATUSES = ("new", "unchanged", "score_changed", "dropped", "observed")

#: Version of the tables' shape (meta key ``schema_version``); 1 named lists "runs".
SCHEMA_VERSION = 2

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS lists (
    list_number INTEGER PRIMARY KEY, from_run INTEGER, candidates_config_hash TEXT, candidates_sha256 TEXT NOT NULL,
    targets_config_hash TEXT, n_candidates INTEGER NOT NULL, n_listed INTEGER, recorded_utc TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS candidates (
    candidate_id TEXT PRIMARY KEY, status TEXT NOT NULL, first_list INTEGER NOT NULL, last_list INTEGER NOT NULL,
    score REAL NOT NULL, ra_deg REAL NOT NULL, dec_deg REAL NOT NULL);
CREATE TABLE IF NOT EXISTS scores (
    list_number INTEGER NOT NULL, candidate_id TEXT NOT NULL, score REAL NOT NULL, rank INTEGER NOT NULL,
    status TEXT NOT NULL, listed INTEGER NOT NULL DEFAULT 0, PRIMARY KEY (list_number, candidate_id));
CREATE TABLE IF NOT EXISTS outcomes (
    candidate_id TEXT PRIMARY KEY, spec_class TEXT NOT NULL, redshift REAL, source_file TEXT NOT NULL,
    recorded_utc TEXT NOT NULL);
"""


class CandidateSet(NamedTuple):
    """The ranked candidates a list is made from, as the history records them (arrays in rank order).

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
    targets_hash : str or None
        Hash of the ``[targets]`` settings the list is made with.
    from_run : int or None
        Id (in the run manifest) of the run whose merge wrote the candidates; None when unknown.
    """

    ids: np.ndarray
    id_kind: str
    score: np.ndarray
    rank: np.ndarray
    ra_deg: np.ndarray
    dec_deg: np.ndarray
    config_hash: str | None
    sha256: str
    targets_hash: str | None = None
    from_run: int | None = None


class ListRecord(NamedTuple):
    """What recording a list gave.

    Attributes
    ----------
    number : int
        The list number (1, 2, ...).
    status : numpy.ndarray of str
        Status of every candidate, in the candidates' order (one of :data:`STATUSES` but ``dropped``).
    reused : bool
        The list is the latest recorded one (same candidates, same ``[targets]``), so nothing new was
        recorded; ``number`` and ``status`` are that list's.
    counts : dict of str to int
        Candidates of the whole history by status, after this list (every one of :data:`STATUSES`).
    previous_listed : set of str or None
        Ids of the targets of the list recorded before this command (for a reused list: that same
        list, as it was); None when there was none. ``--new-only`` lists what is not in it.
    from_run : int or None
        The run the candidates came from, as recorded.
    """

    number: int
    status: np.ndarray
    reused: bool
    counts: dict[str, int]
    previous_listed: set | None = None
    from_run: int | None = None


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


_RENAMES_FROM_VERSION_1 = (
    "ALTER TABLE runs RENAME TO lists",
    "ALTER TABLE lists RENAME COLUMN run TO list_number",
    "ALTER TABLE lists ADD COLUMN from_run INTEGER",
    "ALTER TABLE lists ADD COLUMN targets_config_hash TEXT",
    "ALTER TABLE lists ADD COLUMN n_listed INTEGER",
    "ALTER TABLE candidates RENAME COLUMN first_run TO first_list",
    "ALTER TABLE candidates RENAME COLUMN last_run TO last_list",
    "ALTER TABLE scores RENAME COLUMN run TO list_number",
    "ALTER TABLE scores ADD COLUMN listed INTEGER NOT NULL DEFAULT 0",
)


def _upgrade(db: sqlite3.Connection) -> None:
    """Rename a history of schema version 1 (lists called runs) in place, in one transaction."""
    tables = {r[0] for r in db.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    if "runs" in tables and "lists" not in tables:
        with transaction(db):
            for statement in _RENAMES_FROM_VERSION_1:
                db.execute(statement)


class History(Database):
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
            self.db = connect(self.path)
            _upgrade(self.db)
            self.db.executescript(_SCHEMA)
            version = self.db.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
            if version is None or version[0] != str(SCHEMA_VERSION):
                with transaction(self.db):
                    self.db.execute("INSERT OR REPLACE INTO meta (key, value) VALUES ('schema_version', ?)",
                                    (str(SCHEMA_VERSION),))
        except sqlite3.DatabaseError as exc:
            raise InputError(f"{self.path}: not a usable candidate history ({exc})") from None

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

    # --- lists ---------------------------------------------------------------------------------
    def record_list(self, cands: CandidateSet, *, tolerance: float, where: str) -> ListRecord:
        """Record a new list made from ``cands``, inside the caller's :meth:`transaction`.

        A candidate is ``new`` when not read before (or dropped since), ``observed`` once it has an
        outcome, else ``unchanged`` or ``score_changed`` (by more than ``tolerance``); candidates of
        the history missing from this list become ``dropped``. A list made from the same file, with
        the same provenance and the same ``[targets]`` hash as the latest recorded list is that list:
        its statuses are returned as stored, so repeating ``selector targets`` is harmless. ``where``
        names the candidates file in the error when its kind of ids differs from the history's.
        The listed targets are recorded afterwards with :meth:`mark_listed`.
        """
        ids, score = cands.ids, cands.score
        self._check_id_kind(cands.id_kind, where)
        last = self.db.execute("SELECT list_number, candidates_config_hash, candidates_sha256, targets_config_hash, "
                               "from_run FROM lists ORDER BY list_number DESC LIMIT 1").fetchone()
        previous = None if last is None else self.listed(int(last[0]))
        prev = self.db.execute("SELECT candidate_id, status, score FROM candidates ORDER BY candidate_id").fetchall()
        prev_ids = np.asarray([r[0] for r in prev], dtype=object)
        prev_status = np.asarray([r[1] for r in prev], dtype=object)
        prev_score = np.asarray([r[2] for r in prev], dtype=float)
        where_prev = pd.Index(prev_ids).get_indexer(ids) if len(prev_ids) else np.full(len(ids), -1)
        same_input = last is not None and tuple(last[1:4]) == (cands.config_hash, cands.sha256, cands.targets_hash)
        if same_input and np.all(where_prev >= 0):
            return ListRecord(int(last[0]), np.asarray(prev_status[where_prev].tolist(), dtype=str), True,
                              self.counts(), previous, last[4])
        number = 1 if last is None else int(last[0]) + 1
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
        self.db.execute("INSERT INTO lists (list_number, from_run, candidates_config_hash, candidates_sha256, "
                        "targets_config_hash, n_candidates, recorded_utc) VALUES (?, ?, ?, ?, ?, ?, ?)",
                        (number, cands.from_run, cands.config_hash, cands.sha256, cands.targets_hash, n, utc_now()))
        self.db.executemany(
            "INSERT INTO candidates (candidate_id, status, first_list, last_list, score, ra_deg, dec_deg) "
            "VALUES (?, ?, ?, ?, ?, ?, ?) ON CONFLICT (candidate_id) DO UPDATE SET status = excluded.status, "
            "last_list = excluded.last_list, score = excluded.score, ra_deg = excluded.ra_deg, "
            "dec_deg = excluded.dec_deg",
            zip(ids.tolist(), status.tolist(), [number] * n, [number] * n, score.tolist(), cands.ra_deg.tolist(),
                cands.dec_deg.tolist()))
        self.db.executemany("INSERT INTO scores (list_number, candidate_id, score, rank, status) VALUES (?, ?, ?, ?, ?)",
                            zip([number] * n, ids.tolist(), score.tolist(), cands.rank.tolist(), status.tolist()))
        self.db.executemany("UPDATE candidates SET status = 'dropped' WHERE candidate_id = ?",
                            ((i,) for i in prev_ids[gone].tolist()))
        return ListRecord(number, np.asarray(status.tolist(), dtype=str), False, self.counts(), previous,
                          cands.from_run)

    def mark_listed(self, number: int, ids) -> None:
        """Record which candidates list ``number`` holds as targets (ids as text; every observable
        target, also when only the new ones were written), inside the caller's :meth:`transaction`."""
        self.db.execute("UPDATE scores SET listed = 0 WHERE list_number = ?", (number,))
        self.db.executemany("UPDATE scores SET listed = 1 WHERE list_number = ? AND candidate_id = ?",
                            ((number, i) for i in list(ids)))
        self.db.execute("UPDATE lists SET n_listed = ? WHERE list_number = ?", (len(list(ids)), number))

    def listed(self, number: int) -> set[str]:
        """Ids (text) of the targets list ``number`` holds."""
        return {r[0] for r in self.db.execute("SELECT candidate_id FROM scores WHERE list_number = ? AND listed = 1",
                                              (number,))}

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
        """Every candidate ever read: status, first and last list (and when), latest score, outcome."""
        rows = self.db.execute(
            "SELECT c.candidate_id, c.status, c.first_list, f.recorded_utc, c.last_list, l.recorded_utc, c.score, "
            "(SELECT COUNT(*) FROM scores s WHERE s.candidate_id = c.candidate_id), o.spec_class, o.redshift "
            "FROM candidates c JOIN lists f ON f.list_number = c.first_list "
            "JOIN lists l ON l.list_number = c.last_list "
            "LEFT JOIN outcomes o ON o.candidate_id = c.candidate_id ORDER BY c.first_list, c.candidate_id").fetchall()
        cols = list(zip(*rows)) if rows else [[]] * 10
        return pa.table({
            "astro_id": self._typed_ids(list(cols[0])), "status": pa.array(cols[1], pa.string()),
            "first_list": pa.array(cols[2], pa.int64()), "first_seen_utc": pa.array(cols[3], pa.string()),
            "last_list": pa.array(cols[4], pa.int64()), "last_seen_utc": pa.array(cols[5], pa.string()),
            "score": pa.array(cols[6], pa.float64()), "n_lists": pa.array(cols[7], pa.int64()),
            "spec_class": pa.array(cols[8], pa.string()), "redshift": pa.array(cols[9], pa.float64()),
        })

    def scores(self, candidate_id) -> list[tuple[int, float, str]]:
        """(list number, score, status) of one candidate in every list made from candidates holding it, oldest first."""
        return [(int(r), float(s), str(st)) for r, s, st in self.db.execute(
            "SELECT list_number, score, status FROM scores WHERE candidate_id = ? ORDER BY list_number",
            (str(candidate_id),))]

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
    """Every candidate ever read: status, first and last list (and when), latest score, outcome."""
    with History(history_file(cfg), create=False) as h:
        return h.table()


def score_history(cfg: Config, candidate_id) -> list[tuple[int, float, str]]:
    """(list number, score, status) of one candidate in every list made from candidates holding it, oldest first."""
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
