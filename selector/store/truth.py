"""The truth-label reader: labels of known sources, aligned with the rows of a feature cache.

Used by the tuning loop (and the demo, whose mock sky writes its truth beside its configuration) to
score a selection's completeness and purity with :mod:`selector.core.metrics`.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from selector.core.truth import QUASAR_POPULATIONS
from selector.errors import InputError
from selector.settings.validate import suggest
from selector.store.cache import FeatureCache, find_rows
from selector.store.io import read_table
from selector.store.layout import demo_truth

__all__ = ["TruthLabels", "find_truth", "load_truth"]

#: Label texts (lower case) that mean a quasar: the demo's populations, and a yes in a label column.
_QUASAR_TEXTS = (*QUASAR_POPULATIONS, "true", "1")


@dataclass
class TruthLabels:
    """Truth labels aligned with the rows of a feature cache.

    Attributes
    ----------
    path : Path
        Where the labels came from.
    labelled : numpy.ndarray of bool
        Cache rows that have a label.
    quasar : numpy.ndarray of bool
        Cache rows labelled as quasars.
    n_quasars : int
        Labelled quasars in the whole file (matched or not): the completeness denominator.
    """

    path: Path
    labelled: np.ndarray
    quasar: np.ndarray
    n_quasars: int


def find_truth(cfg) -> Path | None:
    """The demo's truth labels beside the configuration (:func:`selector.store.layout.demo_truth`), if present."""
    path = demo_truth(cfg)
    return path if path.exists() else None


def _is_quasar(values: pa.ChunkedArray) -> np.ndarray:
    if pa.types.is_boolean(values.type):
        return np.asarray(values.fill_null(False).to_numpy(zero_copy_only=False), bool)
    if pa.types.is_integer(values.type):
        return np.asarray(values.fill_null(0).to_numpy(zero_copy_only=False) == 1, bool)
    # text columns (every CSV column is read as text) may still say yes as "true" or "1"
    text = pc.utf8_lower(pc.cast(values, pa.string()).fill_null(""))
    return np.asarray(pc.is_in(text, value_set=pa.array(list(_QUASAR_TEXTS))).to_numpy(zero_copy_only=False), bool)


def load_truth(path: Path | str, cache: FeatureCache, id_column: str = "id") -> TruthLabels:
    """Read truth labels and align them with the cache rows.

    Parameters
    ----------
    path : path
        A Parquet, CSV, ECSV, FITS or VOTable file (read with :func:`selector.store.io.read_table`).
        It needs the id column and either ``population`` (quasar when ``quasar`` or
        ``bright_quasar``, as the demo's truth writes) or ``label`` (quasar when ``quasar``,
        ``true`` or ``1``). With a column ``catalogue`` only the ``astrometric`` rows are used.
    cache : FeatureCache
        Loaded with its ids (``astro_id``).
    id_column : str
        The column holding the astrometric source id.
    """
    path = Path(path)
    try:
        table, _ = read_table(path, what="truth file")
    except (OSError, ValueError, pa.ArrowException) as exc:
        raise InputError(f"{path}: cannot read the truth labels ({str(exc).splitlines()[0]})") from None
    names = table.column_names
    if id_column not in names:
        raise InputError(f"{path}: the truth file has no column '{id_column}' (the astrometric source id)"
                         f"{suggest(id_column, names)}")
    label = "population" if "population" in names else "label" if "label" in names else None
    if label is None:
        raise InputError(f"{path}: the truth file needs a column 'population' or 'label'")
    if "catalogue" in names:
        table = table.filter(pc.equal(pc.cast(table.column("catalogue"), pa.string()), "astrometric"))
    quasar = _is_quasar(table.column(label))
    labelled, row = find_rows(cache, table.column(id_column))
    is_q = labelled & (quasar[row] if len(quasar) else np.zeros(len(row), bool))
    return TruthLabels(path, labelled, is_q, int(quasar.sum()))
