"""The fault battery: every bad input and fault we know of ends in one line, and nothing mixed is
reported as complete.

Each case is a kind of fault a new user meets (a wrong file, a wrong unit, a full disk, a kill, two
commands at once). A case expects the one-line message (``selector: ...`` on standard error, no
traceback) and, where rows were ingested, checks rows in = accepted + rejected. The kinds are listed
in :data:`FAULT_KINDS`; the last test checks that every kind has a test here.

One small invented sky (stars with proper motions on the stellar locus, zero-motion quasars with
red infrared colours, infrared-only sources; all-sky at HEALPix order 1) is ingested and run once
per module; each test works on its own copy.
"""

from __future__ import annotations

import gzip
import json
import os
import shutil
import subprocess
import sys
import textwrap
import time
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest
from astropy.table import Table

from selector import cli
from selector.core.photometry import VEGA_TO_AB_MAG
from selector.errors import SelectorError
from selector.jobs import ingest as ingest_job
from selector.jobs import run as run_job
from selector.jobs.ingest import ingest
from selector.jobs.run.execute import BLOCKED_BY
from selector.settings.config import config_hash, load_config
from selector.store.layout import layout_of
from selector.store.lock import FolderLock
from selector.store.manifest import Manifest

#: Every kind of fault the battery covers: name → what it is. Each has a test below (checked at the end).
FAULT_KINDS = {
    "missing_column": "a column the config names is not in an input file",
    "known_missing_column_up_front": "the known-objects file lacks a column: found before any catalogue is ingested",
    "empty_csv": "a 0-byte file named .csv",
    "gzip_csv": "a gzip file named .csv",
    "parquet_csv": "a Parquet file named .csv",
    "semicolon_csv": "a semicolon-separated file named .csv",
    "ragged_csv_row": "a CSV row with too many fields",
    "non_utf8_csv": "bytes that are not UTF-8 in a CSV file",
    "truncated_fits": "a FITS file cut short",
    "non_utf8_config": "a configuration file that is not UTF-8",
    "system_case": "a magnitude system written \"AB\"",
    "targets_folder_outside": "targets.output_folder with ../..",
    "history_file_outside": "targets.history_file with ../..",
    "output_folder_is_file": "project.output_dir is an existing file",
    "read_only_output": "a read-only output folder at ingest",
    "disk_full_ingest_estimate": "not enough free disk for an ingest (refused up front)",
    "disk_full_ingest": "no space left while an ingest writes",
    "disk_full_run": "no space left while a run writes",
    "disk_full_report": "no space left while the report is written",
    "two_ingests": "a second ingest while one is running",
    "ingest_during_run": "an ingest while a run holds the folder",
    "reader_during_writer": "targets while a run holds the folder",
    "beyond_physical_limits": "proper motions and parallaxes beyond physical limits",
    "radians_as_degrees": "positions in radians declared as degrees",
    "pm_unit_wrong": "proper motions in mas/yr declared as arcsec/yr",
    "ab_declared_vega": "AB magnitudes declared as Vega",
    "no_candidates": "a run that selects nothing",
    "no_match_tiles": "tiles with sources in both catalogues but no match",
    "deleted_tile": "an ingested tile deleted before the run",
    "damaged_tile": "an ingested tile damaged before the run",
    "bad_model_after_good_run": "classifier.model set to a bad file after a good run",
    "kill_between_merged_files": "a kill after the candidates and before the provenance",
    "two_configs_one_folder": "two configurations sharing one output folder",
    "incomplete_run_readers": "targets, tune, train and report after an incomplete run",
    "changed_merged_file": "a merged file replaced after the run committed",
    "kill_during_reingest": "a kill while a re-ingest writes its tiles",
    "kill_before_switch": "a kill after a re-ingest wrote everything, before it switched",
    "leftovers_cleaned": "leftovers of an interrupted ingest are removed at the next start",
    "stray_tmp_targets": "temporary files a killed `selector targets` left in its folder",
    "output_folder_in_hash": "the same job run from another folder",
}

ASTRO_EPOCH, IR_EPOCH = 2016.0, 2010.0


def _sky(seed: int = 7, n_star: int = 1500, n_qso: int = 200, n_ir_only: int = 300) -> tuple[dict, dict]:
    """An invented all-sky catalogue pair: moving stars on the stellar locus, still quasars with red
    infrared colours, and infrared sources without an astrometric counterpart."""
    rng = np.random.default_rng(seed)
    n = n_star + n_qso
    ra = rng.uniform(0, 360, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1, 1, n)))
    star = np.arange(n) < n_star
    pmra = np.where(star, rng.normal(0, 6, n), rng.normal(0, 0.1, n))
    pmdec = np.where(star, rng.normal(0, 6, n), rng.normal(0, 0.1, n))
    plx = np.where(star, np.abs(rng.normal(0.8, 0.4, n)), rng.normal(0, 0.1, n))
    astro = {"sid": np.arange(1, n + 1, dtype=np.int64), "ra": ra, "dec": dec, "plx": plx, "eplx": np.full(n, 0.1),
             "pmra": pmra, "pmdec": pmdec, "epmra": np.full(n, 0.1), "epmdec": np.full(n, 0.1),
             "g": rng.uniform(14, 20, n), "eg": np.full(n, 0.01)}
    # the infrared counterpart sits where the source was at the infrared epoch
    dt = IR_EPOCH - ASTRO_EPOCH
    ir_ra = ra + pmra * dt / 3.6e6 / np.cos(np.radians(dec))
    ir_dec = dec + pmdec * dt / 3.6e6
    m46 = np.where(star, rng.uniform(8, 15, n), rng.uniform(12, 14.5, n))
    colour = np.where(star, rng.normal(0.0, 0.05, n), rng.uniform(0.9, 1.4, n))
    k = n_ir_only
    extra_ra, extra_dec = rng.uniform(0, 360, k), np.degrees(np.arcsin(rng.uniform(-1, 1, k)))
    extra_m46 = rng.uniform(13, 16, k)
    ir = {"irid": np.array([f"IR{i:06d}" for i in range(n + k)]), "ra": np.r_[ir_ra, extra_ra],
          "dec": np.r_[ir_dec, extra_dec], "m3p4": np.r_[m46 + colour, extra_m46 + rng.normal(0, 0.05, k)],
          "e_m3p4": np.full(n + k, 0.03), "m4p6": np.r_[m46, extra_m46], "e_m4p6": np.full(n + k, 0.03)}
    ir["ra"] = np.mod(ir["ra"], 360.0)
    return astro, ir


KNOWN_CSV = "n,ra,dec,cls\nK1,10.0,10.0,quasar\nK2,20.0,-20.0,star\n"


def _config_text(*, output_dir="out", astro_file="astro.parquet", ir_file="ir.parquet", known_file="known.csv",
                 pm_unit=None, ir_system="vega", targets_extra="", classifier_extra="") -> str:
    pm = (f'pmra = {{ column = "pmra", unit = "{pm_unit}" }}\npmdec = {{ column = "pmdec", unit = "{pm_unit}" }}'
          if pm_unit else 'pmra = "pmra"\npmdec = "pmdec"')
    return textwrap.dedent(f"""\
        [project]
        output_dir = "{output_dir}"

        [tiling]
        order = 1

        [astrometric]
        files = ["{astro_file}"]
        epoch_jyear = {ASTRO_EPOCH}
        position_floor_arcsec = 0.001

        [astrometric.columns]
        id = "sid"
        ra = "ra"
        dec = "dec"
        parallax = "plx"
        parallax_error = "eplx"
        {{pm}}
        pmra_error = "epmra"
        pmdec_error = "epmdec"

        [[astrometric.magnitudes]]
        band = "broad"
        column = "g"
        error_column = "eg"
        system = "ab"

        [infrared]
        files = ["{ir_file}"]
        epoch_jyear = {IR_EPOCH}
        position_floor_arcsec = 0.8

        [infrared.columns]
        id = "irid"
        ra = "ra"
        dec = "dec"

        [[infrared.magnitudes]]
        band = "3.4"
        column = "m3p4"
        error_column = "e_m3p4"
        system = "{ir_system}"

        [[infrared.magnitudes]]
        band = "4.6"
        column = "m4p6"
        error_column = "e_m4p6"
        system = "{ir_system}"

        [known]
        files = ["{known_file}"]

        [known.columns]
        name = "n"
        ra = "ra"
        dec = "dec"
        class = "cls"

        [classifier]
        {classifier_extra}

        [targets]
        start_date = "2027-04-01"
        end_date = "2027-04-04"
        {targets_extra}

        [targets.site]
        latitude_deg = -30.0
        longitude_deg = -70.0
        """).replace("{pm}", pm)


def _write_project(root: Path, astro=None, ir=None, **config) -> Path:
    root.mkdir(parents=True, exist_ok=True)
    sky = _sky()
    pq.write_table(pa.table(astro if astro is not None else sky[0]), root / "astro.parquet")
    pq.write_table(pa.table(ir if ir is not None else sky[1]), root / "ir.parquet")
    (root / "known.csv").write_text(KNOWN_CSV)
    path = root / "faults.toml"
    path.write_text(_config_text(**config))
    return path


def _quiet(*args, **kwargs):
    pass


def _cli(capsys, *argv) -> tuple[int, str, str]:
    code = cli.main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def _one_line(err: str, *needles: str) -> str:
    """The command's error is exactly one line, starting ``selector:``, with every needle in it."""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("selector: ") and "Traceback" not in err, err
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])
    return lines[0]


def _accounted(cfg) -> None:
    """rows in = accepted + rejected for every ingested catalogue of the generation in force."""
    lay = layout_of(cfg)
    for kind in ("astrometric", "infrared", "known"):
        s = json.loads(lay.ingest_summary(kind).read_text())
        assert s["rows_in"] == s["accepted"] + s["rejected_total"], s
        assert sum(s["rows_per_tile"].values()) == s["accepted"]
        assert pq.read_metadata(lay.ingest_rejects(kind)).num_rows == s["rejected_total"]


def _merged(cfg) -> dict:
    lay = layout_of(cfg)
    return {p.name: p.read_bytes() for p in sorted(lay.run_dir.glob("candidates.*")) if p.is_file()} | {
        "cutflow.csv": lay.merged("cutflow").read_bytes()}


@pytest.fixture(scope="module")
def clean(tmp_path_factory) -> dict:
    """The invented sky ingested and run once: the project folder and its merged bytes."""
    root = tmp_path_factory.mktemp("faults") / "clean"
    config = _write_project(root)
    cfg = load_config(config)
    lines = []
    ingest(cfg, log=lines.append)
    result = run_job.run(cfg, workers=1, quiet=True, log=lines.append)
    assert result.ok and result.candidates > 50, lines
    assert not [x for x in lines if x.startswith("warning")], lines  # a sound sky raises no warning
    return {"root": root, "candidates": result.candidates, "merged": _merged(cfg)}


@pytest.fixture
def project(clean, tmp_path) -> Path:
    """A private copy of the clean project; its config file."""
    shutil.copytree(clean["root"], tmp_path / "p")
    return tmp_path / "p" / "faults.toml"


def _edit(config: Path, old: str, new: str):
    text = config.read_text()
    assert old in text, old
    config.write_text(text.replace(old, new, 1))
    return load_config(config)


# --- input files -----------------------------------------------------------------------------------

def test_missing_column_lists_the_columns_and_the_nearest(tmp_path, capsys):
    astro, ir = _sky()
    astro["parallax"] = astro.pop("plx")
    config = _write_project(tmp_path, astro=astro)
    code, _, err = _cli(capsys, "ingest", "--config", config)
    assert code == 2
    _one_line(err, "astro.parquet: column 'plx' (named by astrometric.columns.parallax) is not in the file",
              "the nearest is 'parallax'", "the file's columns are: sid, ra, dec, ")
    assert not (tmp_path / "out" / "tiles").exists()  # refused before the first row was written


def test_known_objects_column_checked_before_any_catalogue_is_ingested(project, capsys):
    cfg = load_config(project)
    before = layout_of(cfg).current_generation()
    Path(cfg.base_dir, "known.csv").write_text(KNOWN_CSV.replace("cls", "klass"))
    code, _, err = _cli(capsys, "ingest", "--config", project)
    assert code == 2
    _one_line(err, "known.csv: column 'cls' (named by known.columns.class)", "the nearest is 'klass'",
              "the file's columns are: n, ra, dec, klass")
    # nothing of the big catalogues was ingested: the same generation is in force, no other beside it
    lay = layout_of(cfg)
    assert lay.current_generation() == before
    assert sorted(p.name for p in lay.tiles_root.iterdir()) == ["current", before]


@pytest.mark.parametrize("kind, content, needle", [
    ("empty_csv", b"", "is empty (0 bytes)"),
    ("gzip_csv", gzip.compress(b"sid,ra\n1,2\n", mtime=0), "is gzip-compressed; name it .csv.gz"),
    ("parquet_csv", None, "is a Parquet file; name it .parquet"),
    ("semicolon_csv", b"sid;ra;dec\n1;2;3\n", "line 1 separates its fields with semicolons, not commas"),
])
def test_misleading_csv_files_say_what_they_really_are(tmp_path, capsys, kind, content, needle):
    config = _write_project(tmp_path, astro_file="astro.csv")
    if content is None:
        shutil.copy(tmp_path / "astro.parquet", tmp_path / "astro.csv")
    else:
        (tmp_path / "astro.csv").write_bytes(content)
    code, _, err = _cli(capsys, "ingest", "--config", config)
    assert code == 2
    _one_line(err, f"{tmp_path / 'astro.csv'}: {needle}")


def _csv_sky(tmp_path) -> list[str]:
    astro, _ = _sky()
    pacsv.write_csv(pa.table(astro), tmp_path / "astro.csv")
    return (tmp_path / "astro.csv").read_text().splitlines(keepends=True)


def test_ragged_csv_row_names_its_line(tmp_path, capsys):
    config = _write_project(tmp_path, astro_file="astro.csv")
    lines = _csv_sky(tmp_path)
    lines[41] = lines[41].rstrip("\n") + ",9\n"  # line 42 of the file
    (tmp_path / "astro.csv").write_text("".join(lines))
    code, _, err = _cli(capsys, "ingest", "--config", config)
    assert code == 2
    _one_line(err, "astro.csv: line 42 has 12 fields but the header has 11")


def test_non_utf8_bytes_in_csv_name_their_line(tmp_path, capsys):
    config = _write_project(tmp_path, astro_file="astro.csv")
    lines = _csv_sky(tmp_path)
    data = "".join(lines[:100]).encode() + b"\xff\xfe" + "".join(lines[100:]).encode()
    (tmp_path / "astro.csv").write_bytes(data)
    code, _, err = _cli(capsys, "ingest", "--config", config)
    assert code == 2
    _one_line(err, "astro.csv: line 101 holds bytes that are not UTF-8 text (byte 0xff)")


def test_truncated_fits(tmp_path, capsys):
    _, ir = _sky()
    config = _write_project(tmp_path, ir_file="ir.fits")
    Table(ir).write(tmp_path / "ir.fits")
    data = (tmp_path / "ir.fits").read_bytes()
    (tmp_path / "ir.fits").write_bytes(data[: len(data) // 2])
    code, _, err = _cli(capsys, "ingest", "--config", config)
    assert code == 2
    _one_line(err, "ir.fits: the FITS file is truncated")


# --- configuration ---------------------------------------------------------------------------------

def test_non_utf8_config(tmp_path, capsys):
    config = _write_project(tmp_path)
    text = config.read_bytes().replace(b'output_dir = "out"', b'output_dir = "out\xe9"')
    config.write_bytes(text)
    code, _, err = _cli(capsys, "ingest", "--config", config)
    assert code == 2
    _one_line(err, f"{config}: line 2 is not UTF-8 text (byte 0xe9); save the file as UTF-8")


def test_magnitude_system_is_case_insensitive(tmp_path):
    lower = load_config(_write_project(tmp_path / "a", ir_system="vega"))
    upper = load_config(_write_project(tmp_path / "b", ir_system="VEGA"))
    assert upper.infrared.magnitudes[0].system == "vega"
    assert config_hash(lower) == config_hash(upper)
    assert load_config(_write_project(tmp_path / "c", ir_system="AB")).infrared.magnitudes[1].system == "ab"


@pytest.mark.parametrize("key, value", [("output_folder", "../../elsewhere"), ("history_file", "../../h.sqlite"),
                                        ("output_folder", "/tmp/abs")])
def test_folders_outside_the_output_folder_are_refused(tmp_path, capsys, key, value):
    config = _write_project(tmp_path, targets_extra=f'{key} = "{value}"')
    code, _, err = _cli(capsys, "ingest", "--config", config)
    assert code == 2
    _one_line(err, f"targets.{key} = {value!r} must name a place inside project.output_dir")


# --- the output folder and the disk ----------------------------------------------------------------

def test_output_folder_that_is_a_file(tmp_path, capsys):
    config = _write_project(tmp_path)
    (tmp_path / "out").write_text("not a folder")
    for command in ("ingest", "run"):
        code, _, err = _cli(capsys, command, "--config", config)
        assert code == 2
        _one_line(err, f"{tmp_path / 'out'}: is a file, not a folder")


@contextmanager
def _small_fs(folder: Path, size: str = "4m", readonly: bool = False):
    """A small tmpfs mounted at ``folder`` (root only); the test is skipped where mounting is not allowed."""
    folder.mkdir(parents=True, exist_ok=True)
    opts = f"size={size}" + (",ro" if readonly else "")
    proc = subprocess.run(["mount", "-t", "tmpfs", "-o", opts, "tmpfs", str(folder)], capture_output=True, text=True)
    if proc.returncode != 0:
        pytest.skip(f"cannot mount a small file system here ({proc.stderr.strip() or 'mount failed'}); the disk-full "
                    "and read-only cases need root and a kernel that allows tmpfs mounts")
    try:
        yield folder
    finally:
        subprocess.run(["umount", "-l", str(folder)], capture_output=True)


def _fill(folder: Path, leave_bytes: int) -> None:
    """Fill the file system of ``folder`` up to ``leave_bytes`` free."""
    free = shutil.disk_usage(folder).free
    with open(folder / "filler", "wb") as fh:
        fh.write(b"\0" * max(0, free - leave_bytes))


def test_read_only_output_folder_at_ingest(tmp_path, capsys):
    config = _write_project(tmp_path)
    with _small_fs(tmp_path / "out", readonly=True):
        code, _, err = _cli(capsys, "ingest", "--config", config)
    assert code == 2
    _one_line(err, f"{tmp_path / 'out'}: cannot write in this folder (Read-only file system)")


def test_ingest_refused_up_front_when_the_disk_cannot_hold_it(tmp_path, capsys):
    config = _write_project(tmp_path)
    with _small_fs(tmp_path / "out"):
        _fill(tmp_path / "out", 50_000)
        code, _, err = _cli(capsys, "ingest", "--config", config)
        assert not (tmp_path / "out" / "tiles").exists()
    assert code == 2
    _one_line(err, "MiB free on its device but this ingest needs about", "free some space")


def test_disk_full_while_ingesting_leaves_the_previous_generation(project, capsys, monkeypatch):
    cfg = load_config(project)
    out = Path(cfg.output_dir)
    saved = Path(str(out) + "-saved")
    shutil.move(out, saved)
    with _small_fs(out):
        shutil.copytree(saved, out, dirs_exist_ok=True)
        lay = layout_of(cfg)
        before = lay.current_generation()
        _fill(out, 150_000)
        monkeypatch.setattr(ingest_job, "check_space", lambda *a: 0)  # past the estimate, into the real wall
        code, _, err = _cli(capsys, "ingest", "--config", project)
        assert code == 2
        _one_line(err, "no space left on the device", "free some space")
        assert lay.current_generation() == before and [g.name for g in lay.tiles_root.glob("g*")] == [before]
        _accounted(cfg)


def test_disk_full_while_running_and_reporting(project, capsys, monkeypatch):
    cfg = load_config(project)
    out = Path(cfg.output_dir)
    saved = Path(str(out) + "-saved")
    shutil.move(out, saved)
    with _small_fs(out, size="8m"):
        shutil.copytree(saved, out, dirs_exist_ok=True)
        _fill(out, 100_000)
        monkeypatch.setattr(run_job, "check_run_space", lambda *a: None)
        code, out_text, err = _cli(capsys, "run", "--config", project, "--force", "--workers", "1", "--quiet")
        assert code in (1, 2)
        if code == 2:
            _one_line(err, "no space left on the device")
        else:  # every tile failed with the one-line reason; the committed outputs stayed
            assert "no space left on the device" in out_text and "Traceback" not in out_text + err
        os.remove(out / "filler")
        _fill(out, 20_000)
        code, _, err = _cli(capsys, "report", "--run", layout_of(cfg).run_dir, "--allow-incomplete")
        assert code == 2
        _one_line(err, "report.html: no space left on the device")


# --- two commands at once --------------------------------------------------------------------------

def _hold(folder: Path, command: str):
    """Another process holding the folder alone, as a running `selector <command>` does."""
    code = (f"import sys, time; from selector.store.lock import FolderLock\n"
            f"with FolderLock({str(folder)!r}, {command!r}, exclusive=True):\n"
            f"    print('held', flush=True); time.sleep(60)\n")
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True,
                            env={**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)})
    assert proc.stdout.readline().strip() == "held"
    return proc


@pytest.mark.parametrize("holder, command, needle", [
    ("ingest", "ingest", "another `selector ingest` is using this folder (selector ingest, pid"),
    ("run", "ingest", "another `selector run` is using this folder (selector run, pid"),
    ("run", "targets", "`selector run` is writing this folder (selector run, pid"),
])
def test_a_second_command_is_refused_while_another_holds_the_folder(project, capsys, holder, command, needle):
    cfg = load_config(project)
    before = layout_of(cfg).current_generation()
    proc = _hold(cfg.output_dir, holder)
    try:
        code, _, err = _cli(capsys, command, "--config", project)
    finally:
        proc.kill()
        proc.wait()
    assert code == 2
    _one_line(err, f"{cfg.output_dir}: {needle} {proc.pid}")
    assert layout_of(cfg).current_generation() == before


def test_readers_share_and_writers_wait_for_them(project):
    cfg = load_config(project)
    with FolderLock(cfg.output_dir, "report", exclusive=False), FolderLock(cfg.output_dir, "targets", exclusive=False):
        with pytest.raises(SelectorError, match="another selector command .* is reading this folder"):
            ingest(cfg, log=_quiet)


# --- values and units ------------------------------------------------------------------------------

def test_values_beyond_physical_limits_are_reason_coded_rejects(tmp_path):
    astro, ir = _sky()
    astro["pmra"][:3] = [1e30, -2e4, 5e3]
    astro["plx"][3:5] = [1e12, 999.0]
    astro["epmdec"][5] = 1e5
    cfg = load_config(_write_project(tmp_path, astro=astro))
    summaries = ingest(cfg, log=_quiet)
    s = summaries["astrometric"]
    assert s.rejected == {"beyond_physical_limit": 4}
    assert s.rows_in == s.accepted + sum(s.rejected.values())
    rejects = pq.read_table(layout_of(cfg).ingest_rejects("astrometric")).to_pylist()
    assert sorted(r["input_row"] for r in rejects) == [0, 1, 3, 5]
    assert {r["column"] for r in rejects} == {"pmra", "plx", "epmdec"}
    _accounted(cfg)


def _warnings(lines) -> list[str]:
    return [x for x in lines if x.startswith("warning: ")]


def test_radians_declared_as_degrees_warn_and_strict_keeps_the_previous_tiles(project, capsys):
    cfg = load_config(project)
    ir = pq.read_table(Path(cfg.base_dir) / "ir.parquet")
    for name in ("ra", "dec"):
        ir = ir.set_column(ir.column_names.index(name), name, pa.array(np.radians(ir.column(name).to_numpy())))
    pq.write_table(ir, Path(cfg.base_dir) / "ir.parquet")
    before = layout_of(cfg).current_generation()
    code, _, err = _cli(capsys, "ingest", "--config", project, "--strict")
    assert code == 2
    _one_line(err, "infrared: every position lies within RA 0–6.28°", "check infrared.columns.ra.unit",
              "--strict makes this an error")
    assert layout_of(cfg).current_generation() == before
    lines = []
    ingest(cfg, log=lines.append)
    assert any("infrared.columns.ra.unit" in w for w in _warnings(lines))
    _accounted(cfg)


def test_proper_motions_in_the_wrong_unit_warn(project):
    cfg = _edit(project, 'pmra = "pmra"\npmdec = "pmdec"',
                'pmra = { column = "pmra", unit = "arcsec/yr" }\npmdec = { column = "pmdec", unit = "arcsec/yr" }')
    lines = []
    ingest(cfg, log=lines.append)
    assert any("astrometric.columns.pmra.unit" in w and "mas/yr against arcsec/yr" in w for w in _warnings(lines))
    _accounted(cfg)


def test_ab_magnitudes_declared_as_vega_warn_after_ingest_and_run(project):
    cfg = load_config(project)
    path = Path(cfg.base_dir) / "ir.parquet"
    ir = pq.read_table(path)
    for col, band in (("m3p4", "3.4"), ("m4p6", "4.6")):
        ir = ir.set_column(ir.column_names.index(col), col, pa.array(ir.column(col).to_numpy() + VEGA_TO_AB_MAG[band]))
    pq.write_table(ir, path)
    lines = []
    ingest(cfg, log=lines.append)
    run_job.run(cfg, workers=1, quiet=True, log=lines.append)
    found = [w for w in _warnings(lines) if "infrared.magnitudes[0].system" in w]
    assert len(found) == 2 and all("the values look AB: set system = \"ab\"" in w for w in found)
    assert found[0].startswith("warning: infrared:") and found[1].startswith("warning: run:")


def test_no_candidates_and_tiles_without_a_match(project, capsys, clean):
    cfg = load_config(project)
    merged = _merged(cfg)
    # every infrared position 36 arcsec off (a wrong frame or epoch would do the same)
    path = Path(cfg.base_dir) / "ir.parquet"
    ir = pq.read_table(path)
    ir = ir.set_column(ir.column_names.index("dec"), "dec", pa.array(np.clip(ir.column("dec").to_numpy() + 0.01,
                                                                            -90, 90)))
    pq.write_table(ir, path)
    ingest(cfg, log=_quiet)
    code, _, err = _cli(capsys, "run", "--config", project, "--workers", "1", "--quiet", "--strict")
    assert code == 2
    _one_line(err, "tiles hold sources of both catalogues but not one match", "check match.radius_arcsec",
              "nothing was merged")
    assert _merged(cfg) == merged  # the previous list stays
    lines = []
    result = run_job.run(load_config(project), workers=1, quiet=True, log=lines.append)
    assert result.candidates == 0
    assert any("selected no candidates (no source has an infrared counterpart)" in w for w in _warnings(lines))
    prov = json.loads(layout_of(cfg).provenance.read_text())
    assert len(prov["warnings"]) == 2  # said in the outputs too


# --- damaged or missing tiles ----------------------------------------------------------------------

def _tile_of(cfg, kind, rank=0):
    lay = layout_of(cfg)
    sizes = sorted(lay.list_tiles(kind, cfg.tiling.order), key=lambda t: -lay.tile_file(kind, 1, t).stat().st_size)
    return sizes[rank]


@pytest.mark.parametrize("damage", ["deleted", "damaged"])
def test_a_bad_infrared_tile_is_named_in_every_tile_it_blocks(project, capsys, damage):
    cfg = load_config(project)
    lay = layout_of(cfg)
    t = _tile_of(cfg, "infrared")
    path = lay.tile_file("infrared", 1, t)
    if damage == "deleted":
        path.unlink()
    else:
        path.write_bytes(path.read_bytes()[:200])
    code, out, err = _cli(capsys, "run", "--config", project, "--workers", "1", "--quiet")
    assert code == 1 and "Traceback" not in out + err
    with Manifest(lay.manifest) as man:
        failed = {k: r["error"] for k, r in man.tiles().items() if r["status"] == "failed"}
    assert t in failed and len(failed) > 1  # its own tile and the neighbours reading it for their margin
    for error in failed.values():
        # the infrared file is read by every tile for its margin (its own tile too): each names it as the cause
        assert error.startswith(BLOCKED_BY) and str(path) in error and "\n" not in error, error
    assert f"{path} blocks {len(failed)} tiles" in out
    code, _, err = _cli(capsys, "targets", "--config", project)
    _one_line(err, "the run is incomplete", "--allow-incomplete")


# --- the committed set -----------------------------------------------------------------------------

def test_a_bad_model_after_a_good_run_is_refused_up_front(project, capsys, clean):
    cfg = load_config(project)
    (Path(cfg.base_dir) / "bad.skops").write_bytes(b"not a model")
    _edit(project, "[classifier]\n", '[classifier]\nmodel = "bad.skops"\n')
    code, _, err = _cli(capsys, "run", "--config", project, "--workers", "1", "--quiet")
    assert code == 2
    _one_line(err, "bad.skops")
    assert _merged(cfg) == clean["merged"]  # the good list is untouched, and still committed
    with Manifest(layout_of(cfg).manifest) as man:
        assert man.counts()["failed"] == 0
    _edit(project, 'model = "bad.skops"\n', "")
    assert _cli(capsys, "targets", "--config", project)[0] == 0


def test_kill_between_merged_files_is_refused_by_readers(project, capsys):
    _edit(project, "[classifier]\n", "[motion]\nparallax_snr_max = 4.0\n\n[classifier]\n")
    env = {**os.environ, run_job.KILL_AT_ENV: "merge:parquet", "PYTHONPATH": os.pathsep.join(sys.path)}
    proc = subprocess.run([sys.executable, "-m", "selector.cli", "run", "--config", str(project), "--workers", "1",
                           "--quiet"], env=env, capture_output=True, text=True, timeout=300)
    assert proc.returncode == -9
    for argv in (("targets", "--config", project), ("tune", "--config", project),
                 ("report", "--run", Path(project).parent / "out" / "run")):
        code, _, err = _cli(capsys, *argv)
        assert code == 2
        _one_line(err, "the run's merge did not finish", "run `selector run")


def test_two_configs_sharing_one_output_folder(project, capsys):
    other = Path(project).with_name("other.toml")
    other.write_text(project.read_text().replace("[classifier]\n", "[colours]\ncriteria = [\"assef2013_r90\"]\n\n"
                                                                     "[classifier]\n"))
    code, _, err = _cli(capsys, "targets", "--config", other)
    assert code == 2
    _one_line(err, "the run there was made with other [colours] settings than", str(other))
    assert _cli(capsys, "targets", "--config", project)[0] == 0


def test_incomplete_run_is_refused_unless_allowed_and_then_stated(project, capsys):
    cfg = load_config(project)
    lay = layout_of(cfg)
    t = _tile_of(cfg, "astrometric")
    path = lay.tile_file("astrometric", 1, t)
    path.write_bytes(path.read_bytes()[:100])
    assert _cli(capsys, "run", "--config", project, "--workers", "1", "--quiet")[0] == 1
    for argv in (("targets", "--config", project), ("tune", "--config", project), ("train", "--config", project),
                 ("report", "--run", lay.run_dir)):
        code, _, err = _cli(capsys, *argv)
        assert code == 2
        _one_line(err, "the run is incomplete (", f"pass --allow-incomplete to `selector {argv[0]}`")
    code, out, _ = _cli(capsys, "targets", "--config", project, "--allow-incomplete")
    assert code == 0 and "note: the run is incomplete" in out
    prov = json.loads((lay.output_dir / "targets" / "provenance.json").read_text())
    assert prov["candidates"]["complete"] is False and prov["candidates"]["failed_tiles"]
    code, _, _ = _cli(capsys, "report", "--run", lay.run_dir, "--allow-incomplete")
    assert code == 0 and "tiles failed and are missing from this report" in lay.report.read_text()


def test_a_merged_file_replaced_after_the_commit_is_refused(project, capsys):
    cfg = load_config(project)
    path = layout_of(cfg).merged("csv")
    path.write_text(path.read_text() + "\n")
    code, _, err = _cli(capsys, "targets", "--config", project)
    assert code == 2
    _one_line(err, f"{path}: not the file the run committed")


# --- generations -----------------------------------------------------------------------------------

def _cli_ingest(config: Path, kill_at: str | None) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    env.pop(run_job.KILL_AT_ENV, None)
    if kill_at:
        env[run_job.KILL_AT_ENV] = kill_at
    return subprocess.run([sys.executable, "-m", "selector.cli", "ingest", "--config", str(config)], env=env,
                          capture_output=True, text=True, timeout=300)


def _change_data(cfg) -> None:
    """New astrometric data: every other row, so the old and new lists differ."""
    path = Path(cfg.base_dir) / "astro.parquet"
    table = pq.read_table(path)
    pq.write_table(table.take(pa.array(np.arange(0, table.num_rows, 2))), path)


@pytest.mark.parametrize("kill_at", ["ingest:tile@7", "ingest:commit"])
def test_a_killed_reingest_leaves_the_previous_generation_whole(project, clean, kill_at):
    cfg = load_config(project)
    lay = layout_of(cfg)
    before = lay.current_generation()
    _change_data(cfg)
    proc = _cli_ingest(project, kill_at)
    assert proc.returncode == -9, proc.stderr
    assert lay.current_generation() == before and len(list(lay.tiles_root.glob("g*"))) == 2  # the leftover
    # the next run reads the old generation, whole: it has nothing to do and the list is the old one
    result = run_job.run(cfg, workers=1, quiet=True, log=_quiet)
    assert result.ok and result.actions["computed"] == 0 and result.candidates == clean["candidates"]
    assert _merged(cfg) == clean["merged"]
    # the next ingest cleans the leftover and puts the new data in force; the run then uses it alone
    ingest(cfg, log=_quiet)
    assert [p.name for p in lay.tiles_root.glob("g*")] == [lay.current_generation()] != [before]
    _accounted(cfg)
    result = run_job.run(cfg, workers=1, quiet=True, log=_quiet)
    assert result.ok and 0 < result.candidates < clean["candidates"]
    summary = json.loads(lay.ingest_summary("astrometric").read_text())
    assert summary["accepted"] == sum(r for r in summary["rows_per_tile"].values())
    record = json.loads(lay.commit_record.read_text())
    assert record["tiles_generation"] == json.loads(lay.provenance.read_text())["tiles_generation"]


def test_leftovers_of_an_interrupted_ingest_are_removed(project):
    cfg = load_config(project)
    lay = layout_of(cfg)
    stray = lay.tiles_root / "g000099" / "astrometric"
    stray.mkdir(parents=True)
    (stray / "junk.parquet").write_bytes(b"x" * 1000)
    (lay.tiles_root / ".current.abc.tmp").write_text("g000099")
    ingest(cfg, log=_quiet)
    assert sorted(p.name for p in lay.tiles_root.iterdir()) == ["current", lay.current_generation()]
    assert lay.current_generation() == "g000002"  # the leftover went first


def test_stray_temporary_files_of_a_killed_targets_are_removed(project, capsys):
    cfg = load_config(project)
    folder = layout_of(cfg).output_dir / "targets"
    folder.mkdir(parents=True, exist_ok=True)
    old, fresh = folder / ".targets.ecsv.abc123.tmp", folder / ".targets.csv.def456.tmp"
    old.write_bytes(b"x" * 10_000)
    fresh.write_bytes(b"y")
    os.utime(old, (time.time() - 3600, time.time() - 3600))
    assert _cli(capsys, "targets", "--config", project)[0] == 0
    assert not old.exists() and fresh.exists()  # a fresh one may belong to another command writing now


# --- where the job runs ----------------------------------------------------------------------------

def test_the_same_job_from_another_folder_gives_the_same_bytes(clean, tmp_path):
    elsewhere = tmp_path / "somewhere" / "else"
    shutil.copytree(clean["root"], elsewhere, ignore=shutil.ignore_patterns("out"))
    config = elsewhere / "faults.toml"
    # an absolute output folder, as a cron job would write it
    config.write_text(config.read_text().replace('output_dir = "out"', f'output_dir = "{elsewhere / "out"}"'))
    cfg = load_config(config)
    ingest(cfg, log=_quiet)
    assert run_job.run(cfg, workers=1, quiet=True, log=_quiet).ok
    assert _merged(cfg) == clean["merged"]
    prov = json.loads(layout_of(cfg).provenance.read_text())
    assert prov["config"]["project"]["output_dir"] == "out"
    assert set(prov["input_fingerprints"]["astrometric"]) == {"astro.parquet"}


def test_every_fault_kind_has_a_test():
    """The battery's count: every kind listed is exercised above, and ends in one line or a warning."""
    names = {name for name in globals() if name.startswith("test_")}
    assert len(FAULT_KINDS) == 40 and len(names) >= 29
