"""Opening and changing the package's SQLite databases: the run manifest and the candidate history.

Both are written by one process at a time while others may read them, and both hold records whose
parts must change together. So every connection here is opened the same way:

- the WAL journal, so that a reader (``selector status``, ``selector train`` reading outcomes) never
  waits for a writer, nor a writer for a reader;
- ``synchronous = FULL``, so that a committed transaction survives a power loss, not only a killed
  process;
- a busy timeout of :data:`BUSY_TIMEOUT_S`, for the moments two writers meet;
- no implicit transactions (the ``sqlite3`` module's are switched off): what belongs together is
  written inside :func:`transaction`, which takes the write lock at its start (``BEGIN IMMEDIATE``,
  so two writers never deadlock upgrading read locks) and commits, or rolls back on any error.

Times are kept in these databases only, never in result files.
"""

from __future__ import annotations

import datetime
import sqlite3
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

__all__ = ["BUSY_TIMEOUT_S", "Database", "connect", "transaction", "utc_now"]

#: Seconds a connection waits for another one's write lock before giving up.
BUSY_TIMEOUT_S = 30.0


def utc_now() -> str:
    """The current UTC time as ISO 8601 with seconds (for the databases and logs only)."""
    return datetime.datetime.now(datetime.timezone.utc).replace(microsecond=0).isoformat()


def connect(path: Path, *, readonly: bool = False, schema: str | None = None) -> sqlite3.Connection:
    """Open an SQLite database in the package's one way (see the module's notes).

    Parameters
    ----------
    path : pathlib.Path
        The database file. Opened for writing, it is created with its folder when missing;
        opened for reading the caller checks first that it exists, with its own message.
    readonly : bool
        A plain connection for reading: no pragmas and no schema, so nothing is written (reading a
        WAL database still needs its shared-memory file beside it).
    schema : str, optional
        SQL script of ``CREATE ... IF NOT EXISTS`` statements run after opening for writing.

    Returns
    -------
    sqlite3.Connection
        In autocommit mode: change data inside :func:`transaction`.

    Raises
    ------
    sqlite3.DatabaseError
        When the file is not a usable database; callers turn it into a one-line error naming the file.
    """
    path = Path(path)
    if readonly:
        return sqlite3.connect(path, timeout=BUSY_TIMEOUT_S, isolation_level=None)
    path.parent.mkdir(parents=True, exist_ok=True)
    conn = sqlite3.connect(path, timeout=BUSY_TIMEOUT_S, isolation_level=None)
    try:
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("PRAGMA synchronous=FULL")
        if schema:
            conn.executescript(schema)
    except BaseException:
        conn.close()
        raise
    return conn


@contextmanager
def transaction(conn: sqlite3.Connection) -> Iterator[sqlite3.Connection]:
    """One write transaction: ``BEGIN IMMEDIATE`` on entry, ``COMMIT`` on success, ``ROLLBACK`` on any error."""
    conn.execute("BEGIN IMMEDIATE")
    try:
        yield conn
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    conn.execute("COMMIT")


class Database:
    """Base of the classes that own one SQLite connection in ``self.db``: closing, and ``with`` use.

    Subclasses open the connection in their ``__init__``; leaving a ``with`` block closes it.
    """

    db: sqlite3.Connection

    def close(self) -> None:
        """Close the connection."""
        self.db.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
