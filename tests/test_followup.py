"""Follow-up target lists: known objects, drop reasons, output formats, candidate history, outcomes.

Candidate lists are small synthetic tables written straight to ``run/candidates.parquet``; the
pipeline is not run. Checks of the astronomy against astropy are in tests/external/test_observability.py.
"""

from __future__ import annotations

import hashlib
import json
import math
import re
import sqlite3

import numpy as np
import pyarrow as pa
import pytest
from astropy.table import Table

from selector.core.observability import priority_classes, sexagesimal
from selector.jobs import targets as fu
from selector.jobs.targets import lists
from selector.jobs.targets.known import read_known
from selector.store.history import read_history, score_history
from selector.cli import main
from selector.errors import ConfigError, InputError
from selector.jobs.run.commit import commit
from selector.store.io import format_columns, write_json, write_parquet, write_text
from selector.store.layout import layout_of

from conftest import base_config, build

SITE = {"name": "test site", "latitude_deg": -30.0, "longitude_deg": -70.0, "height_m": 2400.0}
# A short range keeps the tests fast; in April, RA ~ 13 h culminates near local midnight.
TARGETS = {"site": SITE, "start_date": "2027-04-01", "end_date": "2027-04-11"}


def _data(tmp_path, known=False, **targets):
    data = base_config()
    data["targets"] = {**TARGETS, **targets}
    if known:
        data["known"] = {"files": ["known.csv"], "columns": {"name": "n", "ra": "ra", "dec": "dec", "class": "cls"}}
    return data


def _candidates(cfg, ids, ra, dec, score, mag46=None, run_hash="run-a"):
    n = len(ids)
    ids = np.asarray(ids)
    table = pa.table({
        "astro_id": pa.array(ids, pa.int64() if ids.dtype.kind in "iu" else pa.string()),
        "ra_deg": np.asarray(ra, float), "dec_deg": np.asarray(dec, float),
        "parallax_mas": np.zeros(n), "ir_3p4_vegamag": np.full(n, 14.0),
        "ir_4p6_vegamag": np.full(n, 13.0) if mag46 is None else np.asarray(mag46, float),
        "opt_broad_abmag": np.full(n, 18.0), "criteria_score": np.asarray(score, float),
        "ir_id": pa.array([f"IR{i}" for i in range(n)]),
    })
    write_parquet(table, layout_of(cfg).run_dir / "candidates.parquet",
                  {"provenance": {"config_hash": run_hash, "selector_version": "test"}})


def _commit(cfg):
    """Make a hand-written candidate list a committed run set, as `selector run` leaves it, so the
    commands (which check the commit record) accept it."""
    lay = layout_of(cfg)
    prov = {"config_hash": "run-a", "selector_version": "test", "complete": True, "failed_tiles": []}
    for kind in ("ecsv", "csv", "cutflow"):
        write_text("", lay.merged(kind))
    write_json(prov, lay.provenance)
    commit(cfg, lay, prov, merge_key="test")


def _known_objects(cfg, names, ra, dec, classes, z):
    table = pa.table({"known_name": pa.array(names), "ra_deg": np.asarray(ra, float),
                      "dec_deg": np.asarray(dec, float), "known_class": pa.array(classes),
                      "redshift": np.asarray(z, float)})
    write_parquet(table, layout_of(cfg).tiles_dir / "known" / "objects.parquet")


def _toml(data: dict, prefix: str = "") -> str:
    """Just enough TOML for the test configurations (tables, arrays of tables, scalars, lists)."""
    def value(v):
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, (list, tuple)):
            return "[" + ", ".join(value(x) for x in v) + "]"
        return json.dumps(v)

    plain = [f"{k} = {value(v)}" for k, v in data.items()
             if not isinstance(v, dict) and not (isinstance(v, list) and v and isinstance(v[0], dict))]
    out = ([f"[{prefix}]"] if prefix and plain else []) + plain
    for k, v in data.items():
        name = f"{prefix}.{k}" if prefix else k
        if isinstance(v, dict):
            out.append(_toml(v, name))
        elif isinstance(v, list) and v and isinstance(v[0], dict):
            for item in v:
                out.append(f"[[{name}]]\n" + _toml(item, "").strip())
    return "\n".join(out) + "\n"


def _write_config(tmp_path, data):
    path = tmp_path / "selector.toml"
    path.write_text(_toml(data))
    return path


# --- known objects -------------------------------------------------------------------------------

@pytest.mark.parametrize("action", ["remove", "flag"])
def test_known_objects_removed_or_flagged(tmp_path, action):
    cfg = build(_data(tmp_path, known=True, known_action=action, known_radius_arcsec=2.0), tmp_path)
    ra = np.array([195.0, 196.0, 197.0, 198.0])
    dec = np.full(4, -30.0)
    _candidates(cfg, [11, 12, 13, 14], ra, dec, [4.0, 3.0, 2.0, 1.0])
    # 1" from candidate 12, 1.5" from candidate 14, 5" from candidate 13 (outside the 2" radius)
    _known_objects(cfg, ["K-a", "K-b", "K-c"], [196.0, 197.0, 198.0],
                   [-30.0 + 1 / 3600, -30.0 + 5 / 3600, -30.0 - 1.5 / 3600], ["quasar", "star", "galaxy"],
                   [2.1, 0.0, 0.3])
    result = fu.make_targets(cfg, log=lambda *a: None)
    listed = list(result.targets["astro_id"])
    if action == "remove":
        assert listed == [11, 13]
        d = result.dropped
        assert list(d["astro_id"]) == [12, 14]
        assert list(d["reason"]) == ["known_object", "known_object"]
        assert list(d["known_name"]) == ["K-a", "K-c"]
        assert result.counts["dropped"]["known_object"] == 2
    else:
        assert sorted(listed) == [11, 12, 13, 14]
        t = result.targets
        row = {int(i): k for k, i in enumerate(t["astro_id"])}
        assert t["known_name"][row[12]] == "K-a" and t["known_class"][row[12]] == "quasar"
        assert t["known_redshift"][row[12]] == pytest.approx(2.1)
        assert t["known_sep_arcsec"][row[12]] == pytest.approx(1.0, abs=1e-3)
        assert t["known_name"][row[13]] == "" and np.isnan(t["known_sep_arcsec"][row[13]])
        assert t["known_sep_arcsec"][row[14]] == pytest.approx(1.5, abs=1e-3)
        assert result.counts["known_flagged"] == 2


def test_ingested_known_objects_missing_is_one_line(tmp_path):
    cfg = build(_data(tmp_path, known=True), tmp_path)
    _candidates(cfg, [1], [195.0], [-30.0], [1.0])
    with pytest.raises(Exception, match=r"objects.parquet: not found; run `selector ingest") as info:
        fu.make_targets(cfg, log=lambda *a: None)
    assert "\n" not in str(info.value)


def test_known_objects_file_missing_a_column_writes_nothing(tmp_path):
    (tmp_path / "spectra.csv").write_text("name,ra,dec\nK1,195.0,-30.0\n")
    known = {"files": ["spectra.csv"], "columns": {"name": "name", "ra": "ra", "dec": "dec", "class": "kind"}}
    data = _data(tmp_path)
    data["targets"]["known"] = known
    cfg = build(data, tmp_path)
    _candidates(cfg, [1, 2], [195.0, 196.0], [-30.0, -30.0], [1.0, 2.0])
    with pytest.raises(InputError, match=r"spectra.csv: column 'kind' named in the config is not in the file") as info:
        fu.make_targets(cfg, log=lambda *a: None)
    assert "\n" not in str(info.value)
    assert not (cfg.output_dir / "targets").exists()
    assert not (cfg.output_dir / "history.sqlite").exists()


def test_targets_known_file_rows_are_accounted(tmp_path):
    # one good row matching candidate 2, one with an unparsable position (rejected, not matched)
    (tmp_path / "spectra.csv").write_text("name,ra,dec,kind\nK1,196.0,-30.0,star\nK2,oops,-30.0,star\n")
    data = _data(tmp_path)
    data["targets"]["known"] = {"files": ["spectra.csv"],
                                "columns": {"name": "name", "ra": "ra", "dec": "dec", "class": "kind"}}
    cfg = build(data, tmp_path)
    _candidates(cfg, [1, 2], [195.0, 196.0], [-30.0, -30.0], [2.0, 1.0])
    known = read_known(cfg)
    assert (known.rows_in, known.table.num_rows, known.rejected) == (2, 1, {"unparsable_value": 1})
    result = fu.make_targets(cfg, log=lambda *a: None)
    assert list(result.dropped["astro_id"]) == [2]
    rejects = Table.read(result.outputs["known_rejects"], format="ascii.ecsv")
    assert rejects["input_row"].tolist() == [1] and rejects["column"].tolist() == ["ra"]
    assert "2 rows, 1 used; refused: unparsable_value: 1" in result.summary


# --- observability and drop reasons -----------------------------------------------------------------

def test_far_northern_target_from_southern_site_is_dropped_with_reason(tmp_path):
    cfg = build(_data(tmp_path), tmp_path)
    _candidates(cfg, [1, 2], [195.0, 195.0], [80.0, -30.0], [2.0, 1.0])
    result = fu.make_targets(cfg, log=lambda *a: None)
    d = result.dropped
    assert list(d["astro_id"]) == [1]
    assert d["reason"][0] == "below_altitude_limit"
    # transit altitude 90 - |latitude - dec| = 90 - 110 = -20 deg (geometry of the meridian); the
    # declination of date differs from the J2000 one by precession, under 0.2 deg by 2027
    assert d["transit_altitude_deg"][0] == pytest.approx(-20.0, abs=0.2)
    assert "transit altitude -19.9 deg is below the limit of 30.0 deg" in d["detail"][0]
    t = result.targets
    assert list(t["astro_id"]) == [2]
    assert t["transit_altitude_deg"][0] == pytest.approx(90.0, abs=0.2)
    assert t["nights_observable"][0] == 10 and t["observable_hours"][0] > 30
    assert "never above the altitude limit:" in result.summary


def test_daytime_target_is_dropped_as_not_in_dark_time(tmp_path):
    # In early April the Sun is near RA 0 h, dec +5 deg: a target beside it is up only by day.
    cfg = build(_data(tmp_path), tmp_path)
    _candidates(cfg, [1], [12.0], [0.0], [1.0])
    result = fu.make_targets(cfg, log=lambda *a: None)
    assert list(result.dropped["reason"]) == ["not_in_dark_time"]
    assert len(result.targets) == 0


def test_moon_distance_limit_drops_target_near_moon(tmp_path):
    # With a 179-degree limit nothing is ever far enough from the Moon: the reason must say so.
    cfg = build(_data(tmp_path, moon_separation_min_deg=179.0, end_date="2027-04-03"), tmp_path)
    _candidates(cfg, [1], [195.0], [-30.0], [1.0])
    result = fu.make_targets(cfg, log=lambda *a: None)
    assert list(result.dropped["reason"]) == ["moon_too_close"]


def test_airmass_limit_is_the_altitude_of_sec_z(tmp_path):
    cfg = build(_data(tmp_path, airmass_max=2.0), tmp_path)
    # plane-parallel airmass sec(z) = 2 at z = 60 deg (common practice)
    assert cfg.targets.altitude_limit_deg == pytest.approx(30.0)
    assert build(_data(tmp_path), tmp_path).targets.altitude_limit_deg == 30.0


# --- priorities ---------------------------------------------------------------------------------

def test_priority_rule():
    from selector.settings.config import PriorityConfig

    p = PriorityConfig(class1_score_top_fraction=0.2, class1_mag_max=14.0, class1_hours_min=2.0,
                       class2_score_top_fraction=0.6, class2_mag_max=15.0, class2_hours_min=1.0)
    score = np.array([10, 9, 8, 7, 6, 5, 4, 3, 2, 1], float)
    rank = np.arange(1, 11)
    mag = np.array([13, 13, 13, 13, 14.5, 13, 13, np.nan, 13, 13])
    steps = np.full(10, 30)                       # 5 h at 10-minute steps
    steps[1] = 11                                 # 1 h 50 min: under class 1's 2 h
    got = priority_classes(score, rank, mag, steps, step_min=10, priority=p)
    # top 20 % of 10 = ranks 1-2; top 60 % = ranks 1-6
    assert got.tolist() == [1, 2, 2, 2, 2, 2, 3, 3, 3, 3]
    # equal scores are ordered by rank, and 0.1 x 30 means exactly 3 targets in the top
    p = PriorityConfig(class1_score_top_fraction=0.1, class1_mag_max=99.0, class1_hours_min=0.0)
    got = priority_classes(np.ones(30), np.arange(30, 0, -1), np.full(30, 12.0), np.full(30, 6), step_min=10,
                           priority=p)
    assert sorted(np.flatnonzero(got == 1).tolist()) == [27, 28, 29]


def test_priority_classes_in_output_and_summary(tmp_path):
    cfg = build(_data(tmp_path), tmp_path)
    _candidates(cfg, [1, 2, 3, 4, 5], np.full(5, 195.0) + np.arange(5), np.full(5, -30.0), [5, 4, 3, 2, 1],
                mag46=[13.0, 16.0, 15.0, 13.0, 13.0])
    result = fu.make_targets(cfg, log=lambda *a: None)
    t = result.targets
    # top 20 % of 5 is one target; top 60 % is three: 1 → class 1, 2 too faint, 3 class 2, 4-5 class 3
    assert list(t["astro_id"]) == [1, 3, 2, 4, 5]
    assert list(t["priority"]) == [1, 2, 3, 3, 3]
    assert result.counts["priority"] == {"1": 1, "2": 1, "3": 3}
    text = result.summary
    assert "priority class 1:" in text and "observable hours" not in text.lower().replace("most observable hours", "")
    # hours per class: targets × (exposure + overhead), 30 + 10 min by default; cumulative by class
    assert result.counts["hours"] == {"1": pytest.approx(40 / 60), "2": pytest.approx(40 / 60),
                                      "3": pytest.approx(3 * 40 / 60)}
    assert re.search(r"priority class 1\s+1\s+0\.7\s+1\n", text)
    assert re.search(r"all classes\s+5\s+3\.3\s+1\n", text)


# --- output formats -----------------------------------------------------------------------------

def _plain(col):
    """Column values with masked entries as the writer's own blanks ("" for text, NaN for numbers)."""
    if hasattr(col, "filled"):
        kind = col.dtype.kind
        return np.asarray(col.filled("" if kind in "US" else np.nan if kind == "f" else 0))
    return np.asarray(col)


def _same(a, b):
    a, b = _plain(a), _plain(b)
    if a.dtype.kind in "US" or b.dtype.kind in "US":
        return np.array_equal(a.astype(str), b.astype(str))
    return np.allclose(a.astype(float), b.astype(float), rtol=0, atol=0, equal_nan=True)


def test_every_format_reads_back_with_units_and_provenance(tmp_path):
    from astropy.io.votable import parse

    cfg = build(_data(tmp_path, formats=["ecsv", "csv", "votable", "fits"], known=True, known_action="flag"),
                tmp_path)
    _candidates(cfg, [7, 8, 9], [195.0, 200.25, 210.5], [-30.0, -45.5, -10.125], [3.0, 2.0, 1.0],
                mag46=[13.0, 14.2, np.nan])
    _known_objects(cfg, ["K1"], [200.25], [-45.5], ["quasar"], [1.5])
    result = fu.make_targets(cfg, log=lambda *a: None)
    assert len(result.targets) == 3 and result.compact.colnames == list(lists.COMPACT_COLUMNS)
    out = result.outputs
    for kind, ref in (("", result.compact), ("full_", result.targets)):
        _reads_back(out, kind, ref)
    read = {"ecsv": Table.read(out["ecsv"], format="ascii.ecsv"), "fits": Table.read(out["fits"], format="fits")}
    assert read["ecsv"]["ra_deg"].unit == "deg" and read["fits"]["observable_hours"].unit == "h"
    prov = json.loads(out["provenance"].read_text())
    assert read["ecsv"].meta["selector_provenance"] == prov
    assert json.loads(read["fits"].meta["PROVJSON"]) == prov
    infos = {i.name: i.value for i in parse(str(out["votable"])).get_first_table().infos}
    assert json.loads(infos["selector_provenance"]) == prov
    assert prov["candidates"]["config_hash"] == "run-a" and prov["known_objects"]["files"] == "objects.parquet"
    assert "refraction ignored" in prov["method"]
    # provenance names files relative to the config's folder
    assert prov["candidates"]["file"] == "out/run/candidates.parquet"


def _reads_back(out, kind, ref):
    """Every format of one table reads back with its columns, values (text formats at their written
    precision, FITS in full) and units."""
    rounded = format_columns(ref)
    read = {"ecsv": Table.read(out[f"{kind}ecsv"], format="ascii.ecsv"),
            "csv": Table.read(out[f"{kind}csv"], format="ascii.csv"),
            "votable": Table.read(out[f"{kind}votable"], format="votable"),
            "fits": Table.read(out[f"{kind}fits"], format="fits")}
    for fmt, t in read.items():
        assert t.colnames == ref.colnames, fmt
        expect = ref if fmt == "fits" else rounded
        for name in ref.colnames:
            assert _same(t[name], expect[name]), (fmt, name)
            want = lists.unit_of(name)
            # CSV has no unit field: its units come from the column names, as everywhere in the project
            got = lists.unit_of(name) if fmt == "csv" else (None if t[name].unit is None else t[name].unit.to_string())
            assert (got is None) == (want is None), (fmt, name)
            if want:
                assert t[name].unit == want if fmt != "csv" else got == want, (fmt, name)


def test_sexagesimal_matches_astropy_formatting():
    from astropy.coordinates import Angle

    ra = np.array([0.0, 15.0, 123.456789, 359.99999999, 180.0 + 1e-9])
    dec = np.array([0.0, -0.0000001, -45.123456, 89.9999999999, 12.5])
    hms, dms = sexagesimal(ra, dec)
    # reference: astropy Angle.to_string with the same precision (rounding carries into minutes and hours)
    want_ra = Angle(ra, "deg").wrap_at("360d").to_string(unit="hourangle", sep=":", precision=3, pad=True)
    want_dec = Angle(dec, "deg").to_string(unit="deg", sep=":", precision=2, pad=True, alwayssign=True)
    want_ra = [w if w != "24:00:00.000" else "00:00:00.000" for w in want_ra]
    want_dec = [w if w != "-00:00:00.00" else "+00:00:00.00" for w in want_dec]
    assert hms.tolist() == want_ra
    assert dms.tolist() == want_dec


def test_output_is_deterministic(tmp_path):
    cfg = build(_data(tmp_path, formats=["ecsv", "votable", "fits", "csv"]), tmp_path)
    _candidates(cfg, [1, 2, 3], [195.0, 196.0, 80.0], [-30.0, 10.0, 80.0], [3.0, 2.0, 1.0])
    first = fu.make_targets(cfg, log=lambda *a: None)
    before = {k: p.read_bytes() for k, p in first.outputs.items()}
    second = fu.make_targets(cfg, log=lambda *a: None)
    assert second.list_reused and second.list_number == first.list_number
    assert {k: p.read_bytes() for k, p in second.outputs.items()} == before


# --- history and outcomes -----------------------------------------------------------------------

def _statuses(cfg):
    h = read_history(cfg)
    return dict(zip(h.column("astro_id").to_pylist(), h.column("status").to_pylist()))


def test_history_over_three_runs(tmp_path):
    cfg = build(_data(tmp_path), tmp_path)
    ra, dec = np.array([195.0, 196.0, 197.0, 198.0]), np.full(4, -30.0)
    quiet = dict(log=lambda *a: None)

    _candidates(cfg, [1, 2, 3], ra[:3], dec[:3], [3.0, 2.0, 1.0], run_hash="run-1")
    r1 = fu.make_targets(cfg, **quiet)
    assert r1.list_number == 1 and _statuses(cfg) == {1: "new", 2: "new", 3: "new"}

    # list 2: candidate 2's score changes, 3 disappears, 4 appears; --new-only lists what list 1 did not
    _candidates(cfg, [1, 2, 4], ra[[0, 1, 3]], dec[[0, 1, 3]], [3.0, 2.5, 1.0], run_hash="run-2")
    new = fu.make_targets(cfg, new_only=True, **quiet)
    assert new.list_number == 2 and list(new.targets["astro_id"]) == [4]
    assert _statuses(cfg) == {1: "unchanged", 2: "score_changed", 3: "dropped", 4: "new"}
    assert new.outputs["ecsv"].name == "targets_new.ecsv" and new.counts["not_new"] == 2
    assert new.outputs["text"].name == "targets_new.txt" and new.outputs["full_ecsv"].name == "targets_new_full.ecsv"
    # the same again: list 2 is the previous list now, and it holds every target, so nothing is new
    again = fu.make_targets(cfg, new_only=True, **quiet)
    assert again.list_number == 2 and again.list_reused and len(again.targets) == 0 and again.counts["not_new"] == 3
    assert "in the previous list:" in again.summary
    # the full list of the same candidates is that same list 2, with every target
    r2 = fu.make_targets(cfg, **quiet)
    assert r2.list_number == 2 and r2.list_reused and list(r2.targets["astro_id"]) == [1, 2, 4]

    # an outcome for 4, then run 3: 3 comes back, 2 is gone, 4 stays observed and is not re-proposed
    (tmp_path / "spectra.csv").write_text("astro_id,spec_class,redshift\n4,QSO,2.75\n")
    assert fu.record_outcomes(cfg, tmp_path / "spectra.csv", log=lambda *a: None) == 1
    _candidates(cfg, [1, 3, 4], ra[[0, 2, 3]], dec[[0, 2, 3]], [3.0, 1.0, 1.0], run_hash="run-3")
    r3 = fu.make_targets(cfg, **quiet)
    assert r3.list_number == 3
    assert _statuses(cfg) == {1: "unchanged", 2: "dropped", 3: "new", 4: "observed"}
    assert list(r3.targets["astro_id"]) == [1, 3]
    assert list(r3.dropped["reason"]) == ["observed"]
    assert score_history(cfg, 2) == [(1, 2.0, "new"), (2, 2.5, "score_changed")]
    assert [s for _, _, s in score_history(cfg, 3)] == ["new", "new"]
    h = read_history(cfg).to_pylist()
    row1 = next(r for r in h if r["astro_id"] == 1)
    assert (row1["first_list"], row1["last_list"], row1["n_lists"]) == (1, 3, 3)
    assert row1["first_seen_utc"] <= row1["last_seen_utc"]


def test_recorded_outcome_is_a_training_label(tmp_path):
    cfg = build(_data(tmp_path), tmp_path)
    _candidates(cfg, [101, 102, 103], [195.0, 196.0, 197.0], np.full(3, -30.0), [3.0, 2.0, 1.0])
    fu.make_targets(cfg, log=lambda *a: None)
    assert fu.training_labels(cfg).num_rows == 0
    (tmp_path / "spectra.csv").write_text("candidate_id,class,z\n102,star,\n101,quasar,3.1\n")
    fu.record_outcomes(cfg, tmp_path / "spectra.csv", log=lambda *a: None)
    labels = fu.training_labels(cfg)
    assert labels.column_names == ["astro_id", "label", "redshift"]
    assert labels.schema.field("astro_id").type == pa.int64()
    assert labels.to_pylist() == [{"astro_id": 101, "label": "quasar", "redshift": 3.1},
                                  {"astro_id": 102, "label": "star", "redshift": None}]
    assert _statuses(cfg)[101] == "observed"


def test_outcome_for_unknown_candidate_records_nothing(tmp_path):
    cfg = build(_data(tmp_path), tmp_path)
    _candidates(cfg, ["a1", "a2"], [195.0, 196.0], [-30.0, -30.0], [2.0, 1.0])
    fu.make_targets(cfg, log=lambda *a: None)
    (tmp_path / "spectra.csv").write_text("id,spec_class\na1,galaxy\nzz9,star\n")
    with pytest.raises(InputError, match=r"spectra.csv: 1 candidate ids are not in the candidate history "
                                         r"\(data row 2: zz9\); nothing was recorded") as info:
        fu.record_outcomes(cfg, tmp_path / "spectra.csv", log=lambda *a: None)
    assert "\n" not in str(info.value)
    assert fu.training_labels(cfg).num_rows == 0
    assert _statuses(cfg) == {"a1": "new", "a2": "new"}


@pytest.mark.parametrize("text, match", [
    ("astro_id,redshift\n1,2.0\n", r"no class column; name it one of spec_class"),
    ("astro_id,spec_class\n1,nebula\n", r"column 'spec_class', data row 1 .*the class must be one of"),
    ("astro_id,spec_class,z\n1,star,-3\n", r"column 'z', data row 1 .*redshift must be a number"),
    ("astro_id,spec_class\n1,star\n1,quasar\n", r"data row 2 .*more than once"),
    ("astro_id,spec_class\nx1,star\n", r"data row 1 .*candidate ids are integers"),
])
def test_bad_outcome_files_are_one_line_errors(tmp_path, text, match):
    cfg = build(_data(tmp_path), tmp_path)
    _candidates(cfg, [1], [195.0], [-30.0], [1.0])
    fu.make_targets(cfg, log=lambda *a: None)
    (tmp_path / "o.csv").write_text(text)
    with pytest.raises(InputError, match=match) as info:
        fu.record_outcomes(cfg, tmp_path / "o.csv", log=lambda *a: None)
    assert "\n" not in str(info.value)
    assert fu.training_labels(cfg).num_rows == 0


def test_history_commits_only_when_files_are_written(tmp_path, monkeypatch):
    cfg = build(_data(tmp_path, formats=["ecsv", "fits"]), tmp_path)
    _candidates(cfg, [1, 2], [195.0, 196.0], [-30.0, -30.0], [2.0, 1.0])

    def broken(table, tmp, fmt):
        if fmt == "fits":
            raise OSError("disk full")
        tmp.write_text("partial")

    monkeypatch.setattr(lists, "write_table_file", broken)
    with pytest.raises(OSError):
        fu.make_targets(cfg, log=lambda *a: None)
    folder = cfg.output_dir / "targets"
    assert not folder.exists() or not any(folder.iterdir())
    with sqlite3.connect(cfg.output_dir / "history.sqlite") as conn:
        assert conn.execute("SELECT COUNT(*) FROM lists").fetchone()[0] == 0


def test_observability_is_computed_before_the_history_is_locked(tmp_path, monkeypatch):
    cfg = build(_data(tmp_path), tmp_path)
    _candidates(cfg, [1, 2], [195.0, 196.0], [-30.0, -30.0], [2.0, 1.0], run_hash="run-1")
    fu.make_targets(cfg, log=lambda *a: None)
    _candidates(cfg, [1, 2], [195.0, 196.0], [-30.0, -30.0], [2.0, 1.5], run_hash="run-2")
    real, calls = lists.observability, []

    def probe(*args, **kwargs):
        # another writer (`selector outcome`) must get the write lock at once while this runs
        conn = sqlite3.connect(cfg.output_dir / "history.sqlite", timeout=0, isolation_level=None)
        try:
            conn.execute("BEGIN IMMEDIATE")
            conn.execute("ROLLBACK")
        finally:
            conn.close()
        calls.append(len(args[0]))
        return real(*args, **kwargs)

    monkeypatch.setattr(lists, "observability", probe)
    result = fu.make_targets(cfg, log=lambda *a: None)
    assert calls == [2] and result.list_number == 2


def test_outcome_recorded_while_the_list_is_computed(tmp_path, monkeypatch):
    # the outcome arrives after observability was computed for every candidate: the candidate is
    # still dropped as observed, and the list is the one an undisturbed run makes
    def run(folder, raced):
        folder.mkdir()
        cfg = build(_data(folder), folder)
        _candidates(cfg, [1, 2, 3], [195.0, 196.0, 197.0], np.full(3, -30.0), [3.0, 2.0, 1.0], run_hash="run-1")
        fu.make_targets(cfg, log=lambda *a: None)
        (folder / "spectra.csv").write_text("astro_id,spec_class\n2,star\n")
        fu.record_outcomes(cfg, folder / "spectra.csv", log=lambda *a: None)
        _candidates(cfg, [1, 2, 3], [195.0, 196.0, 197.0], np.full(3, -30.0), [3.0, 2.0, 1.5], run_hash="run-2")
        with monkeypatch.context() as m:
            if raced:
                m.setattr(lists, "observed_ids", lambda cfg: set())
            return fu.make_targets(cfg, log=lambda *a: None)

    quiet, raced = run(tmp_path / "quiet", False), run(tmp_path / "raced", True)
    assert list(raced.targets["astro_id"]) == [1, 3]
    assert list(raced.dropped["reason"]) == ["observed"]
    assert raced.summary == quiet.summary and raced.counts == quiet.counts
    for kind in ("ecsv", "dropped", "nights"):
        want = Table.read(quiet.outputs[kind], format="ascii.ecsv")
        got = Table.read(raced.outputs[kind], format="ascii.ecsv")
        assert got.colnames == want.colnames
        for name in want.colnames:
            assert got[name].tolist() == want[name].tolist() or np.array_equal(got[name], want[name], equal_nan=True)


# --- configuration and command line -------------------------------------------------------------

@pytest.mark.parametrize("change, match", [
    ({"site": {**SITE, "latitude_deg": -91.0}}, r"targets.site.latitude_deg = -91.0 is out of range"),
    ({"site": {**SITE, "longitude_deg": 200.0}}, r"targets.site.longitude_deg = 200.0 is out of range"),
    ({"site": {**SITE, "height_m": 12000.0}}, r"targets.site.height_m = 12000.0 is out of range"),
    ({"end_date": "2027-03-01"}, r"targets.end_date = '2027-03-01' is before targets.start_date .* reversed"),
    ({"end_date": "2027-04-01"}, r"the date range is empty"),
    ({"start_date": "April"}, r"targets.start_date = 'April' is not a date written YYYY-MM-DD"),
    ({"airmass_max": 2.0, "altitude_min_deg": 30.0}, r"give altitude_min_deg or airmass_max, not both"),
    ({"sun_altitude_max_deg": 5.0}, r"targets.sun_altitude_max_deg = 5.0 is out of range"),
    ({"formats": ["ecsv", "html"]}, r"targets.formats\[1\] = 'html' is not allowed"),
    ({"priority": {"band": "22"}}, r"targets.priority.band = '22' is not a band of this configuration"),
    ({"time_step_min": 7}, r"targets.time_step_min = 7 does not divide a day"),
])
def test_bad_targets_config_is_one_line(tmp_path, change, match):
    with pytest.raises(ConfigError, match=match) as info:
        build(_data(tmp_path, **change), tmp_path)
    assert "\n" not in str(info.value)


def test_commands_targets_and_outcome(tmp_path, capsys):
    data = _data(tmp_path)
    path = _write_config(tmp_path, data)
    cfg = build(data, tmp_path)
    _candidates(cfg, [1, 2], [195.0, 196.0], [-30.0, 80.0], [2.0, 1.0])
    assert main(["targets", "--config", str(path)]) == 2  # no commit record: not a finished run
    assert "the run's merge did not finish" in capsys.readouterr().err
    _commit(cfg)
    assert main(["targets", "--config", str(path)]) == 0
    out = capsys.readouterr().out
    assert "targets: 1 listed of 2 candidates" in out and "targets.ecsv" in out
    assert main(["targets", "--config", str(path), "--new-only"]) == 0
    assert "targets_new.ecsv" in capsys.readouterr().out
    (tmp_path / "o.csv").write_text("astro_id,spec_class\n3,star\n")
    assert main(["outcome", "--config", str(path), "--file", str(tmp_path / "o.csv")]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("selector: ") and "not in the candidate history" in err and "\n" not in err
    (tmp_path / "o.csv").write_text("astro_id,spec_class\n1,star\n")
    assert main(["outcome", "--config", str(path), "--file", str(tmp_path / "o.csv")]) == 0
    assert "recorded 1 outcomes" in capsys.readouterr().out


def test_command_without_targets_section_names_the_file(tmp_path, capsys):
    data = base_config()
    path = _write_config(tmp_path, data)
    assert main(["targets", "--config", str(path)]) == 2
    err = capsys.readouterr().err
    assert "selector.toml: no [targets] section" in err


def test_missing_candidates_is_one_line(tmp_path):
    cfg = build(_data(tmp_path), tmp_path)
    with pytest.raises(Exception, match=r"candidates.parquet: not found; run `selector run"):
        fu.make_targets(cfg, log=lambda *a: None)


def test_demo_config_has_a_semester_for_the_demo_site():
    from pathlib import Path

    from selector.settings.config import load_config

    cfg = load_config(Path(__file__).resolve().parents[1] / "configs" / "demo.toml")
    t = cfg.targets
    assert t.site.name == "Demo Flats" and (t.start_date, t.end_date) == ("2027-04-01", "2027-10-01")
    assert math.isclose(t.altitude_limit_deg, 30.0)


# --- the list for a telescope ---------------------------------------------------------------------

def test_short_names_are_ours_stable_and_unique(monkeypatch):
    import base64

    ids = [str(i) for i in range(2000)]
    names = lists.short_names(ids, "cand")
    # our scheme: prefix, hyphen, 8 of Crockford's base-32 digits (no I, L, O, U); no coordinates in it
    assert all(re.fullmatch(r"cand-[0-9A-HJKMNP-TV-Z]{8}", n) for n in names)
    assert len(set(names)) == len(names)
    assert lists.short_names(["1999", "5"], "cand").tolist() == [names[1999], names[5]]  # depends on the id alone
    # reference: the standard library's RFC 4648 base 32 of the same digest, its alphabet mapped onto Crockford's
    digest = hashlib.sha256(b"42").digest()[:5]
    rfc = base64.b32encode(digest).decode()
    mapped = rfc.translate(str.maketrans("ABCDEFGHIJKLMNOPQRSTUVWXYZ234567", lists.BASE32_DIGITS))
    assert lists.short_names(["42"], "q").tolist() == [f"q-{mapped}"]
    # names that clash on their first digits get more digits until they differ
    monkeypatch.setattr(lists, "NAME_DIGITS", 1)
    short = lists.short_names(ids[:100], "c")
    assert len(set(short)) == 100 and min(map(len, short)) == 3 and max(map(len, short)) > 3


def test_name_prefix_must_be_a_short_word(tmp_path):
    with pytest.raises(ConfigError, match=r"targets.name_prefix = 'J 12' is not 1 to 8 letters") as info:
        build(_data(tmp_path, name_prefix="J 12"), tmp_path)
    assert "\n" not in str(info.value)


def test_compact_list_states_frame_epoch_and_brightest_bands(tmp_path):
    data = _data(tmp_path, formats=["ecsv", "csv"], name_prefix="hq")
    data["astrometric"]["epoch_jyear"] = 2019.5
    cfg = build(data, tmp_path)
    _candidates(cfg, [1, 2], [195.0, 196.0], [-30.0, -31.0], [2.0, 1.0], mag46=[13.0, np.nan])
    result = fu.make_targets(cfg, log=lambda *a: None)
    c = result.compact
    assert c.colnames == list(lists.COMPACT_COLUMNS)
    assert list(c["frame"]) == ["ICRS", "ICRS"] and list(c["epoch_jyear"]) == [2019.5, 2019.5]
    assert all(n.startswith("hq-") for n in c["name"])
    # 3.4 um at 14.0 Vega is 16.699 AB, 4.6 um at 13.0 Vega is 16.339 AB (offsets of Jarrett et al. 2011,
    # from memory): 4.6 um carries more flux; without 4.6 um, 3.4 um is the brightest
    assert list(c["ir_brightest_band"]) == ["4.6", "3.4"] and list(c["ir_brightest_vegamag"]) == [13.0, 14.0]
    assert list(c["opt_brightest_band"]) == ["broad", "broad"] and list(c["opt_brightest_abmag"]) == [18.0, 18.0]
    assert list(c["ra_hms"]) == ["13:00:00.000", "13:04:00.000"] and list(c["dec_dms"]) == ["-30:00:00.00",
                                                                                             "-31:00:00.00"]
    full = result.targets
    assert full.colnames[:len(c.colnames)] == c.colnames and "parallax_mas" in full.colnames
    assert "Positions: ICRS, epoch J2019.5" in result.summary


def test_brightest_picks_by_flux_density_and_skips_missing():
    from selector.jobs.targets.lists import brightest

    cfg = build(_data("."))
    table = pa.table({"opt_broad_abmag": [18.0, np.nan], "ir_3p4_vegamag": [14.0, np.nan],
                      "ir_4p6_vegamag": [13.5, np.nan]})
    b = brightest(table, np.array([0, 1]), cfg)
    # 13.5 + 3.339 = 16.839 AB at 4.6 um is fainter than 14.0 + 2.699 = 16.699 AB at 3.4 um
    assert b.ir_band.tolist() == ["3.4", ""] and b.ir_vegamag[0] == 14.0 and np.isnan(b.ir_vegamag[1])
    assert b.opt_band.tolist() == ["broad", ""] and np.isnan(b.opt_abmag[1])


def test_plain_text_export_is_one_header_line_and_fixed_width_rows(tmp_path):
    cfg = build(_data(tmp_path), tmp_path)
    _candidates(cfg, [1, 2, 3], [195.0, 196.0, 197.123456789], [-30.0, -31.0, -29.5], [3.0, 2.0, 1.0],
                mag46=[13.0, np.nan, 14.0])
    result = fu.make_targets(cfg, log=lambda *a: None)
    lines = result.outputs["text"].read_text().splitlines()
    assert lines[0].startswith("# ") and lines[0][2:].split() == list(lists.COMPACT_COLUMNS)
    assert not any(line.startswith("#") for line in lines[1:]) and len(lines) == 4
    # fixed width: every line is as long as the header, and the columns are parted by gutters of spaces
    # at the same places on every line (one gutter between each pair of neighbouring columns)
    assert {len(line) for line in lines} == {len(lines[0])}
    blank = np.all(np.array([list(line) for line in lines]) == " ", axis=0)
    blank[:2] = False  # the "# " lead
    gutters = np.count_nonzero(np.diff(blank.astype(int)) == 1)
    assert gutters == len(lists.COMPACT_COLUMNS) - 1
    rows = [line.split() for line in lines[1:]]
    assert all(len(r) == len(lists.COMPACT_COLUMNS) for r in rows)
    c = result.compact
    for r in range(3):
        values = dict(zip(lists.COMPACT_COLUMNS, rows[r]))
        assert values["name"] == c["name"][r] and values["ra_hms"] == c["ra_hms"][r]
        assert abs(float(values["ra_deg"]) - c["ra_deg"][r]) <= 5e-8 and values["frame"] == "ICRS"
    # a missing value is written "-", so every row keeps its number of fields
    one = Table({"name": ["a"], "opt_brightest_abmag": [np.nan], "opt_brightest_band": [""], "priority": [1]})
    assert lists.plain_text(one).splitlines()[1].split() == ["a", "-", "-", "1"]
    # numpy reads it back as text, the header line skipped
    back = np.genfromtxt(result.outputs["text"], dtype=str, comments="#")
    assert back.shape == (3, len(lists.COMPACT_COLUMNS))


def test_nights_needed_packs_time_into_dark_hours_in_date_order():
    dark = np.array([10.0, 8.0, 10.0])
    assert lists.nights_needed(0.0, dark) == 0
    assert lists.nights_needed(10.0, dark) == 1
    assert lists.nights_needed(10.5, dark) == 2
    assert lists.nights_needed(28.0, dark) == 3
    assert lists.nights_needed(28.5, dark) is None  # more than the range holds


def test_summary_reports_hours_per_class_and_nights_not_summed_windows(tmp_path):
    cfg = build(_data(tmp_path, exposure_min=50.0, overhead_min=10.0), tmp_path)
    _candidates(cfg, [1, 2, 3, 4, 5], np.full(5, 195.0) + np.arange(5), np.full(5, -30.0), [5, 4, 3, 2, 1],
                mag46=[13.0, 16.0, 15.0, 13.0, 13.0])
    result = fu.make_targets(cfg, log=lambda *a: None)
    # one hour per target: class 1 has 1 target, classes 1-2 have 2, all 5; a night holds ~9.7 dark hours
    assert result.counts["hours"] == {"1": 1.0, "2": 1.0, "3": 3.0}
    text = result.summary
    assert "50 min exposure + 10 min overhead = 60 min per target" in text
    assert re.search(r"classes 1 and 2\s+2\s+2\.0\s+1\n", text) and re.search(r"all classes\s+5\s+5\.0\s+1\n", text)
    # the sum of observable windows (hundreds of hours for five targets over ten nights) is not reported
    windows = float(np.sum(result.targets["observable_hours"]))
    assert windows > 100 and f"{windows:.1f}" not in text


def test_list_records_the_run_it_came_from(tmp_path):
    from selector.store.manifest import Manifest

    cfg = build(_data(tmp_path), tmp_path)
    _candidates(cfg, [1, 2], [195.0, 196.0], [-30.0, -31.0], [2.0, 1.0])
    with Manifest(layout_of(cfg).manifest) as man:
        for merged in (1, 1, 0, 1, 0):  # runs 1-5; run 4 was the last to write the merged candidates
            man.end_run(man.begin_run(), "ok", merged=merged)
    result = fu.make_targets(cfg, log=lambda *a: None)
    assert (result.list_number, result.from_run) == (1, 4)
    assert "List 1 of the candidate history, made from run 4" in result.summary
    prov = json.loads(result.outputs["provenance"].read_text())
    assert (prov["list_number"], prov["from_run"]) == (1, 4)
    with sqlite3.connect(cfg.output_dir / "history.sqlite") as conn:
        assert conn.execute("SELECT list_number, from_run, n_listed FROM lists").fetchall() == [(1, 4, 2)]


def test_a_history_from_before_lists_were_named_is_renamed_and_kept(tmp_path):
    cfg = build(_data(tmp_path), tmp_path)
    path = cfg.output_dir / "history.sqlite"
    path.parent.mkdir(parents=True)
    with sqlite3.connect(path) as conn:  # the first schema, with one recorded list and one outcome
        conn.executescript("""
            CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
            CREATE TABLE runs (run INTEGER PRIMARY KEY, candidates_config_hash TEXT, candidates_sha256 TEXT NOT NULL,
                               n_candidates INTEGER NOT NULL, recorded_utc TEXT NOT NULL);
            CREATE TABLE candidates (candidate_id TEXT PRIMARY KEY, status TEXT NOT NULL, first_run INTEGER NOT NULL,
                                     last_run INTEGER NOT NULL, score REAL NOT NULL, ra_deg REAL NOT NULL,
                                     dec_deg REAL NOT NULL);
            CREATE TABLE scores (run INTEGER NOT NULL, candidate_id TEXT NOT NULL, score REAL NOT NULL,
                                 rank INTEGER NOT NULL, status TEXT NOT NULL, PRIMARY KEY (run, candidate_id));
            CREATE TABLE outcomes (candidate_id TEXT PRIMARY KEY, spec_class TEXT NOT NULL, redshift REAL,
                                   source_file TEXT NOT NULL, recorded_utc TEXT NOT NULL);
            INSERT INTO meta VALUES ('id_kind', 'int');
            INSERT INTO runs VALUES (1, 'old', 'abc', 2, '2026-01-01T00:00:00+00:00');
            INSERT INTO candidates VALUES ('1', 'new', 1, 1, 2.0, 195.0, -30.0), ('2', 'observed', 1, 1, 1.0, 196.0, -30.0);
            INSERT INTO scores VALUES (1, '1', 2.0, 1, 'new'), (1, '2', 1.0, 2, 'new');
            INSERT INTO outcomes VALUES ('2', 'star', NULL, 'o.csv', '2026-01-02T00:00:00+00:00');
        """)
    _candidates(cfg, [1, 2, 3], [195.0, 196.0, 197.0], np.full(3, -30.0), [2.0, 1.0, 0.5])
    result = fu.make_targets(cfg, new_only=True, log=lambda *a: None)
    assert result.list_number == 2
    # the old list counts as having listed nothing, so every target is new; the outcome still drops 2
    assert list(result.targets["astro_id"]) == [1, 3] and list(result.dropped["reason"]) == ["observed"]
    assert fu.training_labels(cfg).to_pylist() == [{"astro_id": 2, "label": "star", "redshift": None}]
    h = {r["astro_id"]: r for r in read_history(cfg).to_pylist()}
    assert (h[1]["first_list"], h[1]["last_list"], h[1]["n_lists"]) == (1, 2, 2)
