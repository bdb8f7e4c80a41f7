"""Plausibility checks after ingest and after a run: a wrong unit or magnitude system said out loud.

A configuration can be valid and still describe the data wrongly: positions in radians declared as
degrees, proper motions in mas/yr declared as arcsec/yr, AB magnitudes declared as Vega. Each of
these runs to the end and yields a plausible-looking, nearly empty list. The checks here look at
distributions that do not depend on the sky patch and name the setting to look at:

- **positions** whose whole span fits inside [0, 2π] × [−π/2, π/2] while degrees were declared
  (the data are probably radians), and the reverse: most declinations beyond ±90° after the
  conversion from a declared radian;
- **proper motions and parallaxes** of the brighter sources whose median lies far outside what
  stars show (median total proper motion of stars a few to ~10 mas/yr, median parallax ~0.5–1 mas
  for an all-sky optical astrometric catalogue: common practice), or most rows beyond the physical
  limits (a factor 1000 in the unit);
- **the infrared stellar locus**: stars have [3.4] − [4.6] ≈ 0 in Vega magnitudes (common practice;
  the Vega system is defined by a star of colour zero, and Rayleigh–Jeans tails of stars are
  nearly colourless in the mid-infrared); a median of the brightest quarter of the sources at 4.6 µm
  (mostly stars) (after a run: bright sources
  with a significant proper motion, which are stars) shifted by about the AB − Vega offset
  difference (2.699 − 3.339 = −0.64 mag, Jarrett et al. 2011, ApJ 735, 112; from memory) says a
  band's ``system`` is wrong;
- **tiles with sources in both catalogues and not one match**;
- **a run with no candidates**.

Each finding is a warning that names the setting to look at; ``--strict`` makes them an error (one
line), raised before the ingest's generation is put in force or before the run's outputs are merged,
so a strict failure leaves the previous results in force.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from selector.core import schema
from selector.core.photometry import VEGA_TO_AB_MAG
from selector.errors import SelectorError

#: Median total proper motion of the brighter sources outside this range (mas/yr) is implausible.
PM_MEDIAN_RANGE_MAS_YR = (0.05, 500.0)
#: Median |parallax| of the brighter sources outside this range (mas) is implausible.
PARALLAX_MEDIAN_RANGE_MAS = (0.01, 50.0)
#: The brightest fraction of the astrometric sample that stands for "bright stars".
BRIGHT_FRACTION = 0.25
#: |median [3.4] − [4.6]| of those beyond this (mag) is off the stellar locus; the AB–Vega
#: difference between the bands is 0.64 mag, a genuine locus scatters by about ±0.1.
LOCUS_TOLERANCE_MAG = 0.35
#: Fewest rows a distribution check needs before it says anything.
MIN_ROWS = 50
#: A proper motion this many sigma from zero is "significant" (a star) for the locus after a run.
SIGNIFICANT_PM_SIGMA = 5.0
#: Tiles with at least this many sources in each catalogue are expected to have some match.
MIN_ROWS_FOR_A_MATCH = 10
#: Rows per chunk kept for the ingest checks, and in all.
SAMPLE_PER_CHUNK = 5_000
SAMPLE_MAX = 200_000


@dataclass(frozen=True)
class Finding:
    """One implausibility: a short code and a one-line message naming the setting to look at."""

    code: str
    message: str


def sample_rows(table: pa.Table, kept: int) -> pa.Table | None:
    """A deterministic, evenly spaced sample of a chunk's accepted rows for the checks (None when full)."""
    room = SAMPLE_MAX - kept
    if room <= 0 or table.num_rows == 0:
        return None
    step = max(1, table.num_rows // SAMPLE_PER_CHUNK)
    idx = np.arange(0, table.num_rows, step)[:room]
    return table.take(pa.array(idx, pa.int64()))


def _column(table: pa.Table | None, name: str) -> np.ndarray | None:
    if table is None or name not in table.column_names:
        return None
    return table.column(name).to_numpy(zero_copy_only=False).astype(float)


def position_findings(kind: str, sample: pa.Table | None, rows_in: int, rejected: dict) -> list[Finding]:
    """Positions that look like radians declared as degrees, or degrees declared as radians."""
    out = []
    ra, dec = _column(sample, "ra_deg"), _column(sample, "dec_deg")
    if ra is not None and dec is not None and len(ra) >= MIN_ROWS:
        if np.nanmax(ra) <= 2 * np.pi + 1e-9 and np.nanmax(np.abs(dec)) <= np.pi / 2 + 1e-9 and np.ptp(ra) > 3.0:
            out.append(Finding("positions_radians", f"{kind}: every position lies within RA 0–{2 * np.pi:.2f}°, Dec "
                                                    f"±{np.pi / 2:.2f}°, the span of radians: check {kind}.columns.ra.unit "
                                                    f"and {kind}.columns.dec.unit (\"rad\" if the values are radians)"))
    bad_dec = int(rejected.get("dec_out_of_range", 0))
    if rows_in >= MIN_ROWS and bad_dec > rows_in / 2:
        out.append(Finding("positions_degrees", f"{kind}: {bad_dec:,} of {rows_in:,} rows have a declination beyond "
                                                f"±90° after conversion: check {kind}.columns.dec.unit and "
                                                f"{kind}.columns.ra.unit (\"deg\" if the values are degrees)"))
    return out


def _bright(sample: pa.Table, cfg) -> np.ndarray:
    """Mask of the brighter sources of an astrometric sample (all, without an optical magnitude)."""
    n = sample.num_rows
    bands = cfg.optical_bands()
    if not bands:
        return np.ones(n, bool)
    mag = _column(sample, schema.optical_mag_column(bands[0]))
    if mag is None or not np.isfinite(mag).any():
        return np.ones(n, bool)
    return mag <= np.nanquantile(mag, BRIGHT_FRACTION)


def motion_findings(cfg, sample: pa.Table | None, rows_in: int, rejected: dict) -> list[Finding]:
    """Proper motions and parallaxes of the brighter astrometric sources out of range for their units."""
    out = []
    beyond = int(rejected.get("beyond_physical_limit", 0))
    if rows_in >= MIN_ROWS and beyond > rows_in / 2:
        out.append(Finding("motion_limits", f"astrometric: {beyond:,} of {rows_in:,} rows have a proper motion, "
                                            "parallax or error beyond physical limits: check the units of "
                                            "astrometric.columns.pmra, pmdec, parallax and their errors (a factor "
                                            "1000: mas against arcsec)"))
    if sample is None or sample.num_rows < MIN_ROWS:
        return out
    bright = _bright(sample, cfg)
    pmra, pmdec, plx = (_column(sample, c) for c in ("pmra_mas_yr", "pmdec_mas_yr", "parallax_mas"))
    if pmra is not None and pmdec is not None:
        out += _median_outside(np.hypot(pmra, pmdec)[bright], PM_MEDIAN_RANGE_MAS_YR, "pm_units",
                               "the median total proper motion of the brighter sources", "mas/yr",
                               setting="astrometric.columns.pmra.unit and pmdec.unit (mas/yr against arcsec/yr?)")
    if plx is not None:
        out += _median_outside(np.abs(plx[bright]), PARALLAX_MEDIAN_RANGE_MAS, "parallax_units",
                               "the median |parallax| of the brighter sources", "mas",
                               setting="astrometric.columns.parallax.unit (mas against arcsec?)")
    return out


def locus_findings(cfg, table: pa.Table | None, where: str) -> list[Finding]:
    """The median [3.4] − [4.6] (Vega) of bright stars away from zero by about an AB–Vega offset."""
    bands = cfg.infrared_bands()
    if "3.4" not in bands or "4.6" not in bands:
        return []
    m1 = _column(table, schema.infrared_mag_column("3.4"))
    m2 = _column(table, schema.infrared_mag_column("4.6"))
    if m1 is None or m2 is None:
        return []
    ok = np.isfinite(m1) & np.isfinite(m2)
    if ok.sum() < MIN_ROWS:
        return []
    # the brighter part by rank, not by a magnitude limit: a wrong system shifts the limit too
    ok &= m2 <= np.quantile(m2[ok], BRIGHT_FRACTION)
    med = float(np.median(m1[ok] - m2[ok]))
    if abs(med) <= LOCUS_TOLERANCE_MAG:
        return []
    offset = VEGA_TO_AB_MAG["3.4"] - VEGA_TO_AB_MAG["4.6"]
    i1, i2 = bands.index("3.4"), bands.index("4.6")
    systems = (cfg.infrared.magnitudes[i1].system, cfg.infrared.magnitudes[i2].system)
    guess = ""
    if abs(med - offset) < LOCUS_TOLERANCE_MAG:
        guess = " (the values look AB: set system = \"ab\")"
    elif abs(med + offset) < LOCUS_TOLERANCE_MAG:
        guess = " (the values look Vega: set system = \"vega\")"
    return [Finding("stellar_locus", f"{where}: bright stars have a median [3.4]−[4.6] of {med:+.2f} mag (Vega), "
                                     f"where stars sit near 0: check infrared.magnitudes[{i1}].system and "
                                     f"infrared.magnitudes[{i2}].system (now {systems[0]!r}, {systems[1]!r}){guess}")]


def ingest_findings(cfg, summaries: dict) -> list[Finding]:
    """Every ingest check over the ingested catalogues' summaries and samples (:class:`IngestSummary`)."""
    out = []
    for kind, s in summaries.items():
        out += position_findings(kind, s.sample, s.rows_in, s.rejected)
        if kind == "astrometric":
            out += motion_findings(cfg, s.sample, s.rows_in, s.rejected)
        if kind == "infrared":
            out += locus_findings(cfg, s.sample, "infrared")
    return out


def run_findings(cfg, records: dict, ingest: dict, stars: pa.Table | None) -> list[Finding]:
    """The run checks: tiles with both catalogues but no match, the locus of moving stars, no candidates.

    Parameters
    ----------
    cfg : Config
    records : dict
        Finished tiles' manifest records (``rows``, ``cutflow``), by tile.
    ingest : dict
        The ingest summaries by catalogue (``rows_per_tile``).
    stars : pyarrow.Table or None
        Feature-cache rows of a sample of tiles with a significant proper motion (:func:`moving`).
    """
    out = []
    ir_rows = {int(k): int(v) for k, v in ingest.get("infrared", {}).get("rows_per_tile", {}).items()}
    lonely = []
    for t, rec in sorted(records.items()):
        flow = dict((name, int(n)) for name, n in rec.get("cutflow") or [])
        if (int(rec.get("rows") or 0) >= MIN_ROWS_FOR_A_MATCH and ir_rows.get(int(t), 0) >= MIN_ROWS_FOR_A_MATCH
                and flow.get("matched", 1) == 0):
            lonely.append(int(t))
    if lonely:
        shown = ", ".join(map(str, lonely[:8])) + (" ..." if len(lonely) > 8 else "")
        out.append(Finding("no_match", f"{len(lonely)} tiles hold sources of both catalogues but not one match (tiles "
                                       f"{shown}): check match.radius_arcsec, the epochs (astrometric.epoch_jyear, "
                                       "infrared.epoch_jyear) and the position units (infrared.columns.ra.unit)"))
    out += locus_findings(cfg, stars, "run")
    candidates = sum(int((rec.get("cutflow") or [["", 0]])[-1][1]) for rec in records.values())
    if records and candidates == 0:
        totals: dict[str, int] = {}
        names = []
        for rec in records.values():
            for name, n in rec.get("cutflow") or []:
                if name not in totals:
                    names.append(name)
                totals[name] = totals.get(name, 0) + int(n)
        if totals.get("matched", 0) == 0:
            why = "no source has an infrared counterpart"
        else:
            # the cross-match always removes most sources; what matters is the cut that emptied the list
            after = names[names.index("matched"):] if "matched" in names else names
            drops = [(totals[a] - totals[b], b) for a, b in zip(after, after[1:])]
            why = f"of {totals['matched']:,} matched sources the '{max(drops)[1]}' stage removed the most" if drops \
                else "nothing passed"
        out.append(Finding("no_candidates", f"the run selected no candidates ({why}): check the cuts in [motion] and "
                                            "[colours], and the units and magnitude systems of the catalogues"))
    return out


def moving(features: pa.Table) -> pa.Table:
    """Feature-cache rows whose proper motion differs from zero by :data:`SIGNIFICANT_PM_SIGMA` (stars)."""
    need = ("pmra_mas_yr", "pmdec_mas_yr", "pmra_error_mas_yr", "pmdec_error_mas_yr")
    if any(c not in features.column_names for c in need):
        return features.slice(0, 0)
    pmra, pmdec, epmra, epmdec = (_column(features, c) for c in need)
    with np.errstate(divide="ignore", invalid="ignore"):
        chi2 = (pmra / epmra) ** 2 + (pmdec / epmdec) ** 2
    return features.filter(pa.array(np.nan_to_num(chi2) > SIGNIFICANT_PM_SIGMA ** 2))


def settle(findings: list[Finding], *, strict: bool, log, what: str) -> list[str]:
    """Print each finding as a warning; with ``strict``, raise the first as a one-line error.

    Returns the warning lines (for the records).
    """
    lines = [f"warning: {f.message}" for f in findings]
    for line in lines:
        log(line)
    if strict and findings:
        more = f" (and {len(findings) - 1} more warnings above)" if len(findings) > 1 else ""
        raise SelectorError(f"{findings[0].message}{more}; --strict makes this an error, so {what}")
    return lines


def _median_outside(values, limits, code: str, what: str, unit: str, *, setting: str = "") -> list:
    """A finding when the median of the finite ``values`` lies outside ``limits`` (none with too few rows)."""
    values = values[np.isfinite(values)]
    if len(values) < MIN_ROWS:
        return []
    med = float(np.median(values))
    lo, hi = limits
    if lo <= med <= hi:
        return []
    return [Finding(code, f"astrometric: {what} is {med:.3g} {unit}, outside the {lo:g}–{hi:g} {unit} stars show: "
                          f"check {setting}")]
