"""Follow-up targets: ``selector targets`` (the lists) and ``selector outcome`` (the outcomes).

- :mod:`~selector.jobs.targets.known`: the known-objects catalogue, read and matched;
- :mod:`~selector.jobs.targets.lists`: :func:`make_targets`, the target list and its files;
- :mod:`~selector.jobs.targets.outcomes`: :func:`record_outcomes`.

The astronomy is in :mod:`selector.core.observability`, the candidate history in
:mod:`selector.store.history`; :func:`training_labels` (recorded outcomes as labelled examples for
the classifier) is re-exported from there.
"""

from __future__ import annotations

from selector.jobs.targets.lists import TargetsResult, make_targets
from selector.jobs.targets.outcomes import record_outcomes
from selector.store.history import training_labels

__all__ = ["TargetsResult", "make_targets", "record_outcomes", "training_labels"]
