"""Completeness and purity: the one definition every part of the tool uses.

A selection is scored against labels: ``completeness = selected positives / all positives`` and
``purity = selected positives / selected rows that carry a label``. Rows without a label are
neither contaminants nor quasars: they are counted apart (``unlabelled``), so a list scored
against a partial truth does not look purer or dirtier than it is (common practice).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np


class Score(NamedTuple):
    """Completeness and purity of one selection.

    Attributes
    ----------
    selected : int
        Rows in the selection.
    labelled_selected : int
        Of those, rows with a label.
    true_selected : int
        Of those, positives (for example true quasars).
    positives : int
        Labelled positives in the whole set.
    """

    selected: int
    labelled_selected: int
    true_selected: int
    positives: int

    @property
    def unlabelled(self) -> int:
        return self.selected - self.labelled_selected

    @property
    def completeness(self) -> float:
        return self.true_selected / self.positives if self.positives else float("nan")

    @property
    def purity(self) -> float:
        return self.true_selected / self.labelled_selected if self.labelled_selected else float("nan")

    def as_dict(self) -> dict:
        """Plain numbers for JSON: ``None`` where a ratio is undefined."""
        c, p = self.completeness, self.purity
        return {"completeness": None if np.isnan(c) else c, "purity": None if np.isnan(p) else p,
                "selected": self.selected}


def completeness_purity(selected, positive, labelled=None) -> Score:
    """Score a boolean selection against boolean positives (``labelled``: rows with any label; default all)."""
    selected = np.asarray(selected, bool)
    positive = np.asarray(positive, bool)
    labelled = np.ones_like(selected) if labelled is None else np.asarray(labelled, bool)
    return Score(int(selected.sum()), int((selected & labelled).sum()), int((selected & positive).sum()),
                 int((positive & labelled).sum()))
