"""The command: version, help for every subcommand, one-line errors, and the demo end to end."""

from __future__ import annotations

import subprocess
import sys

import pytest

from selector import __version__
from selector.cli import build_parser, main


def test_version(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["--version"])
    assert exc.value.code == 0
    assert capsys.readouterr().out.strip() == f"selector {__version__}"


def test_every_subcommand_has_help(capsys):
    sub = next(a for a in build_parser()._actions if a.dest == "command")
    names = set(sub.choices)
    assert {"ingest", "run", "demo", "status", "train", "tune", "report", "targets", "outcome", "weigh"} <= names
    for name in sorted(names):
        with pytest.raises(SystemExit) as exc:
            main([name, "--help"])
        assert exc.value.code == 0
        assert "usage: selector " + name in capsys.readouterr().out


def test_bad_config_is_one_line_without_traceback(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[tiling]\norder = 'five'\n")
    proc = subprocess.run([sys.executable, "-m", "selector.cli", "ingest", "--config", str(bad)],
                          capture_output=True, text=True)
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in proc.stderr
    assert lines[0].startswith("selector: ") and "bad.toml" in lines[0]


def test_missing_input_file_is_one_line(tmp_path):
    from conftest import BASE

    cfg = tmp_path / "c.toml"
    cfg.write_text(
        '[astrometric]\nfiles = ["nowhere.parquet"]\nepoch_jyear = 2016.0\nposition_floor_arcsec = 0.001\n'
        '[astrometric.columns]\n' + "".join(f'{k} = "{v}"\n' for k, v in BASE["astrometric"]["columns"].items()) +
        '[infrared]\nfiles = ["ir.parquet"]\nepoch_jyear = 2010.0\nposition_floor_arcsec = 0.8\n[infrared.columns]\nid = "a"\nra = "b"\ndec = "c"\n'
        '[[infrared.magnitudes]]\nband = "3.4"\ncolumn = "m3p4"\n[[infrared.magnitudes]]\nband = "4.6"\ncolumn = "m4p6"\n')
    proc = subprocess.run([sys.executable, "-m", "selector.cli", "ingest", "--config", str(cfg)],
                          capture_output=True, text=True)
    assert proc.returncode == 2
    assert proc.stderr.strip().splitlines() == [f"selector: {tmp_path / 'nowhere.parquet'}: no such file"]


def test_demo_runs_the_whole_job(demo_command):
    # the demo is run once per session (tests/conftest.py); tests/test_tables.py reads its outputs too
    assert demo_command.code == 0
    out = demo_command.out
    assert "true quasars recovered above the completeness limit" in out
    for path in ("demo.toml", "catalogues/truth.parquet", "output/run/candidates.ecsv", "output/run/report.html",
                 "output/targets/targets.ecsv", "output/targets/targets.txt", "output/targets/targets_full.ecsv",
                 "output/targets/summary.txt"):
        assert (demo_command.folder / path).is_file(), path


def test_command_start_up_imports_no_heavy_library():
    # `selector --help` and `--version` must start in a blink: the parser module may not pull in the
    # plotting library, the columnar library or the machine-learning library (they load with the
    # command that needs them). Checked on the modules a fresh interpreter holds, not on a time.
    code = ("import sys, selector.cli; selector.cli.build_parser(); "
            "print(' '.join(sorted({m.split('.')[0] for m in sys.modules})))")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    loaded = set(proc.stdout.split())
    assert "selector" in loaded
    assert not loaded & {"matplotlib", "pyarrow", "sklearn", "healpy", "astropy", "numpy", "pandas", "scipy"}



def test_run_and_ingest_do_not_import_the_plotting_library():
    # the jobs that only file and match rows never draw, so they must not pay for the plotting
    # library's import (nor healpy, whose package loads it). Checked in a fresh interpreter.
    code = ("import sys, selector.jobs.run, selector.jobs.ingest; "
            "print(' '.join(sorted({m.split('.')[0] for m in sys.modules})))")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    loaded = set(proc.stdout.split())
    assert "selector" in loaded and "numpy" in loaded
    assert not loaded & {"matplotlib", "healpy"}

def test_version_is_the_installed_distributions():
    # the version is read from the distribution folder's name, which must agree with the packaging
    # library's answer (PEP 376: <name>-<version>.dist-info)
    from importlib.metadata import PackageNotFoundError, version

    from selector import DISTRIBUTION

    try:
        expected = version(DISTRIBUTION)
    except PackageNotFoundError:
        pytest.skip(f"{DISTRIBUTION} is not installed")
    assert __version__ == expected


def test_every_command_help_ends_with_an_example_and_no_doubled_default(capsys):
    sub = next(a for a in build_parser()._actions if a.dest == "command")
    for name in sorted(sub.choices):
        with pytest.raises(SystemExit):
            main([name, "--help"])
        out = capsys.readouterr().out
        assert f"example: selector {name} " in out, name
        assert "(default: None)" not in out, name
        assert all(line.count("default") <= 1 for line in out.splitlines()), name


def test_report_takes_the_config_like_every_other_command(capsys):
    parser = build_parser()
    args = parser.parse_args(["report", "--config", "my.toml"])
    assert args.config == "my.toml" and args.run is None
    assert parser.parse_args(["report", "--run", "out/run"]).run == "out/run"
    for argv in (["report"], ["report", "--config", "a.toml", "--run", "b"]):
        with pytest.raises(SystemExit) as exc:
            parser.parse_args(argv)
        assert exc.value.code == 2
    capsys.readouterr()


def test_distribution_name_is_our_own():
    """The distribution has its own name on the package index (`selector` there is another project);
    the import package and the command keep the design's name."""
    import tomllib
    from pathlib import Path

    import selector

    project = tomllib.loads((Path(__file__).resolve().parents[1] / "pyproject.toml").read_text())["project"]
    assert project["name"] == selector.DISTRIBUTION == "quasar-selector"
    assert project["scripts"] == {"selector": "selector.cli:main"}
