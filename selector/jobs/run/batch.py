"""Transitional: the old home of :func:`selector.jobs.run.run`.

Only :mod:`selector.jobs.tune` still imports this module (``batch.run``); it is being edited on
another branch. Delete this file once it imports ``selector.jobs.run`` instead.
"""

from selector.jobs.run import RunResult, run

__all__ = ["RunResult", "run"]
