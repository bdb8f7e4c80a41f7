"""Black-hole masses after spectroscopy: ``selector weigh``.

The spectra of confirmed quasars give broad-line widths and continuum fluxes; this job turns them
into single-epoch virial masses (:mod:`selector.core.blackhole`), bolometric luminosities,
Eddington ratios and accretion rates (:mod:`selector.core.luminosity`), under the ``[physics]``
section of the configuration.

The spectroscopy file
---------------------
Any format :func:`selector.store.io.read_table` reads (CSV, ECSV, VOTable, FITS, Parquet), one row
per source. Column names are matched without regard to case; units are in the names, and a unit
the file declares (ECSV, VOTable, FITS, Parquet) is converted to the one in the name.

* ``astro_id``, ``candidate_id`` or ``id`` (required): the source, as ``selector outcome`` reads it.
* ``redshift`` or ``z``: needed only to convert a flux density; when given it must lie in (0, 20].
* ``fwhm_<line>_kms`` and ``fwhm_<line>_err_kms``: FWHM of a broad line and its 1σ error (km/s),
  for ``<line>`` = ``civ`` (C IV), ``mgii`` (Mg II), ``hbeta`` (Hβ); other spellings that
  :func:`selector.core.blackhole.canonical_line` knows (``hb``, ``c_iv``, ``mg_ii``) are read too.
  A ``fwhm_<name>_kms`` column of a line without a calibration is reported and not used.
* ``lamL<W>_erg_s`` and ``lamL<W>_err_erg_s``, for ``<W>`` = 1350, 3000, 5100: the rest-frame
  continuum luminosity λL_λ at W Å and its 1σ error (erg/s).
* ``fnu<W>_mjy`` and ``fnu<W>_err_mjy``: instead of λL_λ, the observed continuum flux density f_ν
  (mJy) measured at the observed wavelength (1+z)·W Å, i.e. at rest-frame W Å, Galactic extinction
  already removed. It becomes ``λL_λ = ν_W · 4π d_L² f_ν / (1+z)`` with ``ν_W = c / W`` and ``d_L``
  from ``physics.cosmology`` (through :func:`selector.core.luminosity.monochromatic_luminosity_erg_s`,
  whose power-law step is exactly 1 here, since the flux is measured at the rest wavelength itself).
  Where both are given, λL_λ is used.

Each line needs the continuum of its calibration: C IV with 1350 Å, Mg II with 3000 Å, Hβ with
5100 Å. An empty cell means "not measured"; an error left out gives a measurement error of NaN
(unknown, not zero).

Rows in, rows out
-----------------
A row is accepted when every value it uses is usable and at least one line gets a mass; otherwise
it goes to the rejects table with one reason code (:data:`REASONS`, the first that applies, in that
order) and the column concerned. A row that gives, say, a good Hβ width and a negative C IV width
is rejected as a whole: a broken value in a row casts doubt on the rest of it, and dropping the
line silently would hide that. ``rows in = accepted + rejected`` is checked.

Results
-------
Per line: ``log_mass_<line>_msun`` with its measurement error (``_meas_err_dex``, propagated from
the width and luminosity errors) and the calibration's intrinsic scatter (``_scatter_dex``) side by
side, never added together. The adopted mass is that of the first line measured in the order
Hβ, Mg II, C IV (:data:`ADOPTION_ORDER`): Hβ is the line the reverberation masses behind every
calibration were measured on, Mg II follows its width closely, and C IV is the one most disturbed
by outflows (blueshifted, asymmetric profiles), so a better line is never averaged with a worse one.
The bolometric luminosity is ``BC · λL_λ`` at the adopted line's continuum (``physics.
bolometric_corrections``); from it come the Eddington ratio, the Eddington-limited minimum mass and
the accretion rate ``Ṁ = L_bol / (η c²)`` over ``physics.efficiency_range`` (low rate at the high
efficiency), in M☉/yr and M☉/day.
"""

from __future__ import annotations

import json
import re
from contextlib import ExitStack
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, NamedTuple

import astropy.units as u
import numpy as np
import pandas as pd
import pyarrow as pa
from astropy.table import Table

from selector import __version__
from selector.core import blackhole, luminosity
from selector.errors import InputError, SelectorError
from selector.jobs.targets.outcomes import OUTCOME_COLUMNS
from selector.settings.config import Config, config_hash
from selector.store.io import astropy_table, atomic_path, fingerprint, read_table, write_parquet, write_votable
from selector.store.layout import weigh_outputs

__all__ = [
    "ADOPTION_ORDER",
    "LINE_KEYS",
    "REASONS",
    "WAVELENGTHS",
    "WeighResult",
    "weigh",
]

#: Canonical line name → the key used in column names.
LINE_KEYS = {"CIV": "civ", "MgII": "mgii", "Hbeta": "hbeta"}
#: Preference of lines for the adopted mass (see the module docstring for why).
ADOPTION_ORDER = ("Hbeta", "MgII", "CIV")
#: Rest wavelengths (Å) of the continuum columns.
WAVELENGTHS = (1350, 3000, 5100)
#: Accepted spellings of the id and redshift columns: those of ``selector outcome``.
ID_COLUMNS = OUTCOME_COLUMNS["id"]
REDSHIFT_COLUMNS = OUTCOME_COLUMNS["redshift"]
#: Redshifts accepted for a flux-density conversion; nothing is known beyond z ≈ 15.
_REDSHIFT_MAX = 20.0

#: Reason codes of rejected rows, in the order they are tested (the first that applies is given).
REASONS = (
    "id_missing",                                # no source id
    "id_duplicate",                              # the id appears on more than one row (all are rejected)
    "not_a_number",                              # a value that cannot be read as a number
    "redshift_invalid",                          # a redshift outside (0, 20] or not finite
    blackhole.REASON_FWHM_NOT_FINITE,            # a width of NaN or infinity
    blackhole.REASON_FWHM_NOT_POSITIVE,          # a width ≤ 0
    "fwhm_error_invalid",                        # a width error that is negative or not finite
    "redshift_missing",                          # a flux density to convert, but no redshift
    blackhole.REASON_LUMINOSITY_MISSING,         # a width without the continuum of its calibration
    blackhole.REASON_LUMINOSITY_NOT_POSITIVE,    # a continuum ≤ 0 or infinite
    "luminosity_error_invalid",                  # a continuum error that is negative or not finite
    blackhole.REASON_UNKNOWN_LINE,               # widths only of lines without a calibration
    blackhole.REASON_LINE_MISSING,               # no width at all
)

_FWHM = re.compile(r"^fwhm_(?P<line>.+?)(?P<err>_err)?_kms$")
_CANONICAL_UNITS = {"kms": u.km / u.s, "erg_s": u.erg / u.s, "mjy": u.mJy}
_MJY_CGS = 1e-26  # erg s⁻¹ cm⁻² Hz⁻¹ per mJy


class _Columns(NamedTuple):
    """Where each quantity lives in the file (``None`` when absent)."""

    id: str
    redshift: str | None
    fwhm: dict[str, str]            # canonical line → column
    fwhm_err: dict[str, str]
    unknown_lines: tuple[str, ...]  # fwhm columns of lines without a calibration
    lamL: dict[int, str]            # wavelength → column
    lamL_err: dict[int, str]
    fnu: dict[int, str]
    fnu_err: dict[int, str]


class _Numbers(NamedTuple):
    value: np.ndarray       # float64, NaN where not given
    given: np.ndarray       # bool: a value is present (it may still be NaN or infinite)
    unreadable: np.ndarray  # bool: present but not a number


class _Continuum(NamedTuple):
    lamL_erg_s: np.ndarray
    lamL_err_erg_s: np.ndarray
    source: np.ndarray          # "lamL", "fnu" or "" per row
    needs_redshift: np.ndarray  # a flux density is to be converted, and no redshift is given
    error_invalid: np.ndarray   # the error used is negative or not finite
    column: np.ndarray          # the column the continuum came from, per row
    err_column: np.ndarray      # the column its error came from, per row


@dataclass
class WeighResult:
    """What ``selector weigh`` produced."""

    masses: Table          # one row per accepted input row, with units and descriptions
    rejects: Table         # one row per rejected input row: input_row, id, reason, column
    rows_in: int
    accepted: int
    rejected: int
    reasons: dict[str, int]
    summary: str
    outputs: dict[str, Path] = field(default_factory=dict)


def _resolve_columns(path: Path, names: list[str]) -> _Columns:
    lower: dict[str, str] = {}
    for name in names:
        key = name.strip().lower()
        if key in lower:
            raise InputError(f"{path}: columns '{lower[key]}' and '{name}' differ only in case; rename one")
        lower[key] = name

    def pick(options) -> str | None:
        return next((lower[o] for o in options if o in lower), None)

    id_col = pick(ID_COLUMNS)
    if id_col is None:
        raise InputError(f"{path}: no id column; name it one of {', '.join(ID_COLUMNS)}")
    fwhm, fwhm_err, unknown = {}, {}, []
    for key, name in lower.items():
        match = _FWHM.match(key)
        if not match:
            continue
        line = blackhole.canonical_line(match["line"])
        if line is None:
            unknown.append(name)
            continue
        target = fwhm_err if match["err"] else fwhm
        if line in target:
            raise InputError(f"{path}: columns '{target[line]}' and '{name}' both hold the {line} width; keep one")
        target[line] = name
    for line, name in fwhm_err.items():
        if line not in fwhm:
            raise InputError(f"{path}: column '{name}' is an error without its width column "
                             f"'fwhm_{LINE_KEYS[line]}_kms'")
    if not fwhm and not unknown:
        raise InputError(f"{path}: no line-width column; name them "
                         f"{', '.join(f'fwhm_{k}_kms' for k in LINE_KEYS.values())} (km/s)")
    return _Columns(
        id=id_col, redshift=pick(REDSHIFT_COLUMNS), fwhm=fwhm, fwhm_err=fwhm_err, unknown_lines=tuple(unknown),
        lamL={w: lower[f"laml{w}_erg_s"] for w in WAVELENGTHS if f"laml{w}_erg_s" in lower},
        lamL_err={w: lower[f"laml{w}_err_erg_s"] for w in WAVELENGTHS if f"laml{w}_err_erg_s" in lower},
        fnu={w: lower[f"fnu{w}_mjy"] for w in WAVELENGTHS if f"fnu{w}_mjy" in lower},
        fnu_err={w: lower[f"fnu{w}_err_mjy"] for w in WAVELENGTHS if f"fnu{w}_err_mjy" in lower},
    )


def _numbers(path: Path, table: pa.Table, units: dict[str, str], column: str | None) -> _Numbers:
    """A column as float64 in the unit its name says; text columns (CSV) are parsed here."""
    n = table.num_rows
    if column is None:
        return _Numbers(np.full(n, np.nan), np.zeros(n, bool), np.zeros(n, bool))
    data = table.column(column)
    if pa.types.is_string(data.type) or pa.types.is_large_string(data.type) or pa.types.is_null(data.type):
        text = pd.Series(data.to_pandas(), dtype=object).str.strip()
        given = (text.notna() & (text != "")).to_numpy(bool)
        value = pd.to_numeric(text.where(given), errors="coerce").to_numpy(np.float64)
        literal_nan = text.str.lower().isin(("nan", "+nan", "-nan")).to_numpy(bool)
        unreadable = given & np.isnan(value) & ~literal_nan
    else:
        given = ~np.asarray(data.is_null().to_numpy(zero_copy_only=False), bool)
        value = np.asarray(data.cast(pa.float64()).to_numpy(zero_copy_only=False), dtype=np.float64)
        value = np.where(given, value, np.nan)
        unreadable = np.zeros(n, bool)
    declared = units.get(column)
    suffix = next((s for s in _CANONICAL_UNITS if column.lower().endswith(s)), None)
    if declared and suffix is not None:
        try:
            value = value * u.Unit(declared).to(_CANONICAL_UNITS[suffix])
        except (ValueError, u.UnitConversionError):
            raise InputError(f"{path}: column '{column}' is in {declared!r}, which cannot be converted to "
                             f"{_CANONICAL_UNITS[suffix]} as its name says") from None
    return _Numbers(value, given, unreadable)


def _valid_error(numbers: _Numbers) -> np.ndarray:
    """Rows whose error is absent, or a finite number ≥ 0."""
    with np.errstate(invalid="ignore"):
        return ~numbers.given | (np.isfinite(numbers.value) & (numbers.value >= 0.0))


def _continuum(wavelength: int, parsed: dict, z: _Numbers, cols: _Columns, *, cosmology) -> _Continuum:
    """λL_λ at one rest wavelength per row: given directly, or converted from a flux density."""
    lam, lam_err = parsed[cols.lamL.get(wavelength)], parsed[cols.lamL_err.get(wavelength)]
    fnu, fnu_err = parsed[cols.fnu.get(wavelength)], parsed[cols.fnu_err.get(wavelength)]
    use_lam = lam.given
    use_fnu = ~lam.given & fnu.given
    z_ok = z.given & np.isfinite(z.value) & (z.value > 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        fnu_cgs = fnu.value * _MJY_CGS
        mag_ab = -2.5 * np.log10(np.where(fnu_cgs > 0.0, fnu_cgs, np.nan)) - luminosity.AB_ZERO_POINT
        z_safe = np.where(use_fnu & z_ok, z.value, np.nan)
        # observed at (1+z)·W, i.e. at rest W: the power-law step of the conversion is exactly 1
        converted = luminosity.monochromatic_luminosity_erg_s(mag_ab, (1.0 + z_safe) * wavelength, z_safe,
                                                              float(wavelength), cosmology=cosmology)
        # a flux density ≤ 0 or infinite gets a negative luminosity, so that the row is rejected as
        # luminosity_not_positive rather than luminosity_missing
        converted = np.where(np.isfinite(fnu.value) & (fnu.value > 0.0), converted,
                             np.where(np.isnan(fnu.value), np.nan, -1.0))
        converted_err = converted * fnu_err.value / fnu.value
    value = np.where(use_lam, lam.value, np.where(use_fnu, converted, np.nan))
    error = np.where(use_lam, lam_err.value, np.where(use_fnu, converted_err, np.nan))
    error_invalid = (use_lam & ~_valid_error(lam_err)) | (use_fnu & ~_valid_error(fnu_err))
    source = np.where(use_lam, "lamL", np.where(use_fnu, "fnu", ""))
    column = np.where(use_lam, cols.lamL.get(wavelength, ""),
                      np.where(use_fnu, cols.fnu.get(wavelength, ""), f"lamL{wavelength}_erg_s"))
    err_column = np.where(use_lam, cols.lamL_err.get(wavelength, ""), cols.fnu_err.get(wavelength, ""))
    return _Continuum(value, error, source, use_fnu & ~z.given, error_invalid, column, err_column)


class _Reasons:
    """One reason code and one column per row; the first flag that applies wins."""

    def __init__(self, n: int):
        self.code = np.full(n, "", dtype="<U32")
        self.column = np.full(n, "", dtype=object)

    def flag(self, mask, code: str, column) -> None:
        assert code in REASONS, code
        new = np.asarray(mask, bool) & (self.code == "")
        self.code[new] = code
        self.column[new] = np.broadcast_to(np.asarray(column, dtype=object), new.shape)[new]


def _descriptions(physics) -> dict[str, tuple[str | None, str]]:
    """Column → (unit, description) of the mass table."""
    out: dict[str, tuple[str | None, str]] = {
        "input_row": (None, "row of the spectroscopy file (1 = first row after the header)"),
        "redshift": (None, "redshift as given (NaN when not given)"),
    }
    for w in WAVELENGTHS:
        out[f"lamL{w}_erg_s"] = ("erg / s", f"rest-frame continuum luminosity λL_λ at {w} Å, as given or converted "
                                            "from the flux density")
        out[f"lamL{w}_err_erg_s"] = ("erg / s", f"1σ error of lamL{w}_erg_s (NaN when not given)")
        out[f"lamL{w}_source"] = (None, f"where lamL{w}_erg_s came from: lamL (given), fnu (converted), or empty")
    for line, key in LINE_KEYS.items():
        cal = blackhole.calibration_for_line(line, physics.virial_calibrations)
        out[f"fwhm_{key}_kms"] = ("km / s", f"{line} broad-line FWHM as given")
        out[f"fwhm_{key}_err_kms"] = ("km / s", f"1σ error of the {line} FWHM as given")
        out[f"log_mass_{key}_msun"] = ("dex(solMass)", f"log10(M/Msun) from {line} and λL at "
                                                       f"{cal.continuum_angstrom:g} Å ({cal.reference})")
        out[f"log_mass_{key}_meas_err_dex"] = ("dex", f"measurement error of log_mass_{key}_msun from the width "
                                                      "and luminosity errors (intrinsic scatter not included)")
        out[f"log_mass_{key}_scatter_dex"] = ("dex", f"intrinsic scatter of the {line} calibration "
                                                     "(not included in the measurement error)")
    low, high = physics.efficiency_range
    out.update({
        "adopted_line": (None, "line of the adopted mass: the first measured of " + ", ".join(ADOPTION_ORDER)),
        "log_mass_msun": ("dex(solMass)", "adopted log10(M/Msun)"),
        "log_mass_meas_err_dex": ("dex", "measurement error of the adopted log mass"),
        "log_mass_scatter_dex": ("dex", "intrinsic scatter of the adopted line's calibration"),
        "mass_msun": ("solMass", "adopted black-hole mass"),
        "continuum_angstrom": ("Angstrom", "rest wavelength of the continuum used for the adopted mass and L_bol"),
        "bolometric_correction": (None, "BC in L_bol = BC · λL_λ at continuum_angstrom (physics.bolometric_corrections)"),
        "lbol_erg_s": ("erg / s", "bolometric luminosity"),
        "eddington_ratio": (None, "L_bol / L_Edd(M) of the adopted mass"),
        "minimum_mass_msun": ("solMass", "smallest mass at or below the Eddington limit, L_bol / L_Edd(1 Msun)"),
        "mdot_low_msun_yr": ("solMass / yr", f"accretion rate L_bol/(η c²) at η = {high:g}"),
        "mdot_high_msun_yr": ("solMass / yr", f"accretion rate L_bol/(η c²) at η = {low:g}"),
        "mdot_low_msun_day": ("solMass / d", f"accretion rate at η = {high:g}, per day"),
        "mdot_high_msun_day": ("solMass / d", f"accretion rate at η = {low:g}, per day"),
    })
    return out


def _provenance(cfg: Config, path: Path) -> dict:
    physics = cfg.physics
    calibrations = blackhole.calibration_set(physics.virial_calibrations)
    return {
        "physics_config_hash": config_hash(cfg, ("physics",)),
        "input": {"file": path.name, "fingerprint": fingerprint(path)},
        "cosmology": physics.cosmology if physics.h0_km_s_mpc is None
        else f"flat, H0 = {physics.h0_km_s_mpc:g} km/s/Mpc, Omega_m = {physics.omega_m:g}",
        "virial_calibrations": {c.line: {"name": c.name, "continuum_angstrom": c.continuum_angstrom, "a": c.a,
                                         "b": c.b, "scatter_dex": c.scatter_dex, "reference": c.reference}
                                for c in calibrations},
        "adoption_order": list(ADOPTION_ORDER),
        "bolometric_corrections": {f"{k:g}": v for k, v in sorted(physics.bolometric_correction_table().items())},
        "efficiency_range": list(physics.efficiency_range),
        "selector_version": __version__,
    }


def _table(columns: dict, descriptions: dict, meta: dict) -> Table:
    return astropy_table(columns, meta, lambda name: descriptions.get(name, (None, "")))


def _write_outputs(masses: Table, rejects: Table, prov: dict, outputs: dict[str, Path]) -> None:
    """All files at temporary paths first, renamed into place together once every one is written."""
    with ExitStack() as stack:
        tmp = {kind: stack.enter_context(atomic_path(p)) for kind, p in outputs.items()}
        masses.write(tmp["ecsv"], format="ascii.ecsv", overwrite=True)
        rejects.write(tmp["rejects"], format="ascii.ecsv", overwrite=True)
        write_votable(masses, tmp["votable"], {"selector_provenance": json.dumps(prov, sort_keys=True)})
        fields, arrays = [], []
        for name in masses.colnames:
            array = pa.array(np.asarray(masses[name]))
            unit = masses[name].unit
            fields.append(pa.field(name, array.type, metadata=None if unit is None else {"unit": unit.to_string()}))
            arrays.append(array)
        write_parquet(pa.Table.from_arrays(arrays, schema=pa.schema(fields)), tmp["parquet"],
                      metadata={"selector_provenance": prov})


def weigh(cfg: Config, file: str | Path, *, log: Callable[[str], None] = print) -> WeighResult:
    """Virial masses, bolometric luminosities, Eddington ratios and accretion rates from a spectroscopy file.

    Parameters
    ----------
    cfg : Config
        The configuration; its ``[physics]`` section is used, and results go below
        ``project.output_dir/physics``.
    file : str or Path
        The spectroscopy file (columns in the module docstring).
    log : callable
        Receives the one-line summary.

    Returns
    -------
    WeighResult

    Raises
    ------
    InputError
        The file cannot be read, has no id or width column, or declares a unit that does not match
        a column's name. Bad rows are not errors: they are rejected with a reason.
    """
    path = Path(file)
    physics = cfg.physics
    table, units = read_table(path, what="spectroscopy file")
    cols = _resolve_columns(path, table.column_names)
    n = table.num_rows
    numeric = [cols.redshift, *cols.fwhm.values(), *cols.fwhm_err.values(), *cols.lamL.values(),
               *cols.lamL_err.values(), *cols.fnu.values(), *cols.fnu_err.values()]
    parsed = {name: _numbers(path, table, units, name) for name in [None, *numeric]}
    z = parsed[cols.redshift]
    cosmology = physics.astropy_cosmology()
    reasons = _Reasons(n)

    ids_raw = table.column(cols.id).cast(pa.string()).to_pandas()
    ids = pd.Series(ids_raw, dtype=object).str.strip().fillna("").to_numpy(dtype=object).astype(str)
    reasons.flag(ids == "", "id_missing", cols.id)
    _, inverse, counts = np.unique(ids, return_inverse=True, return_counts=True)
    reasons.flag((counts[inverse] > 1) & (ids != ""), "id_duplicate", cols.id)
    for name in numeric:
        if name is not None:
            reasons.flag(parsed[name].unreadable, "not_a_number", name)
    with np.errstate(invalid="ignore"):
        reasons.flag(z.given & ~(np.isfinite(z.value) & (z.value > 0.0) & (z.value <= _REDSHIFT_MAX)),
                     "redshift_invalid", cols.redshift or "")

    # Checks of all lines are collected and applied in REASONS order, so that the reason of a row is
    # the first in that order across its lines, whatever the order of the columns.
    continua = {w: _continuum(w, parsed, z, cols, cosmology=cosmology) for w in WAVELENGTHS}
    checks: list[tuple[np.ndarray, str, object]] = []
    per_line = {}
    width_codes = (blackhole.REASON_FWHM_NOT_FINITE, blackhole.REASON_FWHM_NOT_POSITIVE)
    for line in LINE_KEYS:
        cal = blackhole.calibration_for_line(line, physics.virial_calibrations)
        width, width_err = parsed[cols.fwhm.get(line)], parsed[cols.fwhm_err.get(line)]
        cont = continua[int(cal.continuum_angstrom)]
        code = blackhole.validate_line_rows(np.full(n, line), width.value, cont.lamL_erg_s)
        for reason in (*width_codes, blackhole.REASON_LUMINOSITY_MISSING, blackhole.REASON_LUMINOSITY_NOT_POSITIVE):
            mask = width.given & (code == reason)
            if reason == blackhole.REASON_LUMINOSITY_MISSING:
                checks.append((mask & cont.needs_redshift, "redshift_missing", cols.redshift or "redshift"))
                mask = mask & ~cont.needs_redshift
            checks.append((mask, reason, cols.fwhm.get(line, "") if reason in width_codes else cont.column))
        checks.append((width.given & ~_valid_error(width_err), "fwhm_error_invalid", cols.fwhm_err.get(line, "")))
        checks.append((width.given & cont.error_invalid, "luminosity_error_invalid", cont.err_column))
        log_mass = blackhole.virial_log_mass(width.value, cont.lamL_erg_s, cal)
        unc = blackhole.virial_mass_uncertainty(width.value, width_err.value, cal, lamL_erg_s=cont.lamL_erg_s,
                                                lamL_err_erg_s=cont.lamL_err_erg_s)
        measured = np.isfinite(log_mass)
        per_line[line] = {"fwhm": width.value, "fwhm_err": width_err.value, "log_mass": log_mass,
                          "meas": np.where(measured, unc.measurement_dex, np.nan),
                          "scatter": np.where(measured, unc.intrinsic_dex, np.nan),
                          "continuum": cal.continuum_angstrom}
    any_known = np.zeros(n, bool)
    for line in LINE_KEYS:
        any_known |= parsed[cols.fwhm.get(line)].given
    any_unknown = np.zeros(n, bool)
    for name in cols.unknown_lines:
        any_unknown |= _numbers(path, table, {}, name).given
    checks.append((~any_known & any_unknown, blackhole.REASON_UNKNOWN_LINE, ", ".join(cols.unknown_lines)))
    checks.append((~any_known & ~any_unknown, blackhole.REASON_LINE_MISSING, ""))
    for mask, reason, column in sorted(checks, key=lambda check: REASONS.index(check[1])):
        reasons.flag(mask, reason, column)

    accepted = reasons.code == ""
    reason_counts = {code: int(np.sum(reasons.code == code)) for code in REASONS if np.any(reasons.code == code)}
    n_acc, n_rej = int(accepted.sum()), int((~accepted).sum())
    if n != n_acc + sum(reason_counts.values()) or n != n_acc + n_rej:
        raise SelectorError(f"internal error: {n} rows in, {n_acc} accepted and {n_rej} rejected do not add up")

    # adopted line: the first measured in ADOPTION_ORDER
    adopted = np.full(n, "", dtype="<U8")
    for line in reversed(ADOPTION_ORDER):
        adopted = np.where(np.isfinite(per_line[line]["log_mass"]), line, adopted)

    def pick(key):
        out = np.full(n, np.nan)
        for line in LINE_KEYS:
            out = np.where(adopted == line, per_line[line][key], out)
        return out

    log_mass, continuum = pick("log_mass"), pick("continuum")
    bc_table = physics.bolometric_correction_table()
    lamL_used = np.full(n, np.nan)
    bc = np.full(n, np.nan)
    for w in WAVELENGTHS:
        lamL_used = np.where(continuum == w, continua[w].lamL_erg_s, lamL_used)
        bc = np.where(continuum == w, bc_table[float(w)], bc)
    lbol = np.full(n, np.nan)
    for w in WAVELENGTHS:
        lbol = np.where(continuum == w, luminosity.bolometric_luminosity_erg_s(lamL_used, w, bc_table), lbol)
    summary = blackhole.summarise(log_mass, lbol, tuple(physics.efficiency_range))

    columns = {"input_row": np.arange(1, n + 1, dtype=np.int64), cols.id.lower(): ids, "redshift": z.value}
    for w in WAVELENGTHS:
        columns[f"lamL{w}_erg_s"] = continua[w].lamL_erg_s
        columns[f"lamL{w}_err_erg_s"] = continua[w].lamL_err_erg_s
        columns[f"lamL{w}_source"] = continua[w].source
    for line, key in LINE_KEYS.items():
        values = per_line[line]
        columns.update({f"fwhm_{key}_kms": values["fwhm"], f"fwhm_{key}_err_kms": values["fwhm_err"],
                        f"log_mass_{key}_msun": values["log_mass"], f"log_mass_{key}_meas_err_dex": values["meas"],
                        f"log_mass_{key}_scatter_dex": values["scatter"]})
    columns.update({
        "adopted_line": adopted, "log_mass_msun": log_mass, "log_mass_meas_err_dex": pick("meas"),
        "log_mass_scatter_dex": pick("scatter"), "mass_msun": summary.mass_msun, "continuum_angstrom": continuum,
        "bolometric_correction": bc, "lbol_erg_s": lbol, "eddington_ratio": summary.eddington_ratio,
        "minimum_mass_msun": summary.minimum_mass_msun,
        "mdot_low_msun_yr": summary.accretion_low_msun_yr, "mdot_high_msun_yr": summary.accretion_high_msun_yr,
        "mdot_low_msun_day": summary.accretion_low_msun_day, "mdot_high_msun_day": summary.accretion_high_msun_day,
    })
    prov = _provenance(cfg, path)
    descriptions = _descriptions(physics)
    descriptions[cols.id.lower()] = (None, "source id as given")
    masses = _table({k: np.asarray(v)[accepted] for k, v in columns.items()}, descriptions,
                    {"description": "single-epoch black-hole masses, bolometric luminosities, Eddington ratios and "
                                    "accretion rates (`selector weigh`)", "selector_provenance": prov})
    rejected = ~accepted
    rejects = _table({"input_row": np.flatnonzero(rejected) + 1, cols.id.lower(): ids[rejected],
                      "reason": reasons.code[rejected], "column": reasons.column[rejected].astype(str)},
                     {"input_row": (None, "row of the spectroscopy file (1 = first row after the header)"),
                      cols.id.lower(): (None, "source id as given"),
                      "reason": (None, "reason code: " + ", ".join(REASONS)),
                      "column": (None, "the input column concerned")},
                     {"description": "rows of the spectroscopy file that got no mass, with the reason",
                      "selector_provenance": prov})

    outputs = weigh_outputs(cfg, path)
    _write_outputs(masses, rejects, prov, outputs)

    detail = ", ".join(f"{code} {count}" for code, count in reason_counts.items())
    unknown_note = (f"; columns of lines without a calibration not used: {', '.join(cols.unknown_lines)}"
                    if cols.unknown_lines else "")
    line = (f"weighed {n_acc} of {n} rows of {path.name}" + (f", rejected {n_rej} ({detail})" if n_rej else "")
            + f"{unknown_note}; masses in {outputs['ecsv'].parent}/{outputs['ecsv'].stem}.{{ecsv,vot,parquet}}"
            + (f", rejects in {outputs['rejects'].name}" if n_rej else ""))
    log(line)
    return WeighResult(masses=masses, rejects=rejects, rows_in=n, accepted=n_acc, rejected=n_rej,
                       reasons=reason_counts, summary=line, outputs=outputs)
