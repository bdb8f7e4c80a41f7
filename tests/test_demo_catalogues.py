"""The committed demo_catalogues/ folder is exactly what write_demo_catalogues writes, and usable."""

from pathlib import Path

import numpy as np
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest
from astropy.table import Table

from selector.demo import mocksky as demo
from selector.settings.config import load_config

FOLDER = Path(__file__).resolve().parents[1] / "demo_catalogues"


@pytest.fixture(scope="module")
def fresh(tmp_path_factory):
    """The catalogues regenerated with the defaults into a temporary folder."""
    return demo.write_demo_catalogues(tmp_path_factory.mktemp("demo_catalogues"))


def _frame(path):
    """Table contents as pandas, whatever the format (CSV text is compared after parsing)."""
    if path.suffix == ".parquet":
        return pq.read_table(path).to_pandas()
    if path.suffix == ".csv":
        return pacsv.read_csv(path).to_pandas()
    return Table.read(path, format="ascii.ecsv").to_pandas()


@pytest.mark.parametrize("name", ["astrometric", "infrared", "known", "truth"])
def test_committed_tables_equal_regenerated(fresh, name):
    committed = FOLDER / fresh[name].name
    assert committed.is_file(), f"{committed} missing: run write_demo_catalogues('demo_catalogues')"
    a, b = _frame(committed), _frame(fresh[name])
    assert list(a.columns) == list(b.columns)
    # pandas' equals treats NaN in the same place as equal.
    assert a.equals(b), f"{committed.name} differs from write_demo_catalogues(); regenerate it"


def test_units_travel_with_the_files(fresh):
    astro = pq.read_table(FOLDER / "astrometric.parquet")
    assert astro.schema.field("ext_excess").metadata[b"unit"] == b"mag"
    assert astro.schema.field("plx").metadata[b"unit"] == b"mas"
    known = Table.read(FOLDER / "known.ecsv", format="ascii.ecsv")
    assert str(known["ra_k"].unit) == "deg"
    truth = pq.read_table(FOLDER / "truth.parquet")
    assert truth.schema.field("true_lbol_erg_s").metadata[b"unit"] == b"erg/s"


def test_config_is_the_regenerated_one_and_loads(fresh):
    assert (FOLDER / "config.toml").read_text() == fresh["config"].read_text()
    cfg = load_config(FOLDER / "config.toml")
    assert cfg.output_dir == FOLDER / "output"
    for path in (*cfg.astrometric.files, *cfg.infrared.files, *cfg.known.files):
        assert (Path(cfg.base_dir) / path).is_file(), path


def test_small_and_a_few_thousand_rows():
    total = sum(p.stat().st_size for p in FOLDER.iterdir() if p.is_file())
    assert total < 2_000_000
    n_astro = pq.read_metadata(FOLDER / "astrometric.parquet").num_rows
    n_ir = pacsv.read_csv(FOLDER / "infrared.csv").num_rows
    assert 1000 < n_astro < 10_000 and 1000 < n_ir < 10_000


def test_readme_names_every_column(fresh):
    readme = (FOLDER / "README.md").read_text()
    for name in ("astrometric", "infrared", "known", "truth"):
        for column in _frame(fresh[name]).columns:
            assert f"`{column}`" in readme or column.endswith("_unc"), (name, column)


def test_every_population_and_both_kinds_of_very_bright_quasar(fresh):
    truth = pq.read_table(FOLDER / "truth.parquet").to_pandas()
    assert set(truth.population) == {"star", "brown_dwarf", "galaxy", "quasar", "bright_quasar"}
    bright = truth[(truth.population == "bright_quasar") & (truth.catalogue == "astrometric")]
    assert (bright.redshift < 1.0).any() and (bright.redshift > 2.0).any()
    assert np.isfinite(bright.true_lbol_erg_s).all()
