"""Photometric redshifts (selector.jobs.train.redshift), candidate luminosity columns and the ranking orders.

The redshift figures are checked against a simulated population whose redshifts are known, with
σ_NMAD and the outlier fraction computed by hand here (definitions: common practice). The mock
numbers are figures of invented data only.
"""

import numpy as np
import pyarrow as pa
import pytest

from selector.core import candidate_physics as cp
from selector.core.selection import rank_candidates, sort_by_score
from selector.errors import ConfigError, SelectorError
from selector.jobs import train

from conftest import base_config, build


def _quiet(*args):
    pass


# --- the figures -------------------------------------------------------------------------------------

def test_redshift_figures_match_a_hand_computation_on_a_simulated_population():
    # a population with known redshifts: 90 % Gaussian errors of 0.05 (1 + z), 10 % catastrophic
    rng = np.random.default_rng(5)
    n = 20_000
    z = rng.uniform(0.3, 4.0, n)
    bad = rng.random(n) < 0.10
    z_phot = np.where(bad, rng.uniform(0.0, 5.0, n), z + 0.05 * (1 + z) * rng.standard_normal(n))
    got = train.redshift_figures(z, z_phot)
    # by hand (common practice): sigma_NMAD = 1.48 median(|dz|/(1+z)), outliers |dz|/(1+z) > 0.15
    rel = np.abs(z_phot - z) / (1 + z)
    assert got["rows"] == n
    assert got["sigma_nmad"] == pytest.approx(1.48 * np.median(rel), rel=1e-12)
    assert got["outlier_fraction"] == pytest.approx(np.count_nonzero(rel > 0.15) / n, rel=1e-12)
    # and near what the simulation put in: sigma 0.05 (a little more: the outliers widen the core's
    # median), outliers = the catastrophic share that lands far off plus the 3-sigma Gaussian tail
    assert 0.05 < got["sigma_nmad"] < 0.06
    far = np.abs(z_phot - z) / (1 + z) > 0.15
    expected = 0.10 * np.mean(far[bad]) + 0.90 * 0.0027
    assert got["outlier_fraction"] == pytest.approx(expected, abs=4 * np.sqrt(expected / n))
    assert abs(got["bias"]) < 0.005


def test_redshift_figures_of_nothing_are_nan():
    got = train.redshift_figures([np.nan], [1.0])
    assert got["rows"] == 0 and np.isnan(got["sigma_nmad"])


# --- fitting on a simulated labelled set ---------------------------------------------------------------

def _labelled(n=1000, seed=1, noise=0.03):
    """Quasars whose first feature is log(1 + z) plus noise; redshifts known."""
    rng = np.random.default_rng(seed)
    z = rng.uniform(0.3, 4.0, n)
    X = np.stack([np.log1p(z) + noise * rng.standard_normal(n), rng.standard_normal(n)], axis=1)
    groups = rng.integers(0, 40, n).astype(np.int64)
    table = pa.table({"astro_id": np.arange(1, n + 1, dtype=np.int64), "tile": groups,
                      "label": ["quasar"] * n, "label_source": ["simulated"] * n, "label_redshift": z})
    y = np.zeros(n, np.int64)
    return train.LabelledSet(table, X, y, groups, ["f_a", "f_b"], 3, {"rows": n}), z


def _config(tmp_path, **classifier):
    data = base_config()
    data["classifier"] = {"max_iter": 40, "max_leaf_nodes": 15, "folds": 4, "redshift_labels_min": 50, **classifier}
    return build(data, tmp_path)


def test_fit_recovers_redshifts_with_held_out_figures(tmp_path):
    data, z = _labelled()
    result = train.fit_redshift(_config(tmp_path), data, log=_quiet)
    e = result.evaluation
    # the feature carries log(1+z) with 0.03 noise, i.e. dz/(1+z) of about 0.03: the model should come close
    assert e.rows == len(z) and e.folds == 4
    assert e.sigma_nmad < 0.06 and e.outlier_fraction < 0.02
    # a 68 % interval should hold roughly 68 % of the truths (held out)
    assert 0.5 < e.interval_coverage < 0.85
    held = result.held_out
    back = train.redshift_figures(held.column("redshift").to_numpy(), held.column("z_phot").to_numpy())
    assert back["sigma_nmad"] == pytest.approx(e.sigma_nmad)
    low, med, high = result.model.predict(data.X)
    assert np.all(low <= med) and np.all(med <= high) and np.all(low >= 0.0)
    # folds never split a sky region
    fold = held.column("fold").to_numpy()
    for g in np.unique(data.groups):
        assert len(np.unique(fold[data.groups == g])) == 1


def test_too_few_redshifts_fit_no_model_and_say_so(tmp_path):
    data, _ = _labelled(n=60)
    lines = []
    assert train.fit_redshift(_config(tmp_path, redshift_labels_min=100), data, log=lines.append) is None
    assert len(lines) == 1 and "redshift_labels_min = 100" in lines[0]


# --- the ranking orders ----------------------------------------------------------------------------------

def _ranked_table():
    return pa.table({
        "astro_id": np.array([1, 2, 3, 4, 5], np.int64),
        "p_quasar": np.array([0.99, 0.50, 0.90, 0.99, 0.10]),
        "lbol_erg_s": np.array([1e46, 1e47, 3e46, np.nan, 1e48]),
    }).append_column("expected_lbol_erg_s", pa.array(cp.expected_luminosity(
        [0.99, 0.50, 0.90, 0.99, 0.10], [1e46, 1e47, 3e46, np.nan, 1e48])))


def test_ranking_orders_sort_as_documented():
    t = _ranked_table()
    ids = lambda order: sort_by_score(t, order).column("astro_id").to_pylist()  # noqa: E731
    # probability: P(quasar), ties by id
    assert ids("probability") == [1, 4, 3, 2, 5]
    # luminosity: L_bol, unknown last
    assert ids("luminosity") == [5, 2, 3, 1, 4]
    # expected luminosity: P x L = 1e47, 5e46, 2.7e46, 9.9e45, unknown
    assert ids("expected_luminosity") == [5, 2, 3, 1, 4]
    # a luminous but improbable source falls behind: 0.005 x 1e48 = 5e45 < 0.99 x 1e46
    t2 = t.set_column(1, "p_quasar", pa.array([0.99, 0.50, 0.90, 0.99, 0.005]))
    t2 = t2.set_column(3, "expected_lbol_erg_s", pa.array(cp.expected_luminosity(
        t2.column("p_quasar").to_numpy(), t2.column("lbol_erg_s").to_numpy())))
    assert sort_by_score(t2, "expected_luminosity").column("astro_id").to_pylist() == [2, 3, 1, 5, 4]
    assert rank_candidates(t, "luminosity").column("rank").to_pylist() == [1, 2, 3, 4, 5]


def test_luminosity_order_without_luminosities_is_one_line():
    t = pa.table({"astro_id": [1, 2], "p_quasar": [0.2, 0.3]})
    with pytest.raises(SelectorError) as info:
        sort_by_score(t, "luminosity")
    assert "\n" not in str(info.value) and "lbol_erg_s" in str(info.value)


def test_luminosity_order_needs_a_model_in_the_config(tmp_path):
    data = base_config()
    data["ranking"] = {"order": "expected_luminosity"}
    with pytest.raises(ConfigError, match="ranking.order"):
        build(data, tmp_path)
    data["ranking"] = {"order": "brightest"}
    with pytest.raises(ConfigError, match="ranking.order"):
        build(data, tmp_path)


# --- spectroscopic redshifts win; labelled luminosity -----------------------------------------------------

def _candidates(tmp_path, z_phot):
    data = base_config()
    data["astrometric"]["magnitudes"][0]["wavelength_angstrom"] = 6200.0
    cfg = build(data, tmp_path)
    n = len(z_phot)
    t = pa.table({"astro_id": np.arange(1, n + 1, dtype=np.int64), "opt_broad_abmag": np.full(n, 18.0),
                  "ir_3p4_vegamag": np.full(n, 15.0), "ir_4p6_vegamag": np.full(n, 14.0),
                  "p_quasar": np.full(n, 0.8)})
    z = np.asarray(z_phot, float)
    return cfg, cp.candidate_columns(t, cp.Redshifts(0.9 * z, z, 1.1 * z, np.full(n, "photo")), cfg)


def test_spectroscopic_redshift_replaces_the_photometric_one(tmp_path):
    cfg, t = _candidates(tmp_path, [1.0, 2.0, 3.0])
    out = cp.adopt_spectroscopic(t, [np.nan, 2.5, np.nan], cfg)
    assert out.column("z_source").to_pylist() == ["photo", "spec", "photo"]
    assert out.column("redshift").to_pylist() == [1.0, 2.5, 3.0]
    assert out.column("z_phot").to_pylist() == [1.0, 2.0, 3.0]
    assert out.column("redshift_low")[1].as_py() == out.column("redshift_high")[1].as_py() == 2.5
    lb = out.column("lbol_erg_s").to_numpy()
    assert lb[0] == t.column("lbol_erg_s")[0].as_py() and lb[1] > t.column("lbol_erg_s")[1].as_py()
    assert out.column("lbol_low_erg_s")[1].as_py() == pytest.approx(lb[1])
    assert out.column("expected_lbol_erg_s")[1].as_py() == pytest.approx(0.8 * lb[1])
    # all rows spectroscopic: the text column is not truncated
    every = cp.adopt_spectroscopic(t.drop(["z_source"]).append_column("z_source", pa.array(["", "", ""])),
                                   [1.0, 1.0, 1.0], cfg)
    assert every.column("z_source").to_pylist() == ["spec"] * 3


def test_interval_brackets_the_median_and_beyond_labelled_flags_the_brightest(tmp_path):
    _, t = _candidates(tmp_path, [0.5, 1.5, 3.5])
    for name in ("lbol", "lamL1350", "lamL3000", "lamL5100"):
        low, mid, high = (t.column(f"{name}{s}_erg_s").to_numpy() for s in ("_low", "", "_high"))
        ok = np.isfinite(mid)
        assert np.all(low[ok] <= mid[ok]) and np.all(mid[ok] <= high[ok])
    lb = t.column("lbol_erg_s").to_numpy()
    flag = cp.beyond_labelled(lb, [lb[1], np.nan])
    assert flag.tolist() == [False, False, True]
    assert not cp.beyond_labelled(lb, []).any()


# --- priority rules on luminosity and redshift --------------------------------------------------------

def test_priority_classes_can_ask_for_luminosity_and_redshift():
    from selector.core.observability import priority_classes
    from selector.settings.config import PriorityConfig

    n = 6
    score, rank = np.linspace(1.0, 0.5, n), np.arange(1, n + 1)
    mag, steps = np.full(n, 12.0), np.full(n, 60)
    lbol = np.array([1e45, 1e47, 5e46, np.nan, 2e47, 1e46])
    z = np.array([3.0, 0.5, 2.5, 3.0, 2.2, 1.0])
    p = PriorityConfig(class1_score_top_fraction=1.0, class2_score_top_fraction=1.0, class1_lbol_min_erg_s=4e46,
                       class1_redshift_min=2.0, class2_lbol_min_erg_s=1e46)
    got = priority_classes(score, rank, mag, steps, step_min=10, priority=p, lbol_erg_s=lbol, redshift=z)
    # class 1: L >= 4e46 and z >= 2 (rows 3 and 5); class 2: L >= 1e46; a missing L fails both
    assert got.tolist() == [3, 2, 1, 3, 1, 2]
    # without luminosities the limits cannot be met
    assert set(priority_classes(score, rank, mag, steps, step_min=10, priority=p).tolist()) == {3}
