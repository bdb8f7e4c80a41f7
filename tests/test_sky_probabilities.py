"""Probabilities that mean what they say on the sky (selector.jobs.train.sky and the scorer).

External sources of the checks:

* the prior shift p′(c|x) ∝ p(c|x)·π′_c/π_c and its EM estimate of π′: Saerens, Latinne &
  Decaestecker 2002, Neural Computation 14, 21 (eq. 2.4 and section 3); the closed form is
  written out here independently of the code under test, and checked against
  :func:`selector.core.priors.adjust_posteriors` too;
* the binomial error of a proportion √(π(1−π)/n) (common practice);
* a model that learns nothing (labels independent of the features) must, when calibrated without
  leaking labels, predict the base rate (common practice; the point of cross-fitting,
  Chernozhukov et al. 2018, Econometrics Journal 21, C1);
* the reliability diagram (common practice), against :func:`selector.core.calibration.reliability_table`.

The Gaussian classes below are invented for these tests; no figure is taken from them as a check value.
"""

import numpy as np
import pyarrow as pa
import pytest
from scipy.special import expit

from selector.core.calibration import reliability_table
from selector.core.priors import adjust_posteriors
from selector.jobs import train
from selector.jobs.train.evaluation import weighted_reliability
from selector.jobs.train.sky import PriorAdjustment, ScoredPopulation, estimate_adjustment

from conftest import base_config, build

_CENTRES = np.array([[3.0, 3.0, 0.0, 0.0], [0.0, 0.0, 3.0, 0.0], [-2.0, 3.0, -3.0, 0.0]])


def _draw(rng, n, mix):
    y = rng.choice(3, n, p=mix)
    X = rng.normal(size=(n, 4)) + _CENTRES[y]
    return X, y


def _labelled(X, y, rng, n_regions=40):
    n = len(y)
    groups = rng.integers(0, n_regions, n).astype(np.int64)
    table = pa.table({"astro_id": np.arange(1, n + 1, dtype=np.int64), "tile": groups,
                      "label": [train.CLASSES[k] for k in y], "label_source": ["synthetic"] * n})
    summary = {"rows": n, "by_class": {c: int(np.sum(y == k)) for k, c in enumerate(train.CLASSES)}}
    return train.LabelledSet(table, X, y.astype(np.int64), groups, ["f_a", "f_b", "f_c", "f_d"], 3, summary)


def _config(tmp_path, **classifier):
    data = base_config()
    data["classifier"] = {"max_iter": 30, "max_leaf_nodes": 15, "permutation_repeats": 1, "folds": 4, **classifier}
    return build(data, tmp_path)


def _quiet(*args):
    pass


@pytest.fixture(scope="module")
def mixture(tmp_path_factory):
    """A model trained at one class mix, and a sky drawn from the same classes at another mix."""
    rng = np.random.default_rng(12)
    X, y = _draw(rng, 3000, [0.3, 0.35, 0.35])
    cfg = _config(tmp_path_factory.mktemp("sky"))
    result = train.train_labelled(cfg, _labelled(X, y, rng), log=_quiet)
    sky_mix = np.array([0.05, 0.6, 0.35])
    Xs, ys = _draw(rng, 20000, sky_mix)
    return {"cfg": cfg, "result": result, "sky_X": Xs, "sky_y": ys, "sky_mix": sky_mix, "rng": rng}


def _population(model, X, mags=None):
    n = len(X)
    return ScoredPopulation(model.decisions(X), model.predict_proba(X),
                            np.full(n, np.nan) if mags is None else mags, np.ones(n, bool), X[:200])


def test_adjusted_posterior_through_the_scorer_equals_the_closed_form(mixture):
    model = mixture["result"].model
    train_mix = np.bincount(mixture["result"].plan.y, minlength=3) / len(mixture["result"].plan.y)
    sky = np.array([0.01, 0.7, 0.29])
    model.priors = PriorAdjustment(model.classes, train_mix[None, :], sky[None, :], method="config")
    X = mixture["sky_X"][:2000]
    s = model.scores(X)
    p = model.predict_proba(X)
    # Saerens, Latinne & Decaestecker 2002, eq. 2.4, written out
    moved = p * (sky / train_mix)
    moved /= moved.sum(axis=1, keepdims=True)
    assert np.allclose(s.p_quasar, moved[:, 0], rtol=1e-10, atol=1e-14)
    assert np.allclose(moved, adjust_posteriors(p, train_mix, sky), rtol=1e-12)
    assert np.allclose(s.p_quasar_labelled_mix, p[:, 0], rtol=1e-12)
    assert np.allclose(expit(s.quasar_log_odds), s.p_quasar, rtol=1e-10)
    # a rarer class on the sky lowers every probability of it
    assert np.all(s.p_quasar <= s.p_quasar_labelled_mix + 1e-15)


def test_em_through_training_recovers_a_known_sky_mix(mixture):
    result, cfg = mixture["result"], mixture["cfg"]
    model = result.model
    X, y = mixture["sky_X"], mixture["sky_y"]
    adj = estimate_adjustment(cfg, model.classes, result.plan.y, np.full(len(result.plan.y), np.nan),
                              _population(model, X), log=_quiet)
    assert adj.method == "em" and adj.converged
    n = len(X)
    for c in range(3):
        # the realised proportion of the draw, and its binomial spread about the mix it was drawn from
        pi = mixture["sky_mix"][c]
        sigma = np.sqrt(pi * (1 - pi) / n)
        assert abs(adj.sky[0, c] - pi) < 4 * sigma, (c, adj.sky[0, c], pi, sigma)
        assert abs(adj.sky[0, c] - np.mean(y == c)) < 4 * sigma
    # the labelled mix the probabilities refer to: the label frequencies (the calibration is unweighted)
    assert np.allclose(adj.train[0], np.bincount(result.plan.y, minlength=3) / len(result.plan.y))


def test_em_per_magnitude_bin_recovers_each_bin(tmp_path, mixture):
    """Two magnitude bins whose quasar fractions differ; the magnitude says nothing else about the class."""
    rng = np.random.default_rng(5)
    result = mixture["result"]
    model = result.model
    cfg = _config(tmp_path, sky_prior_bins={"band": "4.6", "edges_mag": [15.0], "min_rows": 500})
    bright, faint = np.array([0.2, 0.5, 0.3]), np.array([0.02, 0.68, 0.3])
    Xb, yb = _draw(rng, 8000, bright)
    Xf, yf = _draw(rng, 8000, faint)
    X = np.vstack([Xb, Xf])
    mags = np.r_[np.full(8000, 14.0), np.full(8000, 16.0)]
    lab_mags = np.where(rng.random(len(result.plan.y)) < 0.5, 14.0, 16.0)
    adj = estimate_adjustment(cfg, model.classes, result.plan.y, lab_mags, _population(model, X, mags), log=_quiet)
    assert adj.n_bins == 3 and adj.band == "4.6"
    for b, mix, n in ((0, bright, 8000), (1, faint, 8000)):
        sigma = np.sqrt(mix[0] * (1 - mix[0]) / n)
        assert abs(adj.sky[b, 0] - mix[0]) < 4 * sigma, (b, adj.sky[b], mix)
    # the bin for a missing magnitude has no rows: it takes the all-sky estimate
    assert adj.fallback[2] and not adj.fallback[:2].any()


def test_noise_labels_give_the_base_rate_held_out(tmp_path):
    """Labels independent of the features: the held-out calibrated P(quasar) must sit at the base rate."""
    rng = np.random.default_rng(3)
    n, base = 3000, 0.2
    X = rng.normal(size=(n, 4))
    y = rng.choice(3, n, p=[base, 0.4, 0.4])
    result = train.train_labelled(_config(tmp_path), _labelled(X, y, rng), log=_quiet)
    p = result.held_out_proba[:, 0]
    assert abs(p.mean() - np.mean(y == 0)) < 0.02
    # nothing to learn: the held-out probabilities stay close together around the base rate ...
    lo, hi = np.percentile(p, [5, 95])
    assert lo > base - 0.08 and hi < base + 0.08, (lo, hi)
    # ... while the boosting's own held-out scores, fitted with balanced class weights, do not
    raw = result.held_out.column("p_quasar_raw").to_numpy()
    assert np.percentile(raw, 95) - np.percentile(raw, 5) > hi - lo
    # and the Brier score is no better than the base rate's own, base(1 − base)
    assert result.evaluation.brier.quasar_calibrated >= np.mean(y == 0) * (1 - np.mean(y == 0)) - 0.005


def test_weighted_reliability_with_unit_weights_is_the_core_table():
    rng = np.random.default_rng(0)
    p = rng.random(500)
    y = rng.random(500) < p
    ours = weighted_reliability(p, y.astype(float), np.ones(500))
    ref = reliability_table(p, y, n_bins=10, strategy="uniform")
    assert np.allclose(ours["mean_predicted"], ref.mean_predicted)
    assert np.allclose(ours["observed"], ref.observed)
    assert np.allclose(ours["error"], ref.error)
    assert ours["count"] == ref.count.tolist()


def test_sky_priors_from_the_config_leave_out_classes_the_model_lacks(tmp_path, mixture):
    result = mixture["result"]
    model = result.model
    cfg = _config(tmp_path, sky_priors={"quasar": 0.001, "star": 0.9, "galaxy": 0.05, "other": 0.049})
    lines = []
    adj = estimate_adjustment(cfg, model.classes, result.plan.y, np.full(len(result.plan.y), np.nan),
                              _population(model, mixture["sky_X"][:100]), log=lines.append)
    assert adj.method == "config"
    assert np.allclose(adj.sky[0], np.array([0.001, 0.9, 0.05]) / 0.951)
    assert len(lines) == 1 and "other" in lines[0]
