"""Selection stages on a hand-made feature table: each optional cut does what the config says."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest

from selector.core.selection import criteria_score, select
from selector.core.frames import galactic

from conftest import base_config, build


def _features(n=8):
    # rows 0-3 zero motion, red; row 4 moving; row 5 blue; row 6 no solution; row 7 faint and red
    return pa.table({
        "astro_id": np.arange(n, dtype=np.int64),
        "parallax_mas": np.array([0.0, 0.1, -0.1, 0.0, 5.0, 0.0, np.nan, 0.0]),
        "parallax_error_mas": np.full(n, 0.2),
        "pmra_mas_yr": np.array([0.0, 0.1, 0.0, 0.0, 30.0, 0.0, np.nan, 0.0]),
        "pmdec_mas_yr": np.zeros(n),
        "pmra_error_mas_yr": np.full(n, 0.2), "pmdec_error_mas_yr": np.full(n, 0.2),
        "ir_3p4_vegamag": np.array([14.0, 13.5, 14.2, 12.0, 14.0, 14.0, 14.0, 16.0]),
        "ir_4p6_vegamag": np.array([13.0, 12.4, 13.1, 11.0, 13.0, 13.9, 13.0, 15.1]),
        "opt_broad_abmag": np.array([19.0, 18.0, 20.5, 16.0, 19.0, 19.0, 19.0, 20.0]),
        "gal_b_deg": np.array([45.0, -60.0, 5.0, 30.0, 45.0, 45.0, 45.0, 45.0]),
    })


def _stage(sel, name):
    return dict(sel.stages)[name]


def test_default_stages_and_cumulative_masks():
    sel = select(_features(), build(base_config()))
    names = [n for n, _ in sel.stages]
    assert names == ["matched", "astrometric_solution", "parallax", "proper_motion", "infrared_colour"]
    assert list(np.flatnonzero(sel.passed)) == [0, 1, 2, 3]  # 4 moves, 5 blue, 6 no solution, 7 too faint (>15.05)
    for (_, a), (_, b) in zip(sel.stages, sel.stages[1:]):
        assert not np.any(b & ~a)  # cumulative: a later stage never re-admits a row


def test_solution_not_required_lets_sources_without_astrometry_pass():
    data = base_config()
    data["motion"] = {"require_solution": False}
    sel = select(_features(), build(data))
    assert sel.passed[6] and "astrometric_solution" not in dict(sel.stages)


def test_galactic_latitude_cut():
    data = base_config()
    data["colours"] = {"galactic_latitude_min_deg": 10.0}
    sel = select(_features(), build(data))
    assert list(np.flatnonzero(sel.passed)) == [0, 1, 3]


def test_optical_infrared_cut_in_ab():
    data = base_config()
    data["colours"] = {"optical_infrared": {"optical_band": "broad", "infrared_band": "3.4", "min_mag": 3.0}}
    sel = select(_features(), build(data))
    # optical − [3.4]_AB with [3.4]_AB = Vega + 2.699 (Jarrett et al. 2011, from memory): rows 0..3 give
    # 2.30, 1.80, 3.60, 1.30
    assert list(np.flatnonzero(sel.passed)) == [2]


def test_linear_cut_as_config_data():
    data = base_config()
    data["colours"] = {"linear_cuts": [{"name": "bright", "y": ["4.6"], "x": ["3.4", "4.6"], "slope": 0.0,
                                        "intercept": 12.5, "side": "below"}]}
    sel = select(_features(), build(data))
    assert list(np.flatnonzero(sel.passed)) == [1, 3]


def test_combine_all_is_stricter_than_any():
    data = base_config()
    data["colours"] = {"criteria": ["stern2012", "assef2018_c75"], "combine": "all"}
    strict = select(_features(), build(data)).passed
    data["colours"]["combine"] = "any"
    loose = select(_features(), build(data)).passed
    assert not np.any(strict & ~loose)


def test_classifier_threshold_is_the_last_stage():
    cfg = build(base_config())
    p = np.array([0.9, 0.2, 0.6, 0.49, 0.9, 0.9, 0.9, 0.9])
    sel = select(_features(), cfg, p_quasar=p)
    assert sel.stages[-1][0] == "classifier"
    assert list(np.flatnonzero(sel.passed)) == [0, 2]
    assert "p_quasar" in sel.derived


def test_criteria_score_rewards_red_and_bright():
    s = criteria_score(np.array([0.5, 0.2, 0.2, np.nan]), np.array([14.0, 14.0, 13.0, 14.0]), 15.0, 0.1)
    assert s[0] > s[2] > s[1]
    assert s[3] == pytest.approx(0.1)


def test_galactic_coordinates_match_astropy():
    from astropy.coordinates import SkyCoord
    import astropy.units as u

    rng = np.random.default_rng(3)
    ra = np.r_[rng.uniform(0, 360, 500), 0.0, 359.9999, 192.85948, 266.40499]
    dec = np.r_[np.degrees(np.arcsin(rng.uniform(-1, 1, 500))), 90.0, -89.9999, 27.12825, -28.93617]
    l_deg, b_deg = galactic(ra, dec)
    # reference: astropy's Galactic frame
    g = SkyCoord(ra * u.deg, dec * u.deg).galactic
    assert np.allclose(b_deg, g.b.deg, atol=1e-9)
    dl = (l_deg - g.l.deg + 180) % 360 - 180
    assert np.all(np.abs(dl * np.cos(np.radians(b_deg))) < 1e-8)
    # the north Galactic pole at (192.85948, +27.12825) (ICRS, from memory)
    assert b_deg[-2] == pytest.approx(90.0, abs=1e-3)
