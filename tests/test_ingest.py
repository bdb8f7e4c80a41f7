"""Ingest: every row accepted or rejected with its own reason, tiles deterministic and complete."""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from selector.core import tiles
from selector.errors import InputError
from selector.jobs.ingest import IdKind, ingest, ingest_catalogue, values_json
from selector.store.layout import layout_of

from conftest import base_config, build, random_astro, random_ir, write_parquet


def _setup(tmp_path, rng, n=2000, astro=None):
    astro = astro or random_astro(n, rng)
    write_parquet(astro, tmp_path / "astro.parquet")
    write_parquet(random_ir(n, rng), tmp_path / "ir.parquet")
    return build(base_config(), tmp_path)


def _read_tiles(cfg, kind):
    parts = [pq.read_table(layout_of(cfg).tile_file(kind, cfg.tiling.order, t))
             for t in layout_of(cfg).list_tiles(kind, cfg.tiling.order)]
    return pa.concat_tables(parts)


def test_accounting_and_tile_assignment(tmp_path, rng):
    cfg = _setup(tmp_path, rng)
    summaries = ingest(cfg, log=lambda *a: None)
    s = summaries["astrometric"]
    assert s.rows_in == 2000 and s.accepted == 2000 and not s.rejected
    t = _read_tiles(cfg, "astrometric")
    assert t.num_rows == 2000
    assert sorted(t.column("astro_id").to_pylist()) == list(range(1, 2001))
    # every row sits in the tile its position falls in (reference: healpy ang2pix, nested)
    for tile in layout_of(cfg).list_tiles("astrometric", cfg.tiling.order):
        part = pq.read_table(layout_of(cfg).tile_file("astrometric", cfg.tiling.order, tile))
        got = tiles.tile_of(part.column("ra_deg").to_numpy(), part.column("dec_deg").to_numpy(), cfg.tiling.order)
        assert np.all(got == tile)
    summary = json.loads(layout_of(cfg).ingest_summary("astrometric").read_text())
    assert summary["rows_in"] == summary["accepted"] + summary["rejected_total"]
    assert sum(summary["rows_per_tile"].values()) == summary["accepted"]


def test_each_bad_row_has_its_own_reason(tmp_path, rng):
    a = random_astro(30, rng)
    a["ra"] = a["ra"].astype(float)
    a["ra"][1] = np.nan                # non_finite_position
    a["dec"][2] = 95.0                 # dec_out_of_range
    a["eplx"][3] = -0.1                # negative_error
    a["sid"][5] = a["sid"][4]          # duplicate_id (the later row is rejected)
    a["pmra"][6] = np.inf              # non_finite_value
    a["ra"][7] = -10.0                 # wrapped to 350, accepted
    a["ra"][8] = 725.0                 # wrapped to 5, accepted
    cols = {k: pa.array(v) for k, v in a.items()}
    ids = a["sid"].astype(object)
    ids[9] = None                      # missing_id
    cols["sid"] = pa.array(list(ids), pa.int64())
    pq.write_table(pa.table(cols), tmp_path / "astro.parquet")
    write_parquet(random_ir(10, rng), tmp_path / "ir.parquet")
    data = base_config()
    data["astrometric"]["columns"]["pm_corr"] = "corr"
    corr = np.zeros(30)
    corr[10] = 1.5                     # correlation_out_of_range
    t = pq.read_table(tmp_path / "astro.parquet").append_column("corr", pa.array(corr))
    pq.write_table(t, tmp_path / "astro.parquet")
    cfg = build(data, tmp_path)
    s = ingest_catalogue(cfg, "astrometric", log=lambda *a: None)
    assert s.rejected == {"non_finite_position": 1, "dec_out_of_range": 1, "negative_error": 1, "duplicate_id": 1,
                          "non_finite_value": 1, "missing_id": 1, "correlation_out_of_range": 1}
    assert s.rows_in == 30 and s.accepted == 23
    rej = pq.read_table(layout_of(cfg).ingest_rejects("astrometric")).to_pylist()
    by_row = {r["input_row"]: r for r in rej}
    assert by_row[1]["reason"] == "non_finite_position" and by_row[1]["column"] == "ra"
    assert by_row[3]["reason"] == "negative_error" and by_row[3]["column"] == "eplx"
    assert by_row[5]["reason"] == "duplicate_id"
    assert by_row[10]["reason"] == "correlation_out_of_range"
    assert json.loads(by_row[2]["values"])["dec"] == "95.0"
    kept = _read_tiles(cfg, "astrometric")
    ras = dict(zip(kept.column("astro_id").to_pylist(), kept.column("ra_deg").to_pylist()))
    assert ras[8] == pytest.approx(350.0) and ras[9] == pytest.approx(5.0)


def test_unparsable_csv_value_rejects_its_row_only(tmp_path, rng):
    a = random_astro(12, rng)
    lines = [",".join(a)]
    for i in range(12):
        row = [str(a[k][i]) for k in a]
        if i == 4:
            row[list(a).index("plx")] = "abc"
        if i == 6:
            row[list(a).index("pmdec")] = ""   # empty: missing, kept as NaN
        lines.append(",".join(row))
    (tmp_path / "astro.csv").write_text("\n".join(lines) + "\n")
    write_parquet(random_ir(10, rng), tmp_path / "ir.parquet")
    data = base_config()
    data["astrometric"]["files"] = ["astro.csv"]
    data["astrometric"]["chunk_rows"] = 1000
    cfg = build(data, tmp_path)
    s = ingest_catalogue(cfg, "astrometric", log=lambda *a: None)
    assert s.rejected == {"unparsable_value": 1} and s.accepted == 11
    rej = pq.read_table(layout_of(cfg).ingest_rejects("astrometric")).to_pylist()
    assert rej[0]["input_row"] == 4 and rej[0]["column"] == "plx"
    kept = _read_tiles(cfg, "astrometric")
    pmdec = dict(zip(kept.column("astro_id").to_pylist(), kept.column("pmdec_mas_yr").to_pylist()))
    assert np.isnan(pmdec["7"])  # CSV identifiers are kept as text, losslessly


def test_chunked_spooled_reading_gives_the_same_tiles(tmp_path, rng, monkeypatch):
    import selector.jobs.ingest as ingest_module

    a = random_astro(5000, rng)
    a["sid"][4500] = a["sid"][10]  # a duplicate that lands in another chunk and another spool flush
    write_parquet(a, tmp_path / "astro.parquet")
    write_parquet(random_ir(10, rng), tmp_path / "ir.parquet")
    outs = []
    for chunk, spool_rows in ((1000, 1500), (100000, 10**7)):
        monkeypatch.setattr(ingest_module, "_SPOOL_ROWS", spool_rows)
        data = base_config()
        data["astrometric"]["chunk_rows"] = chunk
        data["project"]["output_dir"] = f"out{chunk}"
        cfg = build(data, tmp_path)
        s = ingest_catalogue(cfg, "astrometric", log=lambda *a: None)
        assert s.rejected == {"duplicate_id": 1} and s.accepted == 4999
        outs.append(_read_tiles(cfg, "astrometric"))
    assert outs[0].equals(outs[1])


def test_ingesting_twice_gives_identical_files(tmp_path, rng):
    cfg = _setup(tmp_path, rng, n=500)
    ingest(cfg, log=lambda *a: None)
    lay = layout_of(cfg)
    first_gen = lay.current_generation()
    first = {p.relative_to(lay.tiles_dir): p.read_bytes() for p in sorted(lay.tiles_dir.rglob("*")) if p.is_file()}
    ingest(cfg, log=lambda *a: None)
    second = {p.relative_to(lay.tiles_dir): p.read_bytes() for p in sorted(lay.tiles_dir.rglob("*")) if p.is_file()}
    # a new generation in force, the old one removed, the same bytes in it
    assert lay.current_generation() != first_gen and not lay.generation_dir(first_gen).exists()
    assert first.keys() == second.keys()
    assert all(first[k] == second[k] for k in first)
    tiles_dir = layout_of(cfg).tiles_dir
    assert not list(tiles_dir.rglob("*.tmp")) and not list(tiles_dir.rglob(".spool"))


def test_missing_column_is_one_line_error(tmp_path, rng):
    a = random_astro(10, rng)
    a["parallax_typo"] = a.pop("plx")
    write_parquet(a, tmp_path / "astro.parquet")
    write_parquet(random_ir(10, rng), tmp_path / "ir.parquet")
    cfg = build(base_config(), tmp_path)
    with pytest.raises(InputError, match=r"astro.parquet: column 'plx' \(named by astrometric.columns.parallax\) is "
                                         r"not in the file; the nearest is 'parallax_typo'; the file's columns are: sid, "):
        ingest_catalogue(cfg, "astrometric", log=lambda *a: None)


def test_text_in_numeric_role_is_refused(tmp_path, rng):
    a = random_astro(10, rng)
    a["plx"] = np.array(["x"] * 10)
    write_parquet(a, tmp_path / "astro.parquet")
    write_parquet(random_ir(10, rng), tmp_path / "ir.parquet")
    cfg = build(base_config(), tmp_path)
    s = ingest_catalogue(cfg, "astrometric", log=lambda *a: None)
    assert s.rejected == {"unparsable_value": 10}


def test_missing_file_is_one_line_error(tmp_path):
    cfg = build(base_config(), tmp_path)
    with pytest.raises(InputError, match=r"astro.parquet: no such file"):
        ingest_catalogue(cfg, "astrometric", log=lambda *a: None)


def test_sentinel_values_become_missing(tmp_path, rng):
    a = random_astro(6, rng)
    a["plx"][0] = -999.0                # a catalogue's "no parallax"
    a["ra"] = a["ra"].astype(float)
    a["ra"][1] = -999.0                 # a position that is missing: rejected, not wrapped to 81 deg
    a["g"][2] = 99.0                    # "not measured" magnitude
    a["eg"][2] = 99.0
    write_parquet(a, tmp_path / "astro.parquet")
    write_parquet(random_ir(5, rng), tmp_path / "ir.parquet")
    data = base_config()
    data["astrometric"]["columns"]["parallax"] = {"column": "plx", "unit": "mas", "null_values": [-999.0]}
    data["astrometric"]["columns"]["ra"] = {"column": "ra", "null_values": [-999.0]}
    data["astrometric"]["magnitudes"][0]["null_values"] = [99.0]
    cfg = build(data, tmp_path)
    s = ingest_catalogue(cfg, "astrometric", log=lambda *a: None)
    assert s.rejected == {"non_finite_position": 1} and s.accepted == 5
    t = _read_tiles(cfg, "astrometric")
    by_id = {r["astro_id"]: r for r in t.to_pylist()}
    assert np.isnan(by_id[1]["parallax_mas"]) and np.isnan(by_id[3]["opt_broad_abmag"])
    assert np.isnan(by_id[3]["opt_broad_mag_error"]) and np.isfinite(by_id[4]["parallax_mas"])


def test_reject_values_are_built_as_columns_with_the_text_of_pythons_json():
    # rejected rows keep their original values as JSON text; built column by column, each must be
    # what Python's json module writes for the row (the reference: json.dumps of str() of each value)
    floats = [1.0, -0.0, 0.1, 1e-5, 3.4e-9, 123456789.0, 1e9, 2.5e17, float("nan"), float("inf"), -float("inf"),
              None, 7.000000000000001, 5e-324]
    n = len(floats)
    table = pa.table({
        "b_float": pa.array(floats, pa.float64()),
        "a_int": pa.array([1, None, -3, 2**62, 0, 5, 6, 7, 8, 9, 10, 11, 12, 13], pa.int64()),
        "c_text": pa.array(['plain', 'say "hi"', "back\\slash", "tab\there", "line\nend", "ü-umlaut", "☃", None, "",
                            " 1.5 ", "nan", "-999", "\x7f", "e\u0301"], pa.string()),
        "d_flag": pa.array([True, False, None] + [True] * (n - 3)),
        "e_small": pa.array(np.float32([0.1] * n)),
    })
    expected = [json.dumps({k: (None if v is None else str(v)) for k, v in r.items()}, sort_keys=True)
                for r in table.to_pylist()]
    assert values_json(table).to_pylist() == expected


def test_integer_ids_beyond_float_precision_are_kept_exactly(tmp_path, rng):
    # 64-bit source ids run up to about 7e18, far beyond 2**53, where float64 stops counting by one
    a = random_astro(50, rng)
    a["sid"] = (np.int64(2) ** 62 + np.arange(50, dtype=np.int64) * 3).astype(np.int64)
    a["sid"][7] = np.iinfo(np.int64).max
    a["sid"][9] = a["sid"][8]  # ids one apart at 2**62 differ only beyond float64's precision
    a["sid"][9] += 1
    cfg = _setup(tmp_path, rng, n=50, astro=a)
    s = ingest_catalogue(cfg, "astrometric", log=lambda *x: None)
    assert s.accepted == 50 and not s.rejected
    got = _read_tiles(cfg, "astrometric").column("astro_id").to_numpy()
    assert sorted(got.tolist()) == sorted(a["sid"].tolist())


def test_unsigned_ids_beyond_int64_are_rejected_as_unparsable():
    raw = pa.array([1, None, 2**63 + 5, 2**63 - 1], pa.uint64())
    ids, missing, bad = IdKind().convert(raw)
    assert ids.type == pa.int64() and ids.to_pylist() == [1, 0, 0, 2**63 - 1]
    assert missing.tolist() == [False, True, False, False]
    assert bad.tolist() == [False, False, True, False]


def test_input_in_spatial_order_gives_the_same_tile_bytes(tmp_path, rng):
    # rows already in tile order skip the sort; the files must not tell the difference
    a = random_astro(3000, rng)
    fine = tiles.fine_index(a["ra"], a["dec"])
    outs = []
    for name, order in (("sorted", np.argsort(fine)), ("shuffled", rng.permutation(len(fine)))):
        folder = tmp_path / name
        folder.mkdir()
        write_parquet({k: v[order] for k, v in a.items()}, folder / "astro.parquet")
        write_parquet(random_ir(10, rng), folder / "ir.parquet")
        cfg = build(base_config(), folder)
        ingest_catalogue(cfg, "astrometric", log=lambda *x: None)
        lay = layout_of(cfg)
        outs.append({t: lay.tile_file("astrometric", cfg.tiling.order, t).read_bytes()
                     for t in lay.list_tiles("astrometric", cfg.tiling.order)})
    assert outs[0].keys() == outs[1].keys() and len(outs[0]) > 1
    assert all(outs[0][t] == outs[1][t] for t in outs[0])
