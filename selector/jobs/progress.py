"""One progress display for every long step: ingest, run, train, tune and targets.

On a terminal it is one line on standard error that updates in place (counts, rate and time left);
anywhere else (a log file, a batch system, a pipe) it is a plain line every ``interval_s`` seconds,
with the first and the last state, so a nightly job's log shows that it is alive without being
flooded. The plain lines go where the job's other messages go (its ``log`` callable), so a caller
that silences a job silences its progress too, and a one-line error stays alone on standard error.

It lives on the jobs floor, the lowest one that does long work; the run's :class:`Reporter`
(:mod:`selector.jobs.run.progress`) draws its tile line through it.
"""

from __future__ import annotations

import sys
import threading
import time

__all__ = ["DEFAULT_INTERVAL_S", "Progress", "clock"]

#: Seconds between plain progress lines when the output is not a terminal (``run.progress_interval_s``).
DEFAULT_INTERVAL_S = 10.0
#: Seconds between redraws of the terminal line (faster than the eye needs is wasted work).
_REDRAW_S = 0.1


def clock(seconds: float) -> str:
    """A duration as ``m:ss``, or ``h:mm:ss`` from an hour on."""
    s = int(round(seconds))
    return f"{s // 3600}:{s % 3600 // 60:02d}:{s % 60:02d}" if s >= 3600 else f"{s // 60}:{s % 60:02d}"


def _rate(per_s: float) -> str:
    return f"{per_s:,.1f}" if per_s < 100 else f"{per_s:,.0f}"


class Progress:
    """A progress line for a count that grows towards a total.

    Parameters
    ----------
    label : str
        What is counted, as it reads before the count (``"ingest astrometric: rows"``, ``"tiles"``).
    unit : str
        The rate's unit (``"rows"`` gives ``… rows/s``).
    total : int, optional
        The count at the end (None when unknown: no time left is shown).
    interval_s : float
        Seconds between plain lines when the stream is not a terminal (0: a line per update).
    stream : file, optional
        Where the display goes (default: standard error at creation).
    enabled : bool
        False shows nothing (``--quiet``); :attr:`lines` are still made for a log file.
    on_line : callable, optional
        Called with every plain line (periodic and final), for example to keep it in a log file.
    log : callable, optional
        Where the plain lines are shown when ``stream`` is not a terminal (default: written to ``stream``).

    Examples
    --------
    >>> import io
    >>> out = io.StringIO()
    >>> bar = Progress("rows", 1000, unit="rows", interval_s=0, stream=out)
    >>> bar.update(500); bar.finish()
    >>> out.getvalue().splitlines()[-1].startswith("rows 1,000/1,000")
    True
    """

    def __init__(self, label: str, total: int | None = None, *, unit: str = "rows",
                 interval_s: float = DEFAULT_INTERVAL_S, stream=None, enabled: bool = True, on_line=None,
                 log=None):
        self.label, self.total, self.unit = label, total, unit
        self.log = log
        self.interval_s = float(interval_s)
        self.stream = stream if stream is not None else sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.enabled, self.on_line = enabled, on_line
        self.done, self.detail = 0, ""
        self.t0 = time.monotonic()
        self.last_line = float("-inf")
        self.last_draw = float("-inf")
        self.shown = False
        self.finished = False
        self._lock = threading.Lock()  # blocks evaluated on threads count into one display

    def line(self, final: bool = False) -> str:
        """The current state as text: count, detail, rate, time left (or elapsed at the end)."""
        elapsed = max(time.monotonic() - self.t0, 1e-9)
        count = f"{self.done:,}/{self.total:,}" if self.total is not None else f"{self.done:,}"
        text = f"{self.label} {count}{self.detail}"
        unit = self.unit
        rate = self.done / elapsed
        if final:
            return text + (f" · {_rate(rate)} {unit}/s" if self.done else "") + f" · {clock(elapsed)} elapsed"
        if self.done == 0:
            return text + " · starting"
        text += f" · {_rate(rate)} {unit}/s"
        if self.total is not None and rate > 0:
            text += f" · about {clock(max(self.total - self.done, 0) / rate)} left"
        return text

    def update(self, done: int, *, total: int | None = None, detail: str = "", final: bool = False) -> None:
        """Set the count (and optionally the total and a detail shown after the count); draw if due."""
        self.done = int(done)
        if total is not None:
            self.total = int(total)
        self.detail = detail
        now = time.monotonic()
        due = final or now - self.last_line >= self.interval_s
        text = None
        if due:
            text = self.line(final)
            self.last_line = now
            if self.on_line is not None:
                self.on_line(text)
        if not self.enabled:
            return
        if self.tty:
            if final or now - self.last_draw >= _REDRAW_S:
                self.stream.write("\r" + (text or self.line(final)) + "\033[K" + ("\n" if final else ""))
                self.stream.flush()
                self.shown = not final
                self.last_draw = now
        elif due and self.log is not None:
            self.log(text)
        elif due:
            self.stream.write(text + "\n")
            self.stream.flush()

    def add(self, n: int = 1, *, detail: str = "") -> None:
        """Count ``n`` more (safe to call from several threads)."""
        with self._lock:
            self.update(self.done + n, detail=detail)

    def clear(self) -> None:
        """Take the terminal line away (before printing a message over it); the next update redraws it."""
        if self.shown:
            self.stream.write("\r\033[K")
            self.stream.flush()
            self.shown = False

    def finish(self, *, detail: str | None = None) -> None:
        """Show the last state (elapsed time) once; later calls do nothing."""
        if self.finished:
            return
        self.finished = True
        self.update(self.done, detail=self.detail if detail is None else detail, final=True)

    def __enter__(self) -> "Progress":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.finish()
        else:
            self.clear()
