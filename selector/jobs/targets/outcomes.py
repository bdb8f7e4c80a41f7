"""Follow-up outcomes: ``selector outcome`` records spectroscopic classes and redshifts in the candidate history.

Recorded outcomes take their candidates off later target lists (as ``observed``) and become
labelled examples for the next ``selector train`` (:func:`selector.store.history.training_labels`).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from selector.errors import ConfigError, InputError, describe_rows
from selector.settings.config import Config
from selector.store.history import History, Outcomes
from selector.store.io import read_table
from selector.store.layout import history_file

__all__ = ["OUTCOME_CLASSES", "OUTCOME_COLUMNS", "read_outcomes", "record_outcomes"]

#: Spectroscopic classes accepted by ``selector outcome`` and the training label each becomes.
OUTCOME_CLASSES = {"quasar": "quasar", "qso": "quasar", "star": "star", "galaxy": "galaxy"}
#: Column names accepted in an outcome file, for each field (matched without regard to case).
OUTCOME_COLUMNS = {
    "id": ("astro_id", "candidate_id", "id"),
    "class": ("spec_class", "spectroscopic_class", "class"),
    "redshift": ("redshift", "z"),
}
_REDSHIFT_RANGE = (-0.1, 20.0)  # stars may show small negative velocities; nothing known lies beyond z ~ 15


def _pick_column(path: Path, columns: dict, role: str, required: bool) -> str | None:
    lower = {c.lower(): c for c in columns}
    for name in OUTCOME_COLUMNS[role]:
        if name in lower:
            return lower[name]
    if required:
        raise InputError(f"{path}: no {role} column; name it one of {', '.join(OUTCOME_COLUMNS[role])}")
    return None


def read_outcomes(path: Path, id_kind: str) -> Outcomes:
    """Read and check an outcome file; every problem is a one-line error naming the rows.

    Parameters
    ----------
    path : pathlib.Path
        CSV, ECSV, VOTable, FITS or Parquet, with the columns of :data:`OUTCOME_COLUMNS`.
    id_kind : str
        ``int`` when the history's candidate ids are integers, else ``text``.

    Returns
    -------
    Outcomes
        Ids as text (integers written canonically), labels, redshifts (NaN where none).
    """
    table, _ = read_table(path, what="outcome file")
    if table.num_columns == 0:
        # a file with a header and no rows (CSV, Parquet): nothing to record
        return Outcomes(np.zeros(0, dtype=object), [], np.zeros(0))
    columns = {name: table.column(name).to_pylist() for name in table.column_names}
    id_col = _pick_column(path, columns, "id", True)
    class_col = _pick_column(path, columns, "class", True)
    z_col = _pick_column(path, columns, "redshift", False)
    n = len(columns[id_col])

    def fail(rows, column, what):
        rows = np.flatnonzero(rows) + 1
        raise InputError(f"{path}: column '{column}', data {describe_rows(rows)} (1 = first row after the header): "
                         f"{what}; nothing was recorded")

    raw_ids = [None if v is None else str(v).strip() for v in columns[id_col]]
    missing = np.array([not v for v in raw_ids], bool)
    if missing.any():
        fail(missing, id_col, "no candidate id")
    if id_kind == "int":
        def as_int(text):
            try:
                return str(int(text))
            except ValueError:
                return None
        ids = [as_int(v) for v in raw_ids]
        bad = np.array([v is None for v in ids], bool)
        if bad.any():
            fail(bad, id_col, "candidate ids are integers here")
    else:
        ids = raw_ids
    ids_arr = np.asarray(ids, dtype=object)
    _, first = np.unique(ids_arr.astype(str), return_index=True)
    dup = np.ones(n, bool)
    dup[first] = False
    if dup.any():
        fail(dup, id_col, "the same candidate is given more than once")
    classes = [None if v is None else str(v).strip().lower() for v in columns[class_col]]
    bad = np.array([c not in OUTCOME_CLASSES for c in classes], bool)
    if bad.any():
        fail(bad, class_col, f"the class must be one of {', '.join(OUTCOME_CLASSES)}")
    labels = [OUTCOME_CLASSES[c] for c in classes]
    z = np.full(n, np.nan)
    if z_col is not None:
        text = pd.Series([None if v is None else str(v).strip() for v in columns[z_col]], dtype=object)
        given = text.notna().to_numpy() & (text != "").to_numpy()
        z = pd.to_numeric(text.where(given), errors="coerce").to_numpy(float)
        unparsable = given & np.isnan(z)
        lo, hi = _REDSHIFT_RANGE
        with np.errstate(invalid="ignore"):
            bad = unparsable | ~np.isnan(z) & ~((z >= lo) & (z <= hi))
        if bad.any():
            fail(bad, z_col, f"the redshift must be a number from {lo} to {hi}, or empty")
    return Outcomes(ids_arr, labels, z)


def record_outcomes(cfg: Config, path: str | Path, log=print) -> int:
    """Record follow-up outcomes from a file; every id must be a candidate of the history.

    The file (CSV, ECSV, VOTable, FITS or Parquet) holds a candidate id column (``astro_id``,
    ``candidate_id`` or ``id``), a class column (``spec_class``, ``spectroscopic_class`` or
    ``class``: quasar, qso, star or galaxy) and optionally ``redshift`` or ``z``. All rows are
    recorded in one transaction, or none. Returns the number recorded.
    """
    if cfg.targets is None:
        raise ConfigError("the configuration has no [targets] section, so there is no candidate history")
    path = Path(path)
    with History(history_file(cfg), create=False) as hist:
        outcomes = read_outcomes(path, hist.id_kind() or "text")
        ids = outcomes.ids
        known = hist.candidate_ids()
        unknown = np.array([i not in known for i in ids], bool)
        if unknown.any():
            names = ", ".join(ids[unknown][:5].tolist())
            raise InputError(f"{path}: {int(unknown.sum())} candidate ids are not in the candidate history "
                             f"(data {describe_rows(np.flatnonzero(unknown) + 1)}: {names}); nothing was recorded")
        with hist.transaction():
            hist.store_outcomes(outcomes, path.name)
    labels = outcomes.labels
    counts = {lab: labels.count(lab) for lab in sorted(set(labels))}
    log(f"recorded {len(ids)} outcomes from {path.name} ({', '.join(f'{k}: {v}' for k, v in counts.items())}) "
        f"in {history_file(cfg)}; they are labelled examples for the next `selector train`")
    return len(ids)
