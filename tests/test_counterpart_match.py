"""Counterparts through the tile pipeline: one-to-one, tiled equal to untiled (chains across tile corners, the
poles and RA = 0/360, which make the margins grow), recovery and false-match rate on a simulated field with
known truth, bad positional errors.

The Bayes factor against a numerical integral and the posterior against the paper's formula are checked on
the core functions in ``tests/core/test_counterparts.py``.
"""

from __future__ import annotations

import healpy as hp
import numpy as np
import pyarrow as pa
import pytest

from selector.core import tiles
from selector.core.astrometry import propagate
from selector.core.counterparts import (PositionCovariance, assign_one_to_one, astrometric_covariance, bayes_factor,
                                        combine_covariances, infrared_covariance, major_sigma_arcsec,
                                        prior_from_density, rotate_covariance, tangent_offset)
from selector.core.tilematch import ChanceEstimate, MATCH_COLUMNS, PairCandidates, assign_pairs, tile_density_per_sr
from selector.errors import ConfigError
from selector.jobs.ingest import ingest
from selector.jobs.run.tile import load_and_match, process_tile
from selector.store.io import read_parquet
from selector.store.layout import layout_of

from conftest import base_config, build, random_astro, random_ir, write_parquet

_ARCSEC = 1.0 / 3600.0


# ---------------------------------------------------------------------------------------------------
# The untiled reference
# ---------------------------------------------------------------------------------------------------

def _take(cov: PositionCovariance, index) -> PositionCovariance:
    return PositionCovariance(*(np.broadcast_to(c, np.shape(cov.var_east_arcsec2))[index] for c in cov))


def untiled_assignment(cfg, astro: dict, ir: dict, moved) -> dict:
    """The probabilistic match made once on the whole sky, without tiles: astro id → (ir id, P, competitors,
    ambiguous).

    Pairs come from astropy ``search_around_sky`` on the untiled catalogues at the infrared epoch (the
    reference library); errors from the configured floors and the proper-motion errors; the prior from each
    infrared source's tile density; the greedy one-to-one assignment over every pair at once.
    """
    import astropy.units as u
    from astropy.coordinates import SkyCoord, search_around_sky

    m = cfg.match
    a = SkyCoord(moved.ra_deg * u.deg, moved.dec_deg * u.deg)
    b = SkyCoord(ir["ra"] * u.deg, ir["dec"] * u.deg)
    ia, ib, sep, _ = search_around_sky(a, b, m.radius_arcsec * u.arcsec)
    sep = sep.arcsec
    cov_a = astrometric_covariance(np.zeros(len(astro["ra"])), 0.0, cfg.epoch_difference_yr, astro["epmra"],
                                   astro["epmdec"], systematic_arcsec=cfg.astrometric.position_floor_arcsec)
    cov_b = infrared_covariance(np.zeros(len(ir["ra"])), systematic_arcsec=cfg.infrared.position_floor_arcsec)
    off = tangent_offset(moved.ra_deg[ia], moved.dec_deg[ia], ir["ra"][ib], ir["dec"][ib])
    cov = combine_covariances(_take(cov_a, ia), rotate_covariance(_take(cov_b, ib), off.rotation_rad))
    ln_b = bayes_factor(off.east_arcsec, off.north_arcsec, cov).ln_b
    keep = sep <= np.minimum(m.n_sigma * major_sigma_arcsec(cov), m.radius_arcsec)
    owner = tiles.tile_of(ir["ra"], ir["dec"], cfg.tiling.order)
    density = {int(t): tile_density_per_sr(ir["ra"][owner == t], ir["dec"][owner == t], cfg.tiling.order)
               for t in np.unique(owner)}
    prior = prior_from_density(np.array([density[int(t)] for t in owner[ib]]), m.expected_completeness)
    asg = assign_one_to_one(ia[keep], ib[keep], ln_b[keep], prior[keep], sep[keep], n_astrometric=len(astro["ra"]),
                            ambiguity_ratio=m.ambiguity_ratio)
    out = {}
    for i in np.flatnonzero(asg.ib >= 0):
        out[int(astro["sid"][i])] = (str(ir["irid"][asg.ib[i]]), float(asg.probability[i]),
                                     int(asg.n_competitors[i]), bool(asg.ambiguous[i]))
    return out


def assert_same_assignment(features: pa.Table, reference: dict) -> None:
    got = {int(a): (str(i), float(p), int(n), bool(x)) for a, i, p, n, x in zip(
        features.column("astro_id").to_pylist(), features.column("ir_id").to_pylist(),
        features.column("match_probability").to_pylist(), features.column("n_competitors").to_pylist(),
        features.column("match_ambiguous").to_pylist())}
    assert set(got) == set(reference)
    for key, (ir_id, p, n, amb) in reference.items():
        g = got[key]
        assert g[0] == ir_id, key
        assert g[1] == pytest.approx(p, rel=1e-7, abs=1e-300), key
        assert (g[2], g[3]) == (n, amb), key


# ---------------------------------------------------------------------------------------------------
# Chains of competing pairs across tile edges
# ---------------------------------------------------------------------------------------------------

def _towards(xyz_from, xyz_to):
    """Unit tangent vector at xyz_from pointing along the great circle towards xyz_to."""
    t = xyz_to - np.dot(xyz_to, xyz_from) * xyz_from
    return t / np.linalg.norm(t)


def _radec(xyz):
    xyz = np.atleast_2d(xyz)
    ra, dec = hp.vec2ang(xyz / np.linalg.norm(xyz, axis=1)[:, None], lonlat=True)
    return np.mod(ra, 360.0), dec


def _chain(start_xyz, direction_xyz, gaps_arcsec):
    """Points along a great circle from ``start`` (the owned end) outwards; the gaps shrink outwards."""
    dist = np.radians(np.concatenate([[0.0], np.cumsum(gaps_arcsec)]) * _ARCSEC)
    pts = np.cos(dist)[:, None] * start_xyz + np.sin(dist)[:, None] * direction_xyz
    return _radec(pts)


#: Gaps between consecutive chain points (arcsec), from the owned end outwards. The smallest gap is at the
#: far end, so the greedy assignment is decided there and the decision runs back along the chain.
_GAPS = np.round(np.arange(1.4, 0.55, -0.1), 2)


#: Points of the simulated chains and their backgrounds lie near these places (RA, Dec): both poles, the
#: RA = 0/360 seam at Dec +60 (an edge of the polar base pixels) and an equatorial tile.
_PLACES = ((30.0, 89.9999), (30.0, -89.9999), (0.0001, 60.0), (100.0, 5.0))
_ORDER = 9   # small tiles (about 7 arcmin), so the poles are the farthest corners of their tiles


def _chains(order):
    """Chains that start 1 arcsec inside a tile's farthest corner and run outwards across it.

    The infrared margin is counted from the tile's circumscribed disc, which touches the tile at its farthest
    corner; the chains therefore leave the initially loaded area there. At the poles the farthest corner is
    the pole itself (the chain crosses it); at Dec +60 it lies on RA = 0 (the chain crosses the seam).
    """
    ns = tiles.nside(order)
    out = []
    for ra, dec in _PLACES:
        tile = int(tiles.tile_of(ra, dec, order))
        centre, reach = tiles.circumscribed_disc(tile, order)
        corners = hp.boundaries(ns, tile, step=1, nest=True).T
        corner = corners[np.argmin(corners @ centre)]
        corner = corner / np.linalg.norm(corner)
        inward = _towards(corner, centre)
        start = np.cos(np.radians(_ARCSEC)) * corner + np.sin(np.radians(_ARCSEC)) * inward
        out.append(_chain(start, _towards(start, corner), _GAPS))
    return out


@pytest.fixture(scope="module")
def chain_sky(tmp_path_factory):
    rng = np.random.default_rng(11)
    tmp = tmp_path_factory.mktemp("chains")
    data = base_config()
    data["tiling"]["order"] = _ORDER
    data["match"] = {"radius_arcsec": 1.5, "chance_shifts": 0}
    data["infrared"]["position_floor_arcsec"] = 0.3   # 5 sigma = 1.5 arcsec, the radius
    astro_ra, astro_dec, ir_ra, ir_dec, chain_ends = [], [], [], [], []
    for ra, dec in _chains(_ORDER):
        # the points alternate, the owned end (index 0) astrometric, the far end infrared
        astro_ra.append(ra[0::2]), astro_dec.append(dec[0::2]), ir_ra.append(ra[1::2]), ir_dec.append(dec[1::2])
        chain_ends.append((ra[0], dec[0]))
    # a background of 5000 sources per deg^2 within 5 arcmin of each place gives every tile there a density
    for ra, dec in _PLACES:
        centre = hp.ang2vec(ra, dec, lonlat=True)
        for ras, decs in ((astro_ra, astro_dec), (ir_ra, ir_dec)):
            n = rng.poisson(5000 * np.pi * (300 / 3600) ** 2)
            rho = np.radians(300 * _ARCSEC) * np.sqrt(rng.uniform(0, 1, n))
            phi = rng.uniform(0, 2 * np.pi, n)
            east = _towards(centre, np.array([0.0, 0.0, 1.0]) if abs(dec) < 89 else np.array([1.0, 0.0, 0.0]))
            north = np.cross(centre, east)
            pts = (np.cos(rho)[:, None] * centre
                   + np.sin(rho)[:, None] * (np.cos(phi)[:, None] * east + np.sin(phi)[:, None] * north))
            r, d = _radec(pts)
            ras.append(r), decs.append(d)
    a_ra, a_dec = np.concatenate(astro_ra), np.concatenate(astro_dec)
    astro = random_astro(len(a_ra), rng, a_ra, a_dec)
    # no motion: the chains stay where they are drawn
    astro["pmra"][:] = 0.0
    astro["pmdec"][:] = 0.0
    i_ra, i_dec = np.concatenate(ir_ra), np.concatenate(ir_dec)
    ir = random_ir(len(i_ra), rng, i_ra, i_dec)
    write_parquet(astro, tmp / "astro.parquet")
    write_parquet(ir, tmp / "ir.parquet")
    cfg = build(data, tmp)
    ingest(cfg, log=lambda *a: None)
    moved = propagate(astro["ra"], astro["dec"], astro["pmra"], astro["pmdec"], cfg.epoch_difference_yr)
    return cfg, astro, ir, moved, chain_ends


def test_chains_across_corners_poles_and_ra0_make_the_margin_grow(chain_sky):
    cfg, astro, ir, moved, chain_ends = chain_sky
    owners = [int(t) for t in tiles.tile_of(*np.array(chain_ends).T, cfg.tiling.order)]
    assert len(set(owners)) == len(_PLACES)
    loads = {}
    for t in owners:
        def count(kind, tile, path, part, decoded, *, digest, t=t):
            if kind == "astrometric" and tile == t:
                loads[t] = loads.get(t, 0) + 1
        load_and_match(cfg, t, count)
    # every owning tile read its rows again with a larger margin
    assert all(loads[t] >= 2 for t in owners), loads


def test_tiled_assignment_equals_untiled_with_chains(chain_sky):
    cfg, astro, ir, moved, chain_ends = chain_sky
    results = [process_tile(cfg, t) for t in layout_of(cfg).list_tiles("astrometric", cfg.tiling.order)]
    feats = pa.concat_tables([r.features for r in results])
    ids = feats.column("ir_id").to_pylist()
    assert len(ids) == len(set(ids)), "an infrared source is the counterpart of two sources"
    ref = untiled_assignment(cfg, astro, ir, moved)
    assert_same_assignment(feats, ref)
    # the chains are decided from their far end (the smallest gap), so the owned end's astrometric source
    # takes its neighbour; cut off where the first load ends, the decision runs the other way and leaves
    # it alone: the margin had to grow for the tiles to agree with the untiled sky
    got = dict(zip(feats.column("astro_id").to_pylist(), feats.column("ir_id").to_pylist()))
    n_astro_chain, n_ir_chain = (len(_GAPS) + 2) // 2, (len(_GAPS) + 1) // 2
    for c in range(len(chain_ends)):
        assert got.get(int(astro["sid"][c * n_astro_chain])) == ir["irid"][c * n_ir_chain]


# ---------------------------------------------------------------------------------------------------
# A simulated field with known truth
# ---------------------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def truth_field(tmp_path_factory):
    """A 3 x 3 deg field: half the astrometric sources have an infrared counterpart displaced by their
    combined error; unrelated infrared sources make chance pairs common (about 5 % of sources)."""
    rng = np.random.default_rng(2024)
    tmp = tmp_path_factory.mktemp("truth")
    n_astro, n_true, n_extra = 30000, 15000, 45000
    ra0, dec0, half = 150.0, 20.0, 1.5

    def field(n):
        dec = np.degrees(np.arcsin(rng.uniform(np.sin(np.radians(dec0 - half)), np.sin(np.radians(dec0 + half)), n)))
        return rng.uniform(ra0 - half, ra0 + half, n), dec

    a_ra, a_dec = field(n_astro)
    astro = random_astro(n_astro, rng, a_ra, a_dec)
    astro["pmra"][:] = 0.0
    astro["pmdec"][:] = 0.0
    astro["era"] = rng.uniform(0.1, 2.0, n_astro)       # mas
    astro["edec"] = rng.uniform(0.1, 2.0, n_astro)
    true_src = rng.choice(n_astro, n_true, replace=False)
    sig_ir = rng.uniform(0.1, 0.8, n_true)                # arcsec, per axis
    east, north = rng.normal(0, 1, (2, n_true)) * sig_ir
    t_dec = a_dec[true_src] + north * _ARCSEC
    t_ra = a_ra[true_src] + east * _ARCSEC / np.cos(np.radians(t_dec))
    x_ra, x_dec = field(n_extra)
    ir = random_ir(n_true + n_extra, rng, np.concatenate([t_ra, x_ra]), np.concatenate([t_dec, x_dec]))
    ir["sigpos"] = np.concatenate([sig_ir, rng.uniform(0.1, 0.8, n_extra)])
    write_parquet(astro, tmp / "astro.parquet")
    write_parquet(ir, tmp / "ir.parquet")
    data = base_config()
    data["tiling"]["order"] = 4
    del data["astrometric"]["position_floor_arcsec"], data["infrared"]["position_floor_arcsec"]
    data["astrometric"]["columns"].update(ra_error="era", dec_error="edec")
    data["infrared"]["columns"]["position_error"] = "sigpos"
    cfg = build(data, tmp)
    ingest(cfg, log=lambda *a: None)
    results = [process_tile(cfg, t) for t in layout_of(cfg).list_tiles("astrometric", cfg.tiling.order)]
    truth = dict(zip(astro["sid"][true_src].tolist(), ir["irid"][:n_true].tolist()))
    return cfg, results, truth


def test_true_counterparts_recovered_one_to_one(truth_field):
    cfg, results, truth = truth_field
    feats = pa.concat_tables([r.features for r in results])
    got = dict(zip(feats.column("astro_id").to_pylist(), feats.column("ir_id").to_pylist()))
    assert len(set(got.values())) == len(got), "an infrared source is the counterpart of two sources"
    recovered = sum(got.get(a) == i for a, i in truth.items())
    assert recovered / len(truth) > 0.98
    # the feature cache carries exactly these columns for the selection and the classifier
    for name in ("match_probability", "match_ln_bayes_factor", "n_competitors", "match_ambiguous",
                 "pair_sigma_arcsec", "sep_arcsec"):
        assert name in feats.column_names and name in MATCH_COLUMNS
    p = feats.column("match_probability").to_numpy()
    true_pair = np.array([truth.get(a) == i for a, i in got.items()])
    # a probability means something: true pairs are far more probable than the rest
    assert np.median(p[true_pair]) > 0.99 and np.median(p[~true_pair]) < 0.5


def test_false_match_rate_agrees_with_the_shifted_estimate(truth_field):
    cfg, results, truth = truth_field
    feats = pa.concat_tables([r.features for r in results])
    got = dict(zip(feats.column("astro_id").to_pylist(), feats.column("ir_id").to_pylist()))
    # chance counterparts: sources without a true counterpart that were given one (what the shifted positions
    # measure); true counterparts lost to a closer chance source are rarer still
    chance = sum(a not in truth for a in got)
    lost = sum(a in truth and truth[a] != i for a, i in got.items())
    est = ChanceEstimate.total([r.chance for r in results if r.chance is not None])
    assert est.shifted_sources > 0.9 * sum(r.n_rows for r in results)   # each source shifted once
    # binomial counting statistics (common practice): the estimate's own error and the scatter of the one
    # realisation, about sqrt(expected), added in quadrature; three standard deviations
    tolerance = 3.0 * np.hypot(est.expected_matches_error, np.sqrt(est.expected_matches))
    assert chance > 80 and lost < 0.2 * chance
    assert abs(chance - est.expected_matches) < tolerance, (chance, est)


# ---------------------------------------------------------------------------------------------------
# Bad input
# ---------------------------------------------------------------------------------------------------

def test_negative_or_missing_positional_error_is_a_reason_coded_reject(tmp_path):
    rng = np.random.default_rng(3)
    astro = random_astro(50, rng)
    astro["era"] = np.full(50, 0.5)
    astro["edec"] = np.full(50, 0.5)
    astro["era"][3] = -0.1
    astro["edec"][7] = np.nan
    ir = random_ir(40, rng)
    ir["sigpos"] = np.full(40, 0.3)
    ir["sigpos"][5] = np.nan
    ir["sigpos"][9] = -1.0
    write_parquet(astro, tmp_path / "astro.parquet")
    write_parquet(ir, tmp_path / "ir.parquet")
    data = base_config()
    data["astrometric"]["columns"].update(ra_error="era", dec_error="edec")
    data["infrared"]["columns"]["position_error"] = "sigpos"
    cfg = build(data, tmp_path)
    summaries = ingest(cfg, log=lambda *a: None)
    assert summaries["astrometric"].rejected == {"negative_error": 1, "missing_position_error": 1}
    assert summaries["infrared"].rejected == {"negative_error": 1, "missing_position_error": 1}
    rejects = read_parquet(layout_of(cfg).ingest_rejects("infrared")).to_pydict()
    assert sorted(zip(rejects["input_row"], rejects["reason"], rejects["column"])) == [
        (5, "missing_position_error", "sigpos"), (9, "negative_error", "sigpos")]


def test_missing_error_column_without_floor_is_one_config_error():
    for kind in ("astrometric", "infrared"):
        data = base_config()
        del data[kind]["position_floor_arcsec"]
        with pytest.raises(ConfigError) as err:
            build(data)
        text = str(err.value)
        assert "\n" not in text and f"{kind}.position_floor_arcsec" in text and "columns" in text
        # the nearest match needs no errors
        data["match"] = {"method": "nearest"}
        build(data)
    data = base_config()
    del data["infrared"]["position_floor_arcsec"]
    data["infrared"]["columns"]["ra_error"] = "era"
    with pytest.raises(ConfigError, match="maps ra_error but not dec_error"):
        build(data)


def test_isolated_pairs_set_aside_give_the_general_assignment():
    """assign_pairs (isolated pairs decided at once) equals assign_one_to_one on every pair."""
    rng = np.random.default_rng(5)
    n_a, n_b = 400, 300
    # a mix of lone pairs and crowded groups
    ia = np.concatenate([np.arange(200), rng.integers(200, 400, 500)])
    ib = np.concatenate([np.arange(200), rng.integers(200, 300, 500)])
    _, first = np.unique(np.stack([ia, ib], 1), axis=0, return_index=True)
    ia, ib = ia[np.sort(first)], ib[np.sort(first)]
    c = PairCandidates(ia, ib, rng.uniform(0, 2, ia.size), rng.normal(20, 3, ia.size), np.full(ia.size, 1e-3),
                       rng.uniform(0.1, 1, ia.size))
    got = assign_pairs(c, n_a, ambiguity_ratio=0.5)
    ref = assign_one_to_one(ia, ib, c.ln_b, c.prior, c.separation_arcsec, n_astrometric=n_a, ambiguity_ratio=0.5)
    for name in ref._fields:
        np.testing.assert_array_equal(getattr(got, name), getattr(ref, name), err_msg=name)
    assert n_b > ib.max()
