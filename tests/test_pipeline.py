"""The selection pipeline: exact pairs at tile edges and poles, ownership, one-to-one counterparts equal to the
untiled sky, accounting, mock recovery."""

from __future__ import annotations

from dataclasses import replace

import healpy as hp
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest

from selector.demo import mocksky as demo
from selector.core import tiles
from selector.core.astrometry import propagate
from selector.jobs.run import run
from selector.settings.config import load_config
from selector.jobs.ingest import ingest
from selector.store.io import read_parquet
from selector.core.selection import check_accounting
from selector.jobs.run.tile import process_tile
from selector.store.layout import layout_of

from conftest import base_config, build, write_parquet
from test_counterpart_match import assert_same_assignment, untiled_assignment


def _special_points(rng, order):
    """Random points plus clusters at both poles, across RA = 0/360 and on tile corners."""
    n = 3000
    ra = [rng.uniform(0, 360, n)]
    dec = [np.degrees(np.arcsin(rng.uniform(-1, 1, n)))]
    for pole in (90.0, -90.0):
        ra.append(rng.uniform(0, 360, 300))
        dec.append(pole - np.sign(pole) * rng.uniform(0, 0.02, 300))
    ra.append(np.mod(rng.normal(0, 0.005, 300), 360.0))
    dec.append(rng.uniform(-60, 60, 300))
    ns = tiles.nside(order)
    corners = hp.boundaries(ns, np.arange(hp.nside2npix(ns)), step=1, nest=True)  # (npix, 3, 4)
    xyz = corners.transpose(0, 2, 1).reshape(-1, 3)
    c_ra, c_dec = hp.vec2ang(xyz, lonlat=True)
    pick = rng.choice(len(c_ra), 400, replace=False)
    # scatter a few arcsec around each corner, so points fall in every tile that meets there
    ra.append(np.mod(c_ra[pick] + rng.normal(0, 2 / 3600, 400) / np.maximum(np.cos(np.radians(c_dec[pick])), 1e-3), 360))
    dec.append(np.clip(c_dec[pick] + rng.normal(0, 2 / 3600, 400), -90, 90))
    return np.concatenate(ra), np.concatenate(dec)


def _arrays(rng, ra, dec):
    n = len(ra)
    fast = rng.random(n) < 0.05
    pm_scale = np.where(fast, 3000.0, 2.0)   # a few sources at several arcsec per year
    return {
        "sid": np.arange(n, dtype=np.int64), "ra": ra, "dec": dec,
        "plx": rng.normal(0, 0.2, n), "eplx": np.full(n, 0.2),
        "pmra": rng.normal(0, 1, n) * pm_scale, "pmdec": rng.normal(0, 1, n) * pm_scale,
        "epmra": np.full(n, 0.2), "epmdec": np.full(n, 0.2),
        "g": rng.uniform(16, 20, n), "eg": np.full(n, 0.01),
    }


@pytest.fixture(scope="module")
def edge_sky(tmp_path_factory):
    rng = np.random.default_rng(7)
    tmp = tmp_path_factory.mktemp("edges")
    data = base_config()
    order = data["tiling"]["order"]
    ra, dec = _special_points(rng, order)
    astro = _arrays(rng, ra, dec)
    dt = data["infrared"]["epoch_jyear"] - data["astrometric"]["epoch_jyear"]
    moved = propagate(ra, dec, astro["pmra"], astro["pmdec"], dt)
    # infrared: counterparts of most sources at up to ~3 arcsec from the moved position, plus strays
    m = len(ra)
    off = rng.uniform(0, 3.0, m) / 3600.0
    ang = rng.uniform(0, 2 * np.pi, m)
    ir_dec = np.clip(moved.dec_deg + off * np.cos(ang), -90, 90)
    ir_ra = np.mod(moved.ra_deg + off * np.sin(ang) / np.maximum(np.cos(np.radians(ir_dec)), 1e-6), 360)
    keep = rng.random(m) < 0.85
    ir_ra, ir_dec = ir_ra[keep], ir_dec[keep]
    k = len(ir_ra)
    m4p6 = rng.uniform(12, 16, k)
    ir = {"irid": np.array([f"IRX{i:06d}" for i in range(k)]), "ra": ir_ra, "dec": ir_dec,
          "m3p4": m4p6 + rng.uniform(-0.2, 1.5, k), "e_m3p4": np.full(k, 0.03), "m4p6": m4p6, "e_m4p6": np.full(k, 0.05)}
    write_parquet(astro, tmp / "astro.parquet")
    write_parquet(ir, tmp / "ir.parquet")
    data["match"] = {"chance_shifts": 1}  # one shifted copy is enough here, and keeps the fixture quick
    cfg = build(data, tmp)
    ingest(cfg, log=lambda *a: None)
    results = [process_tile(cfg, t, keep_pairs=True)
               for t in layout_of(cfg).list_tiles("astrometric", cfg.tiling.order)]
    return cfg, astro, ir, moved, results


def test_pairs_equal_astropy_on_the_untiled_catalogues(edge_sky):
    from astropy.coordinates import SkyCoord, search_around_sky
    import astropy.units as u

    cfg, astro, ir, moved, results = edge_sky
    # reference: astropy search_around_sky on the whole, untiled catalogues at the infrared epoch
    a = SkyCoord(moved.ra_deg * u.deg, moved.dec_deg * u.deg)
    b = SkyCoord(ir["ra"] * u.deg, ir["dec"] * u.deg)
    ia, ib, sep, _ = search_around_sky(a, b, cfg.match.radius_arcsec * u.arcsec)
    expected = set(zip(astro["sid"][ia].tolist(), ir["irid"][ib].tolist()))
    pairs = pa.concat_tables([r.pairs for r in results])
    got = list(zip(pairs.column("astro_id").to_pylist(), pairs.column("ir_id").to_pylist()))
    assert len(got) == len(set(got)), "a pair was produced by two tiles"
    assert set(got) == expected
    assert len(expected) > 2000


def test_every_source_in_exactly_one_tile_and_tiled_equals_untiled(edge_sky):
    cfg, astro, ir, moved, results = edge_sky
    feats = pa.concat_tables([r.features for r in results])
    ids = feats.column("astro_id").to_numpy()
    assert len(ids) == len(np.unique(ids))
    n_rows = sum(r.n_rows for r in results)
    assert n_rows == len(astro["sid"])
    # one-to-one: no infrared source is the counterpart of two astrometric sources
    ir_ids = feats.column("ir_id").to_pylist()
    assert len(ir_ids) == len(set(ir_ids))
    # the tiled assignment equals the one made on the whole, untiled sky (poles, RA = 0/360, tile corners)
    ref = untiled_assignment(cfg, astro, ir, moved)
    assert_same_assignment(feats, ref)


def test_nearest_method_keeps_the_plain_nearest_match(edge_sky):
    from astropy.coordinates import SkyCoord, search_around_sky
    import astropy.units as u

    cfg, astro, ir, moved, _ = edge_sky
    ncfg = replace(cfg, match=replace(cfg.match, method="nearest", chance_shifts=0))
    # tiles at both poles, on RA = 0 and a few others: the places where a tile's edge matters
    ns = tiles.nside(cfg.tiling.order)
    chosen = sorted({int(t) for t in tiles.tile_of([0.0, 0.0, 359.99, 0.01, 45.0], [89.99, -89.99, 30.0, 30.0, 0.0],
                                                  cfg.tiling.order)} | {0, hp.nside2npix(ns) - 1})
    results = [process_tile(ncfg, t) for t in chosen]
    feats = pa.concat_tables([r.features for r in results])
    # reference: the nearest infrared source within the radius, from astropy search_around_sky on the untiled
    # catalogues at the infrared epoch
    a = SkyCoord(moved.ra_deg * u.deg, moved.dec_deg * u.deg)
    b = SkyCoord(ir["ra"] * u.deg, ir["dec"] * u.deg)
    ia, ib, sep, _ = search_around_sky(a, b, cfg.match.radius_arcsec * u.arcsec)
    n_within = np.bincount(ia, minlength=len(moved.ra_deg))
    blend = np.bincount(ib, minlength=len(ir["ra"]))
    best = {}
    for i, j, s in zip(ia, ib, sep.arcsec):
        if i not in best or s < best[i][1]:
            best[i] = (j, s)
    owner = tiles.tile_of(astro["ra"], astro["dec"], cfg.tiling.order)
    expected_ids = {int(astro["sid"][i]) for i in best if owner[i] in chosen}
    got_ids = feats.column("astro_id").to_numpy()
    assert set(got_ids.tolist()) == expected_ids and len(expected_ids) > 100
    got_ir = feats.column("ir_id").to_pylist()
    got_n = feats.column("n_ir_within").to_numpy()
    got_blend = feats.column("ir_blend_count").to_numpy()
    got_sep = feats.column("sep_arcsec").to_numpy()
    for k, sid in enumerate(got_ids):
        j, s = best[int(sid)]
        assert got_ir[k] == ir["irid"][j]
        assert got_sep[k] == pytest.approx(s, abs=1e-6)
        assert got_n[k] == n_within[sid]
        assert got_blend[k] == blend[j]
    assert np.all(np.isnan(feats.column("match_probability").to_numpy()))


def test_cutflow_never_increases_and_adds_up(edge_sky):
    cfg, astro, ir, moved, results = edge_sky
    total_input = 0
    for r in results:
        check_accounting(r.n_rows, r.rejects.num_rows, r.cutflow)
        counts = [c for _, c in r.cutflow]
        assert all(b <= a for a, b in zip(counts, counts[1:]))
        assert counts[-1] == r.candidates.num_rows
        total_input += r.cutflow[0][1] + r.rejects.num_rows
    assert total_input == len(astro["sid"])


def test_accounting_violation_fails_loudly():
    from selector.errors import SelectorError

    with pytest.raises(SelectorError, match="row accounting does not add up"):
        check_accounting(10, 0, [("input", 10), ("matched", 11)])
    with pytest.raises(SelectorError, match="row accounting does not add up"):
        check_accounting(10, 1, [("input", 10), ("matched", 5)])


@pytest.fixture(scope="module")
def mock_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("mock")
    sky = demo.make_mock_sky(seed=5, scale=0.1)
    paths = demo.write_mock_sky(sky, tmp / "catalogues")
    cfg = load_config(demo.write_demo_config(tmp))
    ingest(cfg, log=lambda *a: None)
    result = run(cfg, workers=1, quiet=True)
    return cfg, sky, paths, result


def test_mock_recovers_quasars_and_rejects_movers(mock_run):
    """Figures for the invented mock sky, not for any real catalogue."""
    cfg, sky, paths, result = mock_run
    report = demo.evaluate_run(cfg, paths["truth"])
    assert report.quasars_above_limit > 50
    assert report.completeness_above_limit >= 0.90
    assert report.by_population.get("brown_dwarf", 0) == 0
    cands = read_parquet(layout_of(cfg).merged("parquet"))
    truth = sky.truth.filter(pc.equal(sky.truth.column("catalogue"), "astrometric"))
    pop = dict(zip(truth.column("id").to_pylist(), truth.column("population").to_pylist()))
    stars = [pop[str(i)] == "star" for i in cands.column("astro_id").to_pylist()]
    # no star whose motion is significant at the configured level reaches the list
    significant = cands.column("motion_pvalue").to_numpy() < cfg.motion.joint_pvalue_min
    assert cfg.motion.test == "joint"
    assert not np.any(np.asarray(stars) & significant)
    assert not np.any(significant)
    # negative parallaxes: only the quality cut's limit applies (the motion test is one-sided)
    assert np.all(cands.column("parallax_snr").to_numpy() >= -cfg.quality.negative_parallax_snr_max)


def test_ranked_list_has_units_provenance_and_order(mock_run):
    from astropy.table import Table

    cfg, sky, paths, result = mock_run
    t = Table.read(layout_of(cfg).merged("ecsv"))
    assert list(t["rank"]) == list(range(1, len(t) + 1))
    assert str(t["ra_deg"].unit) == "deg" and str(t["pmra_mas_yr"].unit) == "mas / yr"
    assert np.all(np.diff(t["criteria_score"]) <= 0)
    prov = t.meta["selector_provenance"]
    assert len(prov["config_hash"]) == 64 and prov["selector_version"]
    assert set(prov["input_fingerprints"]) == {"astrometric", "infrared"}
    csv = Table.read(layout_of(cfg).merged("csv"), format="ascii.csv")
    assert len(csv) == len(t)


def test_run_is_deterministic(mock_run, tmp_path):
    cfg, sky, paths, result = mock_run
    first = {p.name: p.read_bytes() for p in layout_of(cfg).run_dir.glob("candidates.*")}
    run(cfg, workers=2, quiet=True)
    second = {p.name: p.read_bytes() for p in layout_of(cfg).run_dir.glob("candidates.*")}
    assert first == second


def test_parquet_list_is_ranked_like_the_ecsv(mock_run):
    from astropy.table import Table

    cfg, sky, paths, result = mock_run
    pq_list = read_parquet(layout_of(cfg).merged("parquet"))
    ecsv = Table.read(layout_of(cfg).merged("ecsv"))
    assert pq_list.column("rank").to_pylist() == list(range(1, pq_list.num_rows + 1))
    assert pq_list.column("astro_id").to_pylist() == list(ecsv["astro_id"])


def test_every_infrared_source_gets_its_blend_count_once(edge_sky):
    from astropy.coordinates import SkyCoord, search_around_sky
    import astropy.units as u

    cfg, astro, ir, moved, results = edge_sky
    got = pa.concat_tables([r.infrared for r in results])
    ids = got.column("ir_id").to_pylist()
    # each infrared source is owned by exactly one tile, whether or not it has a counterpart
    assert sorted(ids) == sorted(ir["irid"].tolist())
    # reference: astropy search_around_sky on the untiled catalogues at the infrared epoch
    a = SkyCoord(moved.ra_deg * u.deg, moved.dec_deg * u.deg)
    b = SkyCoord(ir["ra"] * u.deg, ir["dec"] * u.deg)
    _, ib, _, _ = search_around_sky(a, b, cfg.match.radius_arcsec * u.arcsec)
    expected = dict(zip(ir["irid"].tolist(), np.bincount(ib, minlength=len(ir["ra"])).tolist()))
    assert dict(zip(ids, got.column("n_astro_within").to_pylist())) == expected
