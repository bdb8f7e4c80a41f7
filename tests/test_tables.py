"""Tables people can read: every output column described, UCDs, written precision, relative
provenance paths, and the standards' own checkers (astropy's VOTable validator, the FITS verifier).

Most checks read the outputs of the demo run once per session (``demo_command`` in conftest.py).
"""

from __future__ import annotations

import csv
import io
import json
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from astropy.io.votable import parse, validate
from astropy.io.votable.ucd import check_ucd
from astropy.table import Table

from selector.core.columns import COLUMNS, describe
from selector.store.io import format_columns, provenance_path, read_parquet, write_table

#: The written decimals the brief asks for (positions to 1 mas, magnitudes to 1 mmag,
#: probabilities to 1e-4), by column.
BRIEF_DECIMALS = {"ra_deg": 7, "dec_deg": 7, "ir_ra_deg": 7, "sep_arcsec": 3, "opt_broad_abmag": 3,
                  "ir_4p6_vegamag": 3, "ir_3p4_mag_error": 3, "pm_pvalue": 4}


@pytest.fixture(scope="module")
def demo(demo_command):
    assert demo_command.code == 0
    return demo_command.folder / "output"


def _tables(demo: Path) -> dict[str, Path]:
    run, targets = demo / "run", demo / "targets"
    return {"candidates": run / "candidates.ecsv", "targets": targets / "targets.ecsv",
            "targets_full": targets / "targets_full.ecsv", "dropped": targets / "dropped.ecsv",
            "nights": targets / "nights.ecsv"}


# --- descriptions and UCDs -----------------------------------------------------------------------

def test_every_output_column_is_described(demo):
    for kind, path in _tables(demo).items():
        t = Table.read(path, format="ascii.ecsv")
        assert len(t) > 0, kind
        for name in t.colnames:
            doc = describe(name)
            assert doc is not None, f"{kind}: column {name} has no entry in selector/core/columns.py"
            assert t[name].description == doc.description and t[name].meta["ucd"] == doc.ucd, (kind, name)
    parquet = read_parquet(demo / "run" / "candidates.parquet")
    for f in parquet.schema:
        assert f.metadata[b"description"].decode() == describe(f.name).description, f.name


def test_descriptions_live_in_one_place():
    # the writers read the table of descriptions; no module keeps its own
    package = Path(__file__).resolve().parents[1] / "selector"
    for path in package.rglob("*.py"):
        if path.name != "columns.py":
            assert "_DESCRIPTIONS = {" not in path.read_text(encoding="utf-8"), path


def test_ucds_are_words_of_the_controlled_vocabulary():
    # reference: the IVOA UCD1+ controlled vocabulary as shipped with astropy (check_ucd)
    names = list(COLUMNS) + ["ra_pmra_corr", "opt_red_abmag", "opt_red_mag_error", "ir_3p4_vegamag",
                             "ir_4p6_mag_error", "ir_12_vegamag", "ir_22_vegamag"]
    for name in names:
        ucd = describe(name).ucd
        assert check_ucd(ucd, check_controlled_vocabulary=True), (name, ucd)
    # the check can fail: a made-up word and a secondary word in first place are refused
    assert not check_ucd("pos.eq.nowhere", check_controlled_vocabulary=True)
    assert not check_ucd("meta.main;pos.eq.ra", check_controlled_vocabulary=True)


def test_infrared_bands_get_their_wavelength_ucd():
    # UCD1+ bands by wavelength (IVOA UCD1+ list, from memory: em.IR.3-4um, em.IR.4-8um, em.IR.8-15um, em.IR.15-30um)
    assert describe("ir_3p4_vegamag").ucd == "phot.mag;em.IR.3-4um"
    assert describe("ir_4p6_vegamag").ucd == "phot.mag;em.IR.4-8um"
    assert describe("ir_12_vegamag").ucd == "phot.mag;em.IR.8-15um"
    assert describe("ir_22_mag_error").ucd == "stat.error;phot.mag;em.IR.15-30um"
    assert describe("no_such_column") is None


def test_votable_fields_carry_ucds_and_descriptions(demo):
    table = parse(str(demo / "targets" / "targets_full.vot")).get_first_table()
    for f in table.fields:
        doc = describe(f.name)
        assert f.ucd == doc.ucd and " ".join(f.description.split()) == doc.description, f.name


# --- precision ---------------------------------------------------------------------------------

def _decimals(text: str) -> int:
    return len(text.split(".", 1)[1]) if "." in text and "e" not in text.lower() and text not in ("nan",) else 0


def test_text_tables_are_written_at_the_precision_their_units_warrant(demo):
    full = read_parquet(demo / "run" / "candidates.parquet")
    with open(demo / "run" / "candidates.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == full.num_rows
    for name in full.column_names:
        doc = describe(name)
        if doc.decimals is None or not np.issubdtype(full.schema.field(name).type.to_pandas_dtype(), np.floating):
            continue
        written = [r[name] for r in rows]
        assert max(_decimals(v) for v in written) <= doc.decimals, name
        if name in BRIEF_DECIMALS:
            assert doc.decimals == BRIEF_DECIMALS[name], name
        values = np.array([float(v) if v else np.nan for v in written])
        exact = full.column(name).to_numpy(zero_copy_only=False).astype(float)
        # the written value is the exact one rounded: within half a unit of the last digit
        assert np.allclose(values, exact, rtol=0, atol=0.5 * 10.0 ** -doc.decimals * (1 + 1e-9), equal_nan=True), name
    # the brief's example: one position to 1e-7 deg (0.36 mas), not 17 digits
    assert _decimals(rows[0]["ra_deg"]) <= 7 and len(rows[0]["ra_deg"]) <= 12


def test_parquet_and_fits_keep_full_precision(demo):
    full = read_parquet(demo / "run" / "candidates.parquet").column("ra_deg").to_numpy()
    assert np.any(np.abs(full * 1e7 - np.round(full * 1e7)) > 1e-3)  # not rounded
    targets = Table.read(demo / "targets" / "targets_full.fits")
    ra = np.asarray(targets["ra_deg"], float)
    assert np.any(np.abs(ra * 1e7 - np.round(ra * 1e7)) > 1e-3)


def test_rounding_gives_short_decimals_and_no_negative_zero(tmp_path):
    t = Table({"ra_deg": [62.777050325324694, 1e-9], "dec_deg": [-1e-9, -45.00000004999],
               "opt_broad_abmag": [18.98551084891467, np.nan], "p_quasar": [0.99872696, 0.00004]})
    r = format_columns(t)
    assert list(r["ra_deg"]) == [62.7770503, 0.0] and repr(float(r["ra_deg"][0])) == "62.7770503"
    assert repr(float(r["dec_deg"][0])) == "0.0" and float(r["dec_deg"][1]) == -45.0
    assert float(r["opt_broad_abmag"][0]) == 18.986 and np.isnan(r["opt_broad_abmag"][1])
    assert list(r["p_quasar"]) == [0.9987, 0.0]
    assert float(t["ra_deg"][0]) == 62.777050325324694  # the caller's table is left alone
    write_table(t, tmp_path / "t.csv", "csv")
    assert (tmp_path / "t.csv").read_text().splitlines()[1] == "62.7770503,0.0,18.986,0.9987"


# --- provenance ----------------------------------------------------------------------------------

def test_provenance_paths_are_relative_to_the_config_folder(demo, demo_command):
    base = demo_command.folder  # where demo.toml lies
    prov = json.loads((demo / "run" / "provenance.json").read_text())
    files = [name for kind in prov["input_fingerprints"].values() for name in kind]
    assert files
    for name in files:
        assert not Path(name).is_absolute() and (base / name).is_file(), name
    targets = json.loads((demo / "targets" / "provenance.json").read_text())
    assert targets["candidates"]["file"] == "output/run/candidates.parquet"
    assert str(base) not in (demo / "run" / "candidates.ecsv").read_text()


def test_provenance_path_outside_the_folder(tmp_path):
    (tmp_path / "a" / "b").mkdir(parents=True)
    (tmp_path / "c.parquet").write_text("")
    assert provenance_path(tmp_path / "c.parquet", tmp_path / "a") == "../c.parquet"
    assert provenance_path(tmp_path / "a" / "b", tmp_path / "a") == "b"


# --- the standards' own checkers -----------------------------------------------------------------

def test_votables_pass_astropy_validator(demo, tmp_path):
    # reference: astropy.io.votable.validate, the VOTable standard's checks as astropy implements them
    for name in ("targets.vot", "targets_full.vot"):
        report = io.StringIO()
        assert validate(str(demo / "targets" / name), output=report) is True, report.getvalue()
    # the checker can fail: a field whose UCD is not a word of the vocabulary
    bad = tmp_path / "bad.vot"
    bad.write_text((demo / "targets" / "targets.vot").read_text().replace('ucd="pos.eq.ra;meta.main"',
                                                                          'ucd="pos.eq.nowhere"', 1))
    report = io.StringIO()
    assert validate(str(bad), output=report) is False and "W06" in report.getvalue()


def _fitsverify(path: Path) -> str:
    proc = subprocess.run(["fitsverify", "-q", str(path)], capture_output=True, text=True)
    return proc.stdout + proc.stderr


def test_fits_files_pass_the_fits_verifier(demo, tmp_path):
    # reference: fitsverify (the FITS verifier of the system's packages; `apt-get install fitsverify`)
    if shutil.which("fitsverify") is None:
        pytest.skip("fitsverify is not installed (Debian package fitsverify; .ci/run installs it where it can)")
    for name in ("targets.fits", "targets_full.fits"):
        out = _fitsverify(demo / "targets" / name)
        assert "verification OK" in out, out
    # the verifier can fail: the long provenance card without LONGSTRN draws the warning we fixed
    from astropy.io import fits

    hdu = fits.BinTableHDU.from_columns([fits.Column(name="a", format="D", array=np.zeros(2))])
    hdu.header["PROVJSON"] = "x" * 200
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(tmp_path / "bad.fits")
    out = _fitsverify(tmp_path / "bad.fits")
    assert "verification FAILED" in out and "1 warnings" in out, out


def test_fits_columns_carry_descriptions(demo):
    from astropy.io import fits

    header = fits.getheader(demo / "targets" / "targets.fits", 1)
    assert header["LONGSTRN"] == "OGIP 1.0"
    for i in range(1, header["TFIELDS"] + 1):
        assert header[f"TCOMM{i}"] == describe(header[f"TTYPE{i}"]).description
