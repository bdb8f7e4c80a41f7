"""Shared helpers: small synthetic catalogues written in any format, and configs that describe them."""

from __future__ import annotations

import copy
import os
from pathlib import Path

import numpy as np
import pytest

os.environ.setdefault("MPLBACKEND", "Agg")

from selector.settings.config import from_dict  # noqa: E402

#: A minimal valid configuration as plain data; tests copy and edit it.
BASE = {
    "project": {"output_dir": "out"},
    "tiling": {"order": 2},
    "astrometric": {
        "files": ["astro.parquet"],
        "epoch_jyear": 2016.0,
        # no positional error columns here: floors stand in for them (the probabilistic match needs one)
        "position_floor_arcsec": 0.001,
        "columns": {
            "id": "sid", "ra": "ra", "dec": "dec", "parallax": "plx", "parallax_error": "eplx",
            "pmra": "pmra", "pmdec": "pmdec", "pmra_error": "epmra", "pmdec_error": "epmdec",
        },
        "magnitudes": [{"band": "broad", "column": "g", "error_column": "eg", "system": "ab"}],
    },
    "infrared": {
        "files": ["ir.parquet"],
        "epoch_jyear": 2010.0,
        # 5 sigma of 0.8 arcsec is the default largest radius, 4 arcsec: every pair within it is a candidate
        "position_floor_arcsec": 0.8,
        "columns": {"id": "irid", "ra": "ra", "dec": "dec"},
        "magnitudes": [
            {"band": "3.4", "column": "m3p4", "error_column": "e_m3p4"},
            {"band": "4.6", "column": "m4p6", "error_column": "e_m4p6"},
        ],
    },
}


def base_config() -> dict:
    return copy.deepcopy(BASE)


def build(data: dict, base_dir: Path = Path(".")):
    return from_dict(data, base_dir=base_dir)


def random_astro(n: int, rng: np.random.Generator, ra=None, dec=None):
    """Astrometric rows with the column names of :data:`BASE` (zero true motion)."""
    if ra is None:
        ra = rng.uniform(0, 360, n)
        dec = np.degrees(np.arcsin(rng.uniform(-1, 1, n)))
    return {
        "sid": np.arange(1, n + 1, dtype=np.int64), "ra": ra, "dec": dec,
        "plx": rng.normal(0, 0.1, n), "eplx": np.full(n, 0.1),
        "pmra": rng.normal(0, 0.1, n), "pmdec": rng.normal(0, 0.1, n),
        "epmra": np.full(n, 0.1), "epmdec": np.full(n, 0.1),
        "g": rng.uniform(16, 20, n), "eg": np.full(n, 0.01),
    }


def random_ir(n: int, rng: np.random.Generator, ra=None, dec=None):
    if ra is None:
        ra = rng.uniform(0, 360, n)
        dec = np.degrees(np.arcsin(rng.uniform(-1, 1, n)))
    m4p6 = rng.uniform(12, 16, n)
    return {
        "irid": np.array([f"IR{i:07d}" for i in range(n)]), "ra": ra, "dec": dec,
        "m3p4": m4p6 + rng.uniform(-0.2, 1.5, n), "e_m3p4": np.full(n, 0.03),
        "m4p6": m4p6, "e_m4p6": np.full(n, 0.05),
    }


def write_parquet(columns: dict, path: Path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    pq.write_table(pa.table(columns), path)
    return path


@pytest.fixture
def rng():
    return np.random.default_rng(12345)


@pytest.fixture(scope="session")
def small_demo(tmp_path_factory):
    """One finished demo run at a small scale, shared by every test module that only reads it.

    Returns (config, config path, truth path). Tests that change a run copy its folder first.
    """
    from selector.demo import mocksky
    from selector.jobs.ingest import ingest
    from selector.jobs.run import run
    from selector.settings.config import load_config

    tmp = tmp_path_factory.mktemp("small_demo")
    paths = mocksky.write_mock_sky(mocksky.make_mock_sky(seed=2, scale=0.03), tmp / "catalogues")
    path = mocksky.write_demo_config(tmp)
    cfg = load_config(path)
    ingest(cfg, log=lambda *a: None)
    run(cfg, workers=1, quiet=True, log=lambda *a: None)
    return cfg, path, paths["truth"]


class DemoCommand:
    """The demo run once per session: its folder, exit code and what it printed."""

    def __init__(self, folder: Path, code: int, out: str):
        self.folder, self.code, self.out = folder, code, out


@pytest.fixture(scope="session")
def demo_command(tmp_path_factory) -> DemoCommand:
    """``selector demo`` at scale 0.03 with one worker (ingest, run, truth, targets, report), run once for the
    tests of the whole command and of its written tables."""
    import contextlib
    import io

    from selector.cli import main

    folder = tmp_path_factory.mktemp("demo")
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        code = main(["demo", "--out", str(folder), "--scale", "0.03", "--workers", "1"])
    return DemoCommand(folder, code, out.getvalue())
