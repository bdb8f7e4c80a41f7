"""The same sky given in other formats, column names and units selects the same candidates."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pytest
from astropy.table import Table
import astropy.units as u

from selector.demo import mocksky as demo
from selector.jobs.run import run
from selector.settings.config import from_dict, load_config
from selector.jobs.ingest import ingest
from selector.store.io import read_parquet
from selector.core.photometry import VEGA_TO_AB_MAG
from selector.store.layout import layout_of


def _col(t: pa.Table, name: str) -> np.ndarray:
    return t.column(name).to_numpy(zero_copy_only=False)


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("general")
    sky = demo.make_mock_sky(seed=11, scale=0.04)
    demo.write_mock_sky(sky, tmp / "catalogues")
    ref = load_config(demo.write_demo_config(tmp))
    ingest(ref, log=lambda *a: None)
    run(ref, workers=1, quiet=True)

    # the astrometric catalogue as CSV with radians, degrees and arcsec/yr (conversions by astropy.units)
    a = sky.astrometric
    mas_to_deg = (1 * u.mas).to_value(u.deg)
    cols = {
        "OBJ": _col(a, "srcid"),
        "RA_RAD": (_col(a, "alpha") * u.deg).to_value(u.rad), "DE_RAD": (_col(a, "delta") * u.deg).to_value(u.rad),
        "ERA_DEG": _col(a, "alpha_unc") * mas_to_deg, "EDE_DEG": _col(a, "delta_unc") * mas_to_deg,
        "PLX_AS": _col(a, "plx") / 1000, "EPLX_AS": _col(a, "plx_unc") / 1000,
        "PMA_AS": _col(a, "mu_a") / 1000, "PMD_AS": _col(a, "mu_d") / 1000,
        "EPMA_AS": _col(a, "mu_a_unc") / 1000, "EPMD_AS": _col(a, "mu_d_unc") / 1000,
        "RHO": _col(a, "mu_corr"), "Q": _col(a, "fit_excess"),
        "RHO_PA": _col(a, "plx_mu_a_corr"), "RHO_PD": _col(a, "plx_mu_d_corr"),
        "EXT_MMAG": _col(a, "ext_excess") * 1000, "EEXT_MMAG": _col(a, "ext_excess_unc") * 1000,
        "MAGB": _col(a, "mag_broad"), "EMAGB": _col(a, "mag_broad_unc"),
    }
    pacsv.write_csv(pa.table(cols), tmp / "astro.csv")
    # the infrared catalogue as a VOTable in AB magnitudes, positional errors in mas
    i = sky.infrared
    ir = Table()
    ir["NAME"] = np.asarray(i.column("ir_name").to_pylist(), dtype=str)
    ir["LON"] = _col(i, "ra_ir") * u.deg
    ir["LAT"] = _col(i, "dec_ir") * u.deg
    ir["PERR"] = (_col(i, "pos_unc") * u.arcsec).to(u.mas)
    ir["RESOLVED"] = _col(i, "ext_flag") > 0  # a boolean flag
    for src, band, label in (("m34", "3p4", "3.4"), ("m46", "4p6", "4.6"), ("m120", "12", "12"), ("m220", "22", "22")):
        ir[f"AB_{band}"] = _col(i, src) + VEGA_TO_AB_MAG[label]
        ir[f"E_{band}"] = _col(i, f"{src}_unc")
    ir.write(tmp / "ir.xml", format="votable")
    dt = {"project": {"output_dir": "general"}, "tiling": {"order": 4},
          "astrometric": {"files": ["astro.csv"], "epoch_jyear": demo.ASTROMETRIC_EPOCH_JYEAR, "columns": {
              "id": "OBJ", "ra": {"column": "RA_RAD", "unit": "rad"}, "dec": {"column": "DE_RAD", "unit": "rad"},
              "ra_error": {"column": "ERA_DEG", "unit": "deg"}, "dec_error": {"column": "EDE_DEG", "unit": "deg"},
              "parallax": {"column": "PLX_AS", "unit": "arcsec"},
              "parallax_error": {"column": "EPLX_AS", "unit": "arcsec"},
              "pmra": {"column": "PMA_AS", "unit": "arcsec/yr"}, "pmdec": {"column": "PMD_AS", "unit": "arcsec/yr"},
              "pmra_error": {"column": "EPMA_AS", "unit": "arcsec/yr"},
              "pmdec_error": {"column": "EPMD_AS", "unit": "arcsec/yr"},
              "pm_corr": "RHO", "fit_quality": "Q", "parallax_pmra_corr": "RHO_PA",
              "parallax_pmdec_corr": "RHO_PD", "extent": {"column": "EXT_MMAG", "unit": "mmag"},
              "extent_error": {"column": "EEXT_MMAG", "unit": "mmag"}},
              "magnitudes": [{"band": "broad", "column": "MAGB", "error_column": "EMAGB", "system": "ab"}]},
          "infrared": {"files": ["ir.xml"], "epoch_jyear": demo.INFRARED_EPOCH_JYEAR, "columns": {
              "id": "NAME", "ra": "LON", "dec": "LAT", "position_error": "PERR",   # units from the file
              "extended_flag": "RESOLVED"},
              "magnitudes": [{"band": b, "column": f"AB_{k}", "error_column": f"E_{k}", "system": "ab"}
                             for b, k in (("3.4", "3p4"), ("4.6", "4p6"), ("12", "12"), ("22", "22"))]},
          "motion": {"fit_quality_max": ref.motion.fit_quality_max},
          }
    other = from_dict(dt, base_dir=tmp)
    ingest(other, log=lambda *a: None)
    run(other, workers=1, quiet=True)
    return ref, other


def test_same_candidates_from_other_formats_names_and_units(two_runs):
    ref, other = two_runs
    a = read_parquet(layout_of(ref).merged("parquet"))
    b = read_parquet(layout_of(other).merged("parquet"))
    assert a.num_rows > 10
    ids_a = [str(x) for x in a.column("astro_id").to_pylist()]
    ids_b = b.column("astro_id").to_pylist()  # CSV identifiers are kept as text
    assert ids_b == ids_a  # same rows in the same ranked order
    for name in ("parallax_mas", "pmra_mas_yr", "ir_3p4_vegamag", "pos_error_arcsec", "sep_arcsec"):
        assert np.allclose(_col(a, name), _col(b, name), rtol=1e-9, atol=1e-9), name
