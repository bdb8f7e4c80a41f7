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
    # no match probability (nearest match) and no point-source role mapped: those cuts are left out
    assert names == ["matched", "astrometric_solution", "negative_parallax", "joint_motion", "infrared_colour"]
    assert any("match_quality: skipped" in note for note in sel.notes)
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
    data = base_config()
    data["classifier"] = {"require_colour_criteria": True}
    p = np.array([0.9, 0.2, 0.6, 0.49, 0.9, 0.9, 0.9, 0.9])
    sel = select(_features(), build(data), p_quasar=p)
    assert sel.stages[-1][0] == "classifier"
    assert list(np.flatnonzero(sel.passed)) == [0, 2]
    assert "p_quasar" in sel.derived
    # by default the model decides: the criteria become a reference column, not a cut
    sel = select(_features(), build(base_config()), p_quasar=p)
    assert np.array_equal(dict(sel.stages)["infrared_colour"], sel.zero_motion_passed)
    assert list(np.flatnonzero(sel.derived["passes_colour_criteria"] & sel.passed)) == [0, 2]


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


# --- zero-motion tests: joint and separate ------------------------------------------------------

def _motion_rows(n, rng, corr=(0.3, -0.2, 0.25)):
    """Sources at rest at infinite distance: Gaussian noise with the stated 3x3 correlation."""
    a, b, c = corr
    r = np.array([[1, a, b], [a, 1, c], [b, c, 1]])
    sig = np.column_stack([rng.uniform(0.05, 0.5, n), rng.uniform(0.05, 0.5, n), rng.uniform(0.05, 0.5, n)])
    noise = rng.multivariate_normal(np.zeros(3), r, n) * sig
    zp = -0.017
    return pa.table({
        "astro_id": np.arange(n, dtype=np.int64),
        "parallax_mas": zp + noise[:, 0], "parallax_error_mas": sig[:, 0],
        "pmra_mas_yr": noise[:, 1], "pmra_error_mas_yr": sig[:, 1],
        "pmdec_mas_yr": noise[:, 2], "pmdec_error_mas_yr": sig[:, 2],
        "parallax_pmra_corr": np.full(n, a), "parallax_pmdec_corr": np.full(n, b), "pm_corr": np.full(n, c),
        "ir_3p4_vegamag": np.full(n, 14.0), "ir_4p6_vegamag": np.full(n, 13.0),
    }), r, sig


def test_joint_chi2_through_the_selection_against_scipy():
    from scipy.stats import chi2

    rng = np.random.default_rng(11)
    table, r, sig = _motion_rows(400, rng)
    # some real motion too, so that the test is not only about small values
    table = table.set_column(table.schema.get_field_index("pmra_mas_yr"), "pmra_mas_yr", pa.array(table.column("pmra_mas_yr").to_numpy()
                                                      + rng.normal(0, 2.0, 400)))
    data = base_config()
    data["motion"] = {"test": "joint", "joint_pvalue_min": 0.01}
    sel = select(table, build(data))
    x = np.column_stack([table.column("parallax_mas").to_numpy() + 0.017, table.column("pmra_mas_yr").to_numpy(),
                         table.column("pmdec_mas_yr").to_numpy()])
    cov = r[None] * sig[:, :, None] * sig[:, None, :]
    ref = np.einsum("ni,ni->n", x, np.linalg.solve(cov, x[..., None])[..., 0])
    got = sel.derived["motion_chi2"]
    assert np.allclose(got, ref, rtol=1e-9)
    # the p-value: chi^2 with 3 degrees of freedom (scipy.stats.chi2) where the parallax is positive; the
    # boundary mixture 1/2 chi^2(2) + 1/2 chi^2(3) of the motion given the parallax where it is negative
    # (Chernoff 1954, Ann. Math. Stat. 25, 573; Self & Liang 1987, JASA 82, 605; from memory)
    z = x[:, 0] / sig[:, 0]
    t = np.where(z < 0, ref - z * z, ref)
    p_ref = 0.5 * chi2.sf(t, 2) + 0.5 * chi2.sf(t, 3)
    assert np.allclose(sel.derived["motion_pvalue"], p_ref, rtol=1e-9, atol=1e-300)
    kept = dict(sel.stages)["joint_motion"]
    assert np.array_equal(kept, p_ref >= 0.01)
    assert 0 < kept.sum() < 400


@pytest.mark.parametrize("test_kind, p_min, nominal", [("joint", 0.0027, 0.0027), ("joint", 0.05, 0.05)])
def test_zero_motion_population_passes_at_the_nominal_rate(test_kind, p_min, nominal):
    rng = np.random.default_rng(2024)
    n = 20000
    table, _, _ = _motion_rows(n, rng)
    data = base_config()
    data["motion"] = {"test": test_kind, "joint_pvalue_min": p_min}
    data["quality"] = {"negative_parallax_snr_max": 50.0}
    sel = select(table, build(data))
    lost = n - int(sel.zero_motion_passed.sum())
    # binomial error of the loss count (common practice: 4 standard deviations)
    expected = n * nominal
    assert abs(lost - expected) <= 4 * np.sqrt(n * nominal * (1 - nominal)) + 1, (lost, expected)


def test_separate_test_is_one_sided_with_a_named_negative_parallax_cut():
    # rows: parallax +4 sigma (a star), -4 sigma (noise or a bad solution), -6 sigma (a failed solution)
    table = pa.table({
        "astro_id": np.arange(3, dtype=np.int64),
        "parallax_mas": np.array([0.8, -0.8, -1.2]) - 0.017, "parallax_error_mas": np.full(3, 0.2),
        "pmra_mas_yr": np.zeros(3), "pmdec_mas_yr": np.zeros(3),
        "pmra_error_mas_yr": np.full(3, 0.2), "pmdec_error_mas_yr": np.full(3, 0.2),
        "ir_3p4_vegamag": np.full(3, 14.0), "ir_4p6_vegamag": np.full(3, 13.0),
    })
    for kind in ("separate", "joint"):
        data = base_config()
        data["motion"] = {"test": kind}
        sel = select(table, build(data))
        stages = dict(sel.stages)
        assert list(stages["negative_parallax"]) == [True, True, False], kind
        assert list(sel.zero_motion_passed) == [False, True, False], kind
