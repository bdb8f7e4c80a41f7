"""The [quality] cuts: the point-source test, the match-quality cut, their config checks and ingest of the roles."""

from __future__ import annotations

import dataclasses

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from selector.core import schema
from selector.core.selection import cutflow, select, skipped_cut_notes
from selector.errors import ConfigError
from selector.jobs import ingest, tune
from selector.jobs.train.features import feature_specs
from selector.store.layout import layout_of

from conftest import base_config, build, random_astro, random_ir, write_parquet


def _rows(extent, extent_err=None, astro_flag=None, ir_flag=None, p_match=None):
    """Zero-motion, red sources that differ only in the point-source (or match) columns."""
    n = len(extent)
    cols = {
        "astro_id": np.arange(n, dtype=np.int64),
        "parallax_mas": np.full(n, -0.017), "parallax_error_mas": np.full(n, 0.2),
        "pmra_mas_yr": np.zeros(n), "pmdec_mas_yr": np.zeros(n),
        "pmra_error_mas_yr": np.full(n, 0.2), "pmdec_error_mas_yr": np.full(n, 0.2),
        "ir_3p4_vegamag": np.full(n, 14.0), "ir_4p6_vegamag": np.full(n, 13.0),
        schema.EXTENT_COLUMN: np.asarray(extent, float),
    }
    if extent_err is not None:
        cols[schema.EXTENT_ERROR_COLUMN] = np.asarray(extent_err, float)
    if astro_flag is not None:
        cols[schema.ASTRO_EXTENDED_FLAG_COLUMN] = np.asarray(astro_flag, float)
    if ir_flag is not None:
        cols[schema.IR_EXTENDED_FLAG_COLUMN] = np.asarray(ir_flag, float)
    if p_match is not None:
        cols["match_probability"] = np.asarray(p_match, float)
    return pa.table(cols)


def _config(quality=None, astro_roles=("extent", "extent_error", "extended_flag"), ir_roles=("extended_flag",)):
    data = base_config()
    for role in astro_roles:
        data["astrometric"]["columns"][role] = f"col_{role}"
    for role in ir_roles:
        data["infrared"]["columns"][role] = f"col_{role}"
    if quality is not None:
        data["quality"] = quality
    return build(data)


def test_point_source_cut_removes_extended_rows_and_keeps_point_rows():
    # 0 point; 1 point within noise; 2 extended; 3 flagged in the astrometric catalogue; 4 flagged in the
    # infrared; 5 extent not measured (kept: absence is no evidence of a galaxy); 6 exactly at the limit
    table = _rows([0.0, 0.05, 0.4, 0.0, 0.0, np.nan, 0.1], astro_flag=[0, 0, 0, 1, 0, 0, np.nan],
                  ir_flag=[0, 0, 0, 0, 1, 0, 0], extent_err=np.full(7, 0.02))
    sel = select(table, _config({"extent_max_mag": 0.1}))
    stages = dict(sel.stages)
    assert "point_source" in stages
    assert list(np.flatnonzero(stages["point_source"])) == [0, 1, 5, 6]
    assert list(np.flatnonzero(sel.passed)) == [0, 1, 5, 6]


def test_extent_significance_and_switching_the_flags_off():
    table = _rows([0.0, 0.05, 0.09, 0.0], extent_err=[0.02, 0.02, 0.05, 0.02], astro_flag=[0, 0, 0, 1],
                  ir_flag=[0, 0, 0, 0])
    # 0.05 ± 0.02 is 2.5 sigma, 0.09 ± 0.05 is 1.8 sigma
    sel = select(table, _config({"extent_max_mag": 0.1, "extent_snr_max": 2.0, "reject_extended_flags": False}))
    assert list(np.flatnonzero(sel.passed)) == [0, 2, 3]


def test_point_source_cut_is_left_out_without_the_roles():
    table = _rows([0.0, 0.4])
    sel = select(table, _config(astro_roles=(), ir_roles=()))
    assert "point_source" not in dict(sel.stages)
    assert list(np.flatnonzero(sel.passed)) == [0, 1]
    assert any(n.startswith("point_source: skipped") for n in skipped_cut_notes(_config(astro_roles=(), ir_roles=())))


def test_quality_stages_appear_in_the_cutflow_in_order():
    table = _rows([0.0, 0.4, 0.0], astro_flag=[0, 0, 0], ir_flag=[0, 0, 0])
    sel = select(table, _config())
    flow = cutflow(5, 3, sel)
    assert [n for n, _ in flow] == ["input", "matched", "astrometric_solution", "negative_parallax", "joint_motion",
                                    "point_source", "infrared_colour"]
    assert dict(flow)["point_source"] == 2


def _probabilistic(cfg):
    """``cfg`` as the probabilistic match would give it (the key arrives with the match half of the issue)."""
    return dataclasses.replace(cfg, match=dataclasses.replace(cfg.match, method="probabilistic"))


def test_match_quality_cut_with_a_match_probability_column():
    table = _rows([0.0] * 4, p_match=[0.99, 0.8, 0.79, np.nan])
    cfg = _probabilistic(_config({"match_probability_min": 0.8}))
    sel = select(table, cfg)
    names = [n for n, _ in sel.stages]
    assert names[:2] == ["matched", "match_quality"]
    assert list(np.flatnonzero(dict(sel.stages)["match_quality"])) == [0, 1]
    assert not sel.notes
    # the probability and the competitor count become classifier inputs with that match
    names = [f.name for f in feature_specs(cfg)]
    assert "match_probability" in names and "n_competitors" in names
    assert schema.EXTENT_COLUMN in names and schema.IR_EXTENDED_FLAG_COLUMN in names
    assert "match_probability" in tune.needed_columns(cfg)


def test_match_quality_cut_is_a_stated_no_op_without_probabilities():
    table = _rows([0.0, 0.0])
    base = _config()
    nearest = dataclasses.replace(base, match=dataclasses.replace(base.match, method="nearest"))
    sel = select(table, nearest)
    assert "match_quality" not in dict(sel.stages)
    assert sel.notes and "nearest" in sel.notes[0]
    assert "match_probability" not in [f.name for f in feature_specs(nearest)]
    # a probabilistic configuration over a cache written without the column: skipped, said so
    sel = select(table, _probabilistic(nearest))
    assert "match_quality" not in dict(sel.stages) and "no match_probability column" in sel.notes[0]


@pytest.mark.parametrize("quality, message", [
    ({"match_probability_min": 1.5}, r"quality\.match_probability_min = 1\.5 is out of range"),
    ({"extent_max": 0.1}, r"unknown key 'quality\.extent_max' \(did you mean"),
    ({"reject_extended_flags": "yes"}, r"quality\.reject_extended_flags = 'yes' has the wrong type"),
    ({"negative_parallax_snr_max": -1.0}, r"quality\.negative_parallax_snr_max = -1\.0 is out of range"),
])
def test_bad_quality_keys_are_one_line_errors(quality, message):
    with pytest.raises(ConfigError, match=message) as info:
        _config(quality)
    assert "\n" not in str(info.value)


def test_bad_motion_test_and_snr_cut_without_its_roles():
    data = base_config()
    data["motion"] = {"test": "jiont"}
    with pytest.raises(ConfigError, match=r"motion\.test = 'jiont' is not allowed; choose one of 'joint', "
                                          r"'separate' \(did you mean 'joint'\?\)"):
        build(data)
    with pytest.raises(ConfigError, match=r"quality\.extent_snr_max = 3\.0 needs the extent and extent_error"):
        _config({"extent_snr_max": 3.0}, astro_roles=("extent",))
    with pytest.raises(ConfigError, match=r"infrared\.columns\.extended_flag is .*takes no unit"):
        data = base_config()
        data["infrared"]["columns"]["extended_flag"] = {"column": "f", "unit": "mag"}
        build(data)


def test_ingest_maps_the_point_source_roles(tmp_path, rng):
    n = 50
    astro = random_astro(n, rng)
    astro["ext"] = rng.normal(0.0, 0.02, n) * 1000.0  # given in mmag
    astro["ext_err"] = np.full(n, 20.0)
    astro["resolved"] = np.arange(n) % 5 == 0  # a boolean flag
    write_parquet(astro, tmp_path / "astro.parquet")
    ir = random_ir(n, rng, ra=astro["ra"], dec=astro["dec"])
    ir["extflag"] = (np.arange(n) % 7 == 0).astype(np.int64) * 3  # any nonzero value means set
    write_parquet(ir, tmp_path / "ir.parquet")
    data = base_config()
    data["astrometric"]["columns"].update(extent={"column": "ext", "unit": "mmag"},
                                          extent_error={"column": "ext_err", "unit": "mmag"},
                                          extended_flag="resolved")
    data["infrared"]["columns"]["extended_flag"] = "extflag"
    cfg = build(data, tmp_path)
    ingest.ingest(cfg, log=lambda *a: None)
    lay = layout_of(cfg)
    tables = [pq.read_table(p) for p in sorted(lay.order_dir("astrometric", cfg.tiling.order).glob("*.parquet"))]
    t = pa.concat_tables(tables).sort_by("astro_id")
    assert np.allclose(t.column(schema.EXTENT_COLUMN).to_numpy(), astro["ext"] / 1000.0)
    assert np.allclose(t.column(schema.EXTENT_ERROR_COLUMN).to_numpy(), 0.02)
    assert list(t.column(schema.ASTRO_EXTENDED_FLAG_COLUMN).to_numpy()) == list(astro["resolved"].astype(float))
    tables = [pq.read_table(p) for p in sorted(lay.order_dir("infrared", cfg.tiling.order).glob("*.parquet"))]
    flags = pa.concat_tables(tables).sort_by("ir_id").column(schema.IR_EXTENDED_FLAG_COLUMN).to_numpy()
    assert set(np.unique(flags)) == {0.0, 1.0} and flags.sum() == np.sum(ir["extflag"] > 0)
