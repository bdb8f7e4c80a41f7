"""The one exception type a user can cause, printed by the command as a single line."""

from __future__ import annotations


class SelectorError(Exception):
    """An error caused by input or configuration, reported without a traceback.

    The message is one line that says where (file, key, column, rows), what is wrong and, where we can
    tell, how to fix it.
    """


class ConfigError(SelectorError):
    """A configuration file that cannot be used as written."""


class InputError(SelectorError):
    """A catalogue file that cannot be read or does not hold what the configuration says."""


def describe_rows(rows, limit: int = 5) -> str:
    """Render row numbers compactly for an error message: ``rows 3, 17, 18 and 42 more``."""
    rows = [int(r) for r in rows]
    shown = ", ".join(str(r) for r in rows[:limit])
    more = len(rows) - limit
    word = "row" if len(rows) == 1 else "rows"
    return f"{word} {shown}" + (f" and {more} more" if more > 0 else "")
