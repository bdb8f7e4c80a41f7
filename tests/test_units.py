"""Unit conversion of every role and magnitude system at ingest, checked against astropy.units.

Each numeric role is written in a unit other than its canonical one; the expected tile value is
``astropy.units.Quantity(value, unit).to(canonical)`` (reference: astropy.units), compared to 1e-12
relative. Magnitudes are checked against the AB-magnitude definition in astropy (``u.ABmag``) and the
Vega→AB offsets of Jarrett et al. 2011, ApJ 735, 112 (from memory).
"""

from __future__ import annotations

import math

import astropy.units as u
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from selector.core import schema
from selector.errors import ConfigError
from selector.jobs.ingest import ingest_catalogue
from selector.store.layout import layout_of

from conftest import base_config, build

N = 200
RTOL = 1e-12

#: Non-canonical input units, two variants per role. Keys are role names of schema.ASTROMETRIC_ROLES /
#: INFRARED_ROLES; corr and fit-quality roles are dimensionless and take percent.
ASTROMETRIC_UNITS = {
    "ra": ("rad", "hourangle"), "dec": ("rad", "arcmin"),
    "ra_error": ("deg", "arcsec"), "dec_error": ("arcsec", "deg"),
    "parallax": ("arcsec", "uas"), "parallax_error": ("deg", "uas"),
    "pmra": ("arcsec / yr", "mas / d"), "pmdec": ("mas / d", "arcsec / yr"),
    "pmra_error": ("arcsec / yr", "deg / yr"), "pmdec_error": ("mas / d", "uas / yr"),
    "fit_quality": ("%", "%"), "extent": ("mmag", "mag"), "extent_error": ("mag", "mmag"), "ebv": ("mmag", "mag"),
}
INFRARED_UNITS = {"ra": ("hourangle", "rad"), "dec": ("arcmin", "rad"), "position_error": ("mas", "deg")}

#: Vega→AB offsets m_AB − m_Vega at 3.4, 4.6, 12 and 22 µm (Jarrett et al. 2011, ApJ 735, 112; from memory).
JARRETT2011_AB_MINUS_VEGA = {"3.4": 2.699, "4.6": 3.339, "12": 5.174, "22": 6.620}


def _numeric_roles(kind):
    return [r for r in schema.ROLES[kind] if r.kind in ("lon", "lat", "value", "error", "corr")]


def _units_for(kind, variant):
    table = ASTROMETRIC_UNITS if kind == "astrometric" else INFRARED_UNITS
    out = {}
    for r in _numeric_roles(kind):
        out[r.role] = table[r.role][variant] if r.role in table else "%"  # every *_corr role
    return out


def _canonical_values(r: schema.Role, rng) -> np.ndarray:
    """Values in the canonical unit, inside the range each kind accepts."""
    if r.kind == "lon":
        return rng.uniform(0.0, 359.9, N)
    if r.kind == "lat":
        return np.degrees(np.arcsin(rng.uniform(-0.999, 0.999, N)))
    if r.kind == "corr":
        return rng.uniform(-1.0, 1.0, N)
    if r.kind == "error":
        return rng.uniform(0.01, 3.0, N)
    return rng.normal(0.0, 5.0, N)


def _expected(values, given, r: schema.Role):
    """The tile value: astropy.units conversion of the input into the role's canonical unit."""
    target = u.Unit(r.unit) if r.unit else u.dimensionless_unscaled
    out = u.Quantity(values, given).to_value(target)
    return np.mod(out, 360.0) if r.kind == "lon" else out


def _ingest(tmp_path, kind, columns: dict, spec: dict, magnitudes=None, extra_astro=None):
    """Write ``columns`` as the ``kind`` catalogue, map roles by ``spec`` and ingest it."""
    pq.write_table(pa.table(columns), tmp_path / f"{kind}.parquet")
    data = base_config()
    data[kind]["files"] = [f"{kind}.parquet"]
    data[kind]["columns"] = spec
    if magnitudes is not None:
        data[kind]["magnitudes"] = magnitudes
    cfg = build(data, tmp_path)
    s = ingest_catalogue(cfg, kind, log=lambda *a: None)
    assert s.rows_in == N and s.accepted == N, s.rejected
    parts = [pq.read_table(layout_of(cfg).tile_file(kind, cfg.tiling.order, t))
             for t in layout_of(cfg).list_tiles(kind, cfg.tiling.order)]
    return pa.concat_tables(parts).sort_by(schema.ID_COLUMN[kind])


@pytest.fixture(scope="module", params=[("astrometric", 0), ("astrometric", 1), ("infrared", 0), ("infrared", 1)],
                ids=lambda p: f"{p[0]}-variant{p[1]}")
def every_role(request, tmp_path_factory):
    """One ingest with every numeric role of a catalogue in a non-canonical unit."""
    kind, variant = request.param
    rng = np.random.default_rng(2024 + variant)
    units = _units_for(kind, variant)
    columns = {"sid": np.arange(N, dtype=np.int64)}
    spec = {"id": "sid"}
    inputs = {}
    for r in _numeric_roles(kind):
        # input = canonical value expressed in the given unit; the tile must give it back
        canonical = _canonical_values(r, rng)
        target = u.Unit(r.unit) if r.unit else u.dimensionless_unscaled
        inputs[r.role] = (canonical * target).to_value(units[r.role])
        columns[f"c_{r.role}"] = inputs[r.role]
        spec[r.role] = {"column": f"c_{r.role}", "unit": units[r.role]}
    magnitudes = []  # astrometric: none needed here
    if kind == "infrared":
        columns.update({"m1": rng.uniform(10, 16, N), "m2": rng.uniform(10, 16, N)})
        magnitudes = [{"band": "3.4", "column": "m1"}, {"band": "4.6", "column": "m2"}]
    got = _ingest(tmp_path_factory.mktemp(f"{kind}{variant}"), kind, columns, spec, magnitudes)
    return kind, units, inputs, got


def test_every_numeric_role_is_mapped_here():
    # a role added to the schema without a unit case here would go untested
    for kind, table in (("astrometric", ASTROMETRIC_UNITS), ("infrared", INFRARED_UNITS)):
        for r in _numeric_roles(kind):
            assert r.role in table or r.kind == "corr", f"{kind}.{r.role} has no unit case in this file"


def test_every_role_converts_like_astropy(every_role):
    kind, units, inputs, got = every_role
    for r in _numeric_roles(kind):
        want = _expected(inputs[r.role], units[r.role], r)
        have = got.column(r.canonical).to_numpy()
        np.testing.assert_allclose(have, want, rtol=RTOL, atol=0,
                                   err_msg=f"{kind}.{r.role} given in {units[r.role]} → {r.unit}")
        # the conversion must actually have done something (inputs are non-canonical)
        assert not np.allclose(have, inputs[r.role], rtol=1e-6) or units[r.role] == r.unit


# --- magnitudes ----------------------------------------------------------------------------------

def _ir_columns(rng, values: dict):
    n = N
    ra = rng.uniform(0, 360, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1, 1, n)))
    return {"irid": np.array([f"IR{i:05d}" for i in range(n)]), "ra": ra, "dec": dec, **values}


IR_SPEC = {"id": "irid", "ra": "ra", "dec": "dec"}


def test_infrared_ab_magnitudes_are_stored_as_vega(tmp_path, rng):
    ab = {f"m{b}": rng.uniform(12, 20, N) for b in JARRETT2011_AB_MINUS_VEGA}
    err = {f"e{b}": rng.uniform(0.01, 0.3, N) for b in JARRETT2011_AB_MINUS_VEGA}
    mags = [{"band": b, "column": f"m{b}", "error_column": f"e{b}", "system": "ab"} for b in JARRETT2011_AB_MINUS_VEGA]
    got = _ingest(tmp_path, "infrared", _ir_columns(rng, {**ab, **err}), IR_SPEC, mags)
    for band, offset in JARRETT2011_AB_MINUS_VEGA.items():
        # m_Vega = m_AB − (m_AB − m_Vega), offsets of Jarrett et al. 2011 (from memory)
        np.testing.assert_allclose(got.column(schema.infrared_mag_column(band)).to_numpy(),
                                   ab[f"m{band}"] - offset, rtol=RTOL, atol=0)
        np.testing.assert_array_equal(got.column(schema.infrared_error_column(band)).to_numpy(), err[f"e{band}"])


def test_infrared_vega_magnitudes_are_kept(tmp_path, rng):
    m = rng.uniform(12, 20, N)
    got = _ingest(tmp_path, "infrared", _ir_columns(rng, {"m1": m, "m2": m + 0.5}), IR_SPEC,
                  [{"band": "3.4", "column": "m1"}, {"band": "4.6", "column": "m2", "system": "vega"}])
    np.testing.assert_array_equal(got.column("ir_3p4_vegamag").to_numpy(), m)
    np.testing.assert_array_equal(got.column("ir_4p6_vegamag").to_numpy(), m + 0.5)


@pytest.mark.parametrize("flux_unit", ["mJy", "uJy"])
def test_infrared_flux_densities_become_vega_magnitudes(tmp_path, rng, flux_unit):
    flux = {f"f{b}": 10 ** rng.uniform(-1, 3, N) for b in JARRETT2011_AB_MINUS_VEGA}
    sigma = {f"s{b}": flux[f"f{b}"] * rng.uniform(0.01, 0.3, N) for b in JARRETT2011_AB_MINUS_VEGA}
    flux["f3.4"][:3] = [0.0, -1.0, np.nan]  # non-detections: missing magnitudes, the row is kept
    mags = [{"band": b, "column": f"f{b}", "error_column": f"s{b}", "unit": flux_unit}
            for b in JARRETT2011_AB_MINUS_VEGA]
    got = _ingest(tmp_path, "infrared", _ir_columns(rng, {**flux, **sigma}), IR_SPEC, mags)
    for band, offset in JARRETT2011_AB_MINUS_VEGA.items():
        f = flux[f"f{band}"]
        ok = f > 0
        # AB magnitude of a flux density: astropy u.ABmag; then to Vega with Jarrett et al. 2011 (from memory)
        want = np.full(N, np.nan)
        want[ok] = (f[ok] * u.Unit(flux_unit)).to_value(u.ABmag) - offset
        np.testing.assert_allclose(got.column(schema.infrared_mag_column(band)).to_numpy(), want,
                                   rtol=RTOL, atol=0, equal_nan=True, err_msg=band)
        # first-order error propagation 2.5/ln(10)·σ/f (common practice)
        want_err = np.full(N, np.nan)
        want_err[ok] = 2.5 / math.log(10.0) * sigma[f"s{band}"][ok] / f[ok]
        np.testing.assert_allclose(got.column(schema.infrared_error_column(band)).to_numpy(), want_err,
                                   rtol=RTOL, atol=0, equal_nan=True, err_msg=band)


def _astro_columns(rng, extra: dict):
    return {"sid": np.arange(N, dtype=np.int64), "ra": rng.uniform(0, 360, N),
            "dec": np.degrees(np.arcsin(rng.uniform(-1, 1, N))), "plx": rng.normal(0, 1, N),
            "eplx": np.full(N, 0.1), "pmra": rng.normal(0, 1, N), "pmdec": rng.normal(0, 1, N),
            "epmra": np.full(N, 0.1), "epmdec": np.full(N, 0.1), **extra}


def test_optical_vega_magnitudes_are_stored_as_ab(tmp_path, rng):
    vega = rng.uniform(14, 21, N)
    offset = 0.123  # the band's AB − Vega, a config input; m_AB = m_Vega + (m_AB − m_Vega) by definition
    cols = _astro_columns(rng, {"g": vega, "eg": np.full(N, 0.02), "r": vega - 0.3})
    mags = [{"band": "broad", "column": "g", "error_column": "eg", "system": "vega", "vega_to_ab_mag": offset},
            {"band": "red", "column": "r", "system": "ab"}]
    got = _ingest(tmp_path, "astrometric", cols, base_config()["astrometric"]["columns"], mags)
    np.testing.assert_allclose(got.column("opt_broad_abmag").to_numpy(), vega + offset, rtol=RTOL, atol=0)
    np.testing.assert_array_equal(got.column("opt_broad_mag_error").to_numpy(), np.full(N, 0.02))
    np.testing.assert_array_equal(got.column("opt_red_abmag").to_numpy(), vega - 0.3)


@pytest.mark.parametrize("flux_unit", ["mJy", "uJy"])
def test_optical_flux_densities_become_ab_magnitudes(tmp_path, rng, flux_unit):
    f = 10 ** rng.uniform(-2, 2, N)
    s = f * rng.uniform(0.01, 0.2, N)
    cols = _astro_columns(rng, {"g": f, "eg": s})
    mags = [{"band": "broad", "column": "g", "error_column": "eg", "unit": flux_unit}]
    got = _ingest(tmp_path, "astrometric", cols, base_config()["astrometric"]["columns"], mags)
    # reference: astropy u.ABmag; error 2.5/ln(10)·σ/f (common practice)
    np.testing.assert_allclose(got.column("opt_broad_abmag").to_numpy(), (f * u.Unit(flux_unit)).to_value(u.ABmag),
                               rtol=RTOL, atol=0)
    np.testing.assert_allclose(got.column("opt_broad_mag_error").to_numpy(), 2.5 / math.log(10.0) * s / f,
                               rtol=RTOL, atol=0)


# --- refused at config load ----------------------------------------------------------------------

def _wrong_unit(r: schema.Role) -> str:
    if r.kind == "corr" or r.unit is None:
        return "deg"
    if "/ yr" in r.unit:
        return "mas"            # an angle where a rate is needed
    return "mas / yr"           # a rate where an angle is needed


_ALL_ROLES = [("astrometric", r) for r in _numeric_roles("astrometric")] + \
             [("infrared", r) for r in _numeric_roles("infrared")]


@pytest.mark.parametrize("kind,r", _ALL_ROLES, ids=[f"{k}.{r.role}" for k, r in _ALL_ROLES])
def test_unit_that_cannot_convert_is_refused_at_config_load(kind, r):
    data = base_config()
    data[kind]["columns"][r.role] = {"column": "x", "unit": _wrong_unit(r)}
    with pytest.raises(ConfigError) as err:
        build(data)
    text = str(err.value)
    assert f"{kind}.columns.{r.role}.unit" in text and "cannot be converted" in text and "\n" not in text


@pytest.mark.parametrize("kind,role", [("astrometric", "id"), ("infrared", "id"), ("infrared", "flags")])
def test_identifier_and_text_roles_take_no_unit(kind, role):
    data = base_config()
    data[kind]["columns"][role] = {"column": "x", "unit": "deg"}
    with pytest.raises(ConfigError, match=rf"{kind}\.columns\.{role} .*takes no unit"):
        build(data)


@pytest.mark.parametrize("unit", ["deg", "mas / yr", "km"])
def test_magnitude_unit_must_be_mag_or_flux_density(unit):
    data = base_config()
    data["infrared"]["magnitudes"][1]["unit"] = unit
    with pytest.raises(ConfigError, match=r"infrared\.magnitudes\[1\]\.unit = .* is neither 'mag' nor a flux density"):
        build(data)
