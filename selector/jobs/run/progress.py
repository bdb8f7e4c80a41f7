"""Telling the user how a run goes: messages, a progress display, the run log, clock times.

The tile line is drawn by the one progress helper of every long step (:mod:`selector.jobs.progress`).
"""

from __future__ import annotations

import datetime
import sys
from pathlib import Path

from selector.jobs.progress import Progress, clock
from selector.store.manifest import utc_now

__all__ = ["Reporter", "clock", "duration_s"]


def duration_s(start: str, end: str) -> float:
    """Seconds between two ISO 8601 times (as the manifest keeps them)."""
    return (datetime.datetime.fromisoformat(end) - datetime.datetime.fromisoformat(start)).total_seconds()


class Reporter:
    """Messages to the user, a progress display on a terminal (plain lines otherwise), the run log.

    Parameters
    ----------
    log : callable
        Where messages for the user go.
    quiet, verbose : bool
        Show only what :meth:`always` says, or also what :meth:`detail` says.
    log_path : pathlib.Path
        The run log (appended to; every message goes there, with its UTC time).
    interval_s : float
        Seconds between progress lines when the stream is not a terminal (and in the log).
    stream : file, optional
        Where the progress display goes; default standard error.
    """

    def __init__(self, log, *, quiet: bool, verbose: bool, log_path: Path, interval_s: float, stream=None):
        self.log, self.quiet, self.verbose = log, quiet, verbose
        self.stream = stream or sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.interval_s = interval_s
        log_path.parent.mkdir(parents=True, exist_ok=True)
        self.file = open(log_path, "a", encoding="utf-8", buffering=1)
        # every periodic and final tile line also goes to the run log
        self.bar = Progress("tiles", None, unit="tiles", interval_s=interval_s, stream=self.stream,
                            enabled=not quiet, on_line=self._to_file)

    def _to_file(self, msg: str) -> None:
        stamp = utc_now()
        for line in str(msg).splitlines() or [""]:
            self.file.write(f"{stamp} {line}\n")

    def _clear(self) -> None:
        self.bar.clear()

    def info(self, msg: str) -> None:
        """A message shown unless quiet."""
        self._to_file(msg)
        if not self.quiet:
            self._clear()
            self.log(msg)

    def detail(self, msg: str) -> None:
        """A message shown only when verbose."""
        self._to_file(msg)
        if self.verbose and not self.quiet:
            self._clear()
            self.log(msg)

    def always(self, msg: str) -> None:
        """A message shown even when quiet."""
        self._to_file(msg)
        self._clear()
        self.log(msg)

    def to_file(self, msg: str) -> None:
        """A message for the run log only."""
        self._to_file(msg)

    def progress(self, done: int, total: int, rows: int, failed: int, final: bool = False) -> None:
        """Tiles done of the total, rows, failures, rate and time left."""
        detail = (f" ({failed} failed)" if failed else "") + f" · {rows:,} rows"
        self.bar.update(done, total=total, detail=detail, final=final)

    def close(self) -> None:
        self._clear()
        self.file.close()
