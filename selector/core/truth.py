"""Score a run against known truth labels: completeness and contamination of the candidate list.

Used by the demo (the mock sky writes its truth to a separate file) and by anyone holding a labelled
test field. Truth rows name a catalogue (``astrometric`` or ``infrared``), an id (as text), a
population and, for astrometric rows, the id of the true infrared counterpart.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from selector.core.metrics import Score

QUASAR_POPULATIONS = ("quasar", "bright_quasar")
#: Population name of candidates that have no row in the truth table.
NO_TRUTH = "(no truth)"


@dataclass
class TruthReport:
    """Completeness and contamination figures.

    Attributes
    ----------
    by_population : dict
        Number of candidates of each true population.
    quasars_total : int
        True quasars in the astrometric catalogue.
    quasars_above_limit : int
        True quasars brighter than every limit in ``limits``.
    recovered_above_limit : int
        Of those, how many are candidates.
    by_magnitude : list of (low, high, n_true, n_recovered)
        Recovery in bins of the magnitude named by ``magnitude_column``.
    """

    by_population: dict
    quasars_total: int
    quasars_above_limit: int
    recovered_above_limit: int
    by_magnitude: list

    @property
    def completeness_above_limit(self) -> float:
        return self.recovered_above_limit / self.quasars_above_limit if self.quasars_above_limit else float("nan")

    @property
    def score(self) -> Score:
        """The list scored with the one definition of :mod:`selector.core.metrics` (candidates without a
        truth row are counted apart, not as contaminants)."""
        total = sum(self.by_population.values())
        unknown = self.by_population.get(NO_TRUTH, 0)
        good = sum(self.by_population.get(p, 0) for p in QUASAR_POPULATIONS)
        return Score(total, total - unknown, good, self.quasars_total)

    @property
    def purity(self) -> float:
        return self.score.purity

    def as_text(self, magnitude_label: str) -> str:
        lines = ["candidates by true population:"]
        for pop, n in sorted(self.by_population.items(), key=lambda kv: -kv[1]):
            lines.append(f"  {pop:<14} {n:>8,d}")
        lines.append(f"purity (true quasars among candidates): {self.purity:.1%}")
        lines.append(f"true quasars recovered above the completeness limit: {self.recovered_above_limit:,d} of "
                     f"{self.quasars_above_limit:,d} ({self.completeness_above_limit:.1%})")
        lines.append(f"recovery of true quasars by {magnitude_label}:")
        for lo, hi, n, k in self.by_magnitude:
            frac = f"{k / n:.1%}" if n else "-"
            lines.append(f"  {lo:5.1f}–{hi:<5.1f} {k:>7,d} of {n:>7,d}  {frac:>7}")
        return "\n".join(lines)


def _text_ids(col) -> np.ndarray:
    return np.asarray(pc.cast(col, pa.string()).to_pylist(), dtype=object)


def compare(candidate_ids, truth: pa.Table, astro: pa.Table, infrared: pa.Table, limits: dict,
            *, magnitude_column: str, bins) -> TruthReport:
    """Compare candidate ids with the truth.

    Parameters
    ----------
    candidate_ids : array-like
        ``astro_id`` of every candidate.
    truth : pyarrow.Table
        Columns ``catalogue``, ``id``, ``population``, ``counterpart_id``.
    astro, infrared : pyarrow.Table
        Ingested (canonical) astrometric and infrared rows, for the magnitudes of the true quasars.
    limits : dict
        ``{canonical_column + "_max": value}``: a quasar is above the completeness limit when every
        named magnitude (astrometric or of its infrared counterpart) is at most the value.
    magnitude_column : str
        Canonical astrometric column to bin the recovery in.
    bins : sequence of float
        Bin edges of that magnitude.
    """
    cand = set(_text_ids(pa.array(candidate_ids)))
    t_astro = truth.filter(pc.equal(truth.column("catalogue"), "astrometric"))
    ids = _text_ids(t_astro.column("id"))
    pops = np.asarray(t_astro.column("population").to_pylist(), dtype=object)
    is_cand = np.array([i in cand for i in ids], bool)
    by_pop = {}
    for pop in np.unique(pops[is_cand]):
        by_pop[str(pop)] = int(np.sum(is_cand & (pops == pop)))
    unknown = len(cand) - int(is_cand.sum())
    if unknown:
        by_pop[NO_TRUTH] = unknown

    q = np.isin(pops, QUASAR_POPULATIONS)
    q_ids = ids[q]
    q_cand = is_cand[q]
    counterpart = _text_ids(t_astro.column("counterpart_id"))[q]
    a_lookup = dict(zip(_text_ids(astro.column("astro_id")), range(astro.num_rows)))
    i_lookup = dict(zip(_text_ids(infrared.column("ir_id")), range(infrared.num_rows)))
    a_rows = np.array([a_lookup.get(i, -1) for i in q_ids], np.int64)
    i_rows = np.array([i_lookup.get(c, -1) for c in counterpart], np.int64)
    above = a_rows >= 0
    for key, limit in limits.items():
        col = key.removesuffix("_max")
        if col in astro.column_names:
            values = _take(astro.column(col), a_rows)
        else:
            values = _take(infrared.column(col), i_rows)
        above &= np.nan_to_num(values, nan=np.inf) <= limit
    mags = _take(astro.column(magnitude_column), a_rows)
    rows = []
    for lo, hi in zip(bins[:-1], bins[1:]):
        inside = (mags >= lo) & (mags < hi)
        rows.append((float(lo), float(hi), int(inside.sum()), int((inside & q_cand).sum())))
    return TruthReport(by_pop, int(q.sum()), int(above.sum()), int((above & q_cand).sum()), rows)


def _take(col, rows: np.ndarray) -> np.ndarray:
    values = col.to_numpy(zero_copy_only=False).astype(float)
    out = np.full(len(rows), np.nan)
    ok = rows >= 0
    out[ok] = values[rows[ok]]
    return out
