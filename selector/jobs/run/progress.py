"""Telling the user how a run goes: messages, a progress display, the run log, clock times."""

from __future__ import annotations

import datetime
import sys
import time
from pathlib import Path

from selector.store.manifest import utc_now


def clock(seconds: float) -> str:
    """A duration as ``m:ss``, or ``h:mm:ss`` from an hour on."""
    s = int(round(seconds))
    return f"{s // 3600}:{s % 3600 // 60:02d}:{s % 60:02d}" if s >= 3600 else f"{s // 60}:{s % 60:02d}"


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
        self.shown = False
        self.t0 = time.monotonic()
        self.last_line = float("-inf")
        self.last_draw = float("-inf")

    def _to_file(self, msg: str) -> None:
        stamp = utc_now()
        for line in str(msg).splitlines() or [""]:
            self.file.write(f"{stamp} {line}\n")

    def _clear(self) -> None:
        if self.shown:
            self.stream.write("\r\033[K")
            self.stream.flush()
            self.shown = False

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
        now = time.monotonic()
        elapsed = max(now - self.t0, 1e-9)
        rate = done / elapsed
        left = (total - done) / rate if rate > 0 else float("nan")
        line = f"tiles {done:,}/{total:,}" + (f" ({failed} failed)" if failed else "") + f" · {rows:,} rows"
        if done == 0:
            line += " · starting"
        elif done < total:
            line += f" · {rate:.1f} tiles/s · about {clock(left)} left"
        else:
            line += f" · {rate:.1f} tiles/s · {clock(elapsed)} elapsed"
        due = final or now - self.last_line >= self.interval_s
        if due:
            self._to_file(line)
            self.last_line = now
        if self.quiet:
            return
        if self.tty:
            if final or now - self.last_draw >= 0.1:
                self.stream.write("\r" + line + "\033[K" + ("\n" if final else ""))
                self.stream.flush()
                self.shown = not final
                self.last_draw = now
        elif due:
            self.stream.write(line + "\n")
            self.stream.flush()

    def close(self) -> None:
        self._clear()
        self.file.close()
