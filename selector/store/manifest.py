"""The run manifest: an embedded SQLite database beside the outputs of ``selector run``.

It is the one record of what has been done: every run (config hashes, software version, start,
end, status, what it did) and, for every tile, the keys of the inputs and settings its outputs
were made from, its row counts, duration and the error of its last failure. A tile counts as
finished only when its row here says so; its files are written first, so a run killed at any
moment leaves either a finished tile (files and row) or one that the next run simply redoes.

Only the process that holds the run lock writes here (workers return their results to it), so a
tile's record is a single short transaction. Times are kept here and in the log files only, never
in result files.
"""

from __future__ import annotations

import json
import os
import sqlite3
from pathlib import Path

from selector.errors import SelectorError
from selector.store.db import Database, connect, transaction, utc_now

#: Bumped when the tables change shape; an older manifest is rebuilt (its tiles are then redone).
SCHEMA_VERSION = 1

#: Tile states: ``done`` (outputs match the recorded keys), ``failed``, ``pending`` (to be worked).
TILE_STATES = ("done", "failed", "pending")
#: What a run did to a tile (``tile_events.action``).
ACTIONS = ("computed", "reselected", "verified", "failed")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS runs (
    run_id INTEGER PRIMARY KEY,
    started_utc TEXT NOT NULL,
    ended_utc TEXT,
    status TEXT NOT NULL,
    pid INTEGER,
    host TEXT,
    version TEXT,
    config_hash TEXT,
    match_hash TEXT,
    selection_hash TEXT,
    executor TEXT,
    workers INTEGER,
    tiles INTEGER,
    computed INTEGER DEFAULT 0,
    reselected INTEGER DEFAULT 0,
    verified INTEGER DEFAULT 0,
    reused INTEGER DEFAULT 0,
    failed INTEGER DEFAULT 0,
    rows INTEGER,
    candidates INTEGER,
    merged INTEGER DEFAULT 0,
    work_s REAL,
    log_file TEXT,
    message TEXT
);
CREATE TABLE IF NOT EXISTS tiles (
    tile INTEGER PRIMARY KEY,
    status TEXT NOT NULL,
    match_key TEXT,
    selection_key TEXT,
    inputs TEXT,
    inputs_key TEXT,
    content_key TEXT,
    outputs TEXT,
    rows INTEGER,
    rejects INTEGER,
    candidates INTEGER,
    cutflow TEXT,
    duration_s REAL,
    error TEXT,
    run_id INTEGER,
    updated_utc TEXT
);
CREATE TABLE IF NOT EXISTS tile_events (
    run_id INTEGER NOT NULL,
    tile INTEGER NOT NULL,
    action TEXT NOT NULL,
    duration_s REAL,
    rows INTEGER,
    error TEXT
);
CREATE INDEX IF NOT EXISTS tile_events_run ON tile_events (run_id);
CREATE TABLE IF NOT EXISTS files (
    path TEXT PRIMARY KEY,
    size INTEGER NOT NULL,
    mtime_ns INTEGER NOT NULL,
    sha256 TEXT NOT NULL
);
"""

_TILE_JSON = ("inputs", "outputs", "cutflow")


class Manifest(Database):
    """Read and write the run manifest at ``path``.

    Parameters
    ----------
    path : pathlib.Path
        The SQLite file (created with its tables when missing).
    readonly : bool
        Open for reading only (``selector status``); never creates the file.
    """

    def __init__(self, path: Path, readonly: bool = False):
        self.path = Path(path)
        try:
            if readonly:
                if not self.path.exists():
                    raise SelectorError(f"{self.path}: no run manifest here")
                self.db = connect(self.path, readonly=True)
                self.db.execute("SELECT COUNT(*) FROM runs").fetchone()
            else:
                # WAL: a reader (`selector status`) never blocks the run; FULL: a recorded tile
                # survives power loss, not only a killed process (both set by `connect`)
                self.db = connect(self.path, schema=_SCHEMA)
                self._create()
        except sqlite3.DatabaseError as exc:
            raise SelectorError(f"{self.path}: cannot open the run manifest ({exc}); move it away to start afresh "
                                "(every tile is then recomputed)") from None
        self.db.row_factory = sqlite3.Row

    def _create(self) -> None:
        with transaction(self.db):
            row = self.db.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
            if row is None:
                self.db.execute("INSERT INTO meta VALUES ('schema_version', ?)", (str(SCHEMA_VERSION),))
            elif int(row[0]) > SCHEMA_VERSION:
                raise SelectorError(f"{self.path}: written by a newer selector (manifest version {row[0]}); "
                                    "upgrade selector or use another project.output_dir")
            elif int(row[0]) < SCHEMA_VERSION:
                # an older layout: forget the tiles (they are recomputed), keep the run history
                self.db.execute("DELETE FROM tiles")
                self.db.execute("DELETE FROM files")
                self.db.execute("UPDATE meta SET value = ? WHERE key = 'schema_version'", (str(SCHEMA_VERSION),))

    # --- runs ------------------------------------------------------------------------------
    def begin_run(self, **fields) -> int:
        """Insert a run with status ``running``; returns its id (1, 2, ...)."""
        fields = {"started_utc": utc_now(), "status": "running", **fields}
        names = ", ".join(fields)
        marks = ", ".join("?" for _ in fields)
        with transaction(self.db):
            cur = self.db.execute(f"INSERT INTO runs ({names}) VALUES ({marks})", tuple(fields.values()))
        return int(cur.lastrowid)

    def update_run(self, run_id: int, **fields) -> None:
        sets = ", ".join(f"{k} = ?" for k in fields)
        with transaction(self.db):
            self.db.execute(f"UPDATE runs SET {sets} WHERE run_id = ?", (*fields.values(), run_id))

    def end_run(self, run_id: int, status: str, **fields) -> None:
        self.update_run(run_id, status=status, ended_utc=utc_now(), **fields)

    def mark_dead_runs(self) -> list[int]:
        """Runs still marked ``running`` while we hold the lock were killed; say so. Returns their ids."""
        ids = [r[0] for r in self.db.execute("SELECT run_id FROM runs WHERE status = 'running'")]
        if ids:
            with transaction(self.db):
                self.db.execute("UPDATE runs SET status = 'died', message = 'stopped without finishing "
                                "(killed or power lost); resumed by a later run' WHERE status = 'running'")
        return ids

    def runs(self, limit: int | None = None) -> list[dict]:
        """Runs, newest first."""
        sql = "SELECT * FROM runs ORDER BY run_id DESC" + (f" LIMIT {int(limit)}" if limit else "")
        return [dict(r) for r in self.db.execute(sql)]

    def run(self, run_id: int) -> dict | None:
        row = self.db.execute("SELECT * FROM runs WHERE run_id = ?", (run_id,)).fetchone()
        return dict(row) if row else None

    # --- tiles -----------------------------------------------------------------------------
    def tiles(self) -> dict[int, dict]:
        """Every tile's record, by tile id, with the JSON fields decoded."""
        out = {}
        for r in self.db.execute("SELECT * FROM tiles ORDER BY tile"):
            d = dict(r)
            for k in _TILE_JSON:
                d[k] = json.loads(d[k]) if d[k] is not None else None
            out[int(d["tile"])] = d
        return out

    def plan(self, pending: list[int], remove: list[int]) -> None:
        """Before any tile is worked on: mark the tiles to be worked ``pending`` (one transaction).

        A pending tile is redone by the next run whatever its files say, so a run killed while
        rewriting a tile's files never leaves a record claiming outputs it did not finish.
        """
        now = utc_now()
        with transaction(self.db):
            self.db.executemany("INSERT INTO tiles (tile, status, updated_utc) VALUES (?, 'pending', ?) "
                                "ON CONFLICT (tile) DO UPDATE SET status = 'pending', updated_utc = excluded.updated_utc",
                                [(int(t), now) for t in pending])
            self.db.executemany("DELETE FROM tiles WHERE tile = ?", [(int(t),) for t in remove])

    def record_tile(self, run_id: int, tile: int, action: str, **fields) -> None:
        """Store a worked tile (``done`` or ``failed``) and its event, in one transaction."""
        for k in _TILE_JSON:
            if k in fields and fields[k] is not None:
                fields[k] = json.dumps(fields[k], sort_keys=True, separators=(",", ":"))
        fields.update(run_id=run_id, updated_utc=utc_now())
        names = ", ".join(fields)
        sets = ", ".join(f"{k} = excluded.{k}" for k in fields)
        with transaction(self.db):
            self.db.execute(f"INSERT INTO tiles (tile, {names}) VALUES (?, {', '.join('?' for _ in fields)}) "
                            f"ON CONFLICT (tile) DO UPDATE SET {sets}", (int(tile), *fields.values()))
            self.db.execute("INSERT INTO tile_events VALUES (?, ?, ?, ?, ?, ?)",
                            (run_id, int(tile), action, fields.get("duration_s"), fields.get("rows"),
                             fields.get("error")))

    def events(self, run_id: int | None = None) -> list[dict]:
        sql, args = "SELECT * FROM tile_events", ()
        if run_id is not None:
            sql, args = sql + " WHERE run_id = ?", (run_id,)
        return [dict(r) for r in self.db.execute(sql + " ORDER BY run_id, rowid", args)]

    def actions(self, run_id: int) -> dict[str, int]:
        """What a run has done so far, by action (live while it runs)."""
        out = dict.fromkeys(ACTIONS, 0)
        for action, n in self.db.execute("SELECT action, COUNT(*) FROM tile_events WHERE run_id = ? GROUP BY action",
                                         (run_id,)):
            out[action] = n
        return out

    def counts(self) -> dict[str, int]:
        """Tiles by state."""
        out = dict.fromkeys(TILE_STATES, 0)
        for status, n in self.db.execute("SELECT status, COUNT(*) FROM tiles GROUP BY status"):
            out[status] = n
        return out

    # --- file fingerprints -----------------------------------------------------------------
    def file_cache(self) -> dict[str, tuple[int, int, str]]:
        """Last seen (size, mtime_ns, sha256) of each input file, by path relative to the tiles folder."""
        return {r[0]: (r[1], r[2], r[3]) for r in self.db.execute("SELECT path, size, mtime_ns, sha256 FROM files")}

    def store_files(self, rows: list[tuple[str, int, int, str]], remove: list[str] = ()) -> None:
        with transaction(self.db):
            self.db.executemany("INSERT OR REPLACE INTO files VALUES (?, ?, ?, ?)", rows)
            self.db.executemany("DELETE FROM files WHERE path = ?", [(p,) for p in remove])

    # --- small state ------------------------------------------------------------------------
    def get(self, key: str):
        row = self.db.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        return json.loads(row[0]) if row else None

    def set(self, key: str, value) -> None:
        with transaction(self.db):
            self.db.execute("INSERT OR REPLACE INTO meta VALUES (?, ?)", (key, json.dumps(value, sort_keys=True)))


def pid_alive(pid: int | None) -> bool:
    """Whether a process with this id exists on this machine."""
    if not pid:
        return False
    try:
        os.kill(int(pid), 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True
