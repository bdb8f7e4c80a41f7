"""Tests of selector.core.novelty: distance from the labelled set and coverage of candidates by labels.

References from outside the module: brute-force distances from scipy.spatial.distance.cdist,
numpy's median and percentiles, the binomial error of a flag rate and of an estimated quantile
(common practice), the null spread of an AUC (Mann & Whitney 1947, Annals of Mathematical
Statistics 18, 50) and scipy.stats.ks_2samp.
"""

import io

import numpy as np
import pytest
from scipy.spatial.distance import cdist
from scipy.stats import ks_2samp

from selector.core import novelty
from selector.errors import InputError

NAMES = ["mag_optical", "mag_3p4um", "colour_3p4_4p6", "log_sep"]
COV = np.array([[1.0, 0.6, 0.0, 0.0], [0.6, 1.0, 0.2, 0.0], [0.0, 0.2, 0.5, 0.0], [0.0, 0.0, 0.0, 2.0]])
MEAN = np.array([19.0, 15.0, 1.0, -0.5])


def _draw(rng, n):
    return rng.multivariate_normal(MEAN, COV, size=n)


def test_distances_match_brute_force_leave_one_out():
    # Distances from cdist on the same standardisation (median, IQR/1.349 from numpy), k-th
    # neighbour with each labelled row's own point left out.
    rng = np.random.default_rng(0)
    X = _draw(rng, 300)
    m = novelty.NoveltyModel(k=5).fit(X)
    scale = (np.percentile(X, 75, axis=0) - np.percentile(X, 25, axis=0)) / 1.3489795003921634
    Z = (X - np.median(X, axis=0)) / scale
    D = cdist(Z, Z)
    np.fill_diagonal(D, np.inf)
    own = np.sort(D, axis=1)[:, 4]
    assert m.typical == pytest.approx(np.median(own))
    assert m.threshold == pytest.approx(np.quantile(own / np.median(own), 0.99))
    Q = _draw(rng, 50)
    Dq = cdist((Q - np.median(X, axis=0)) / scale, Z)
    np.testing.assert_allclose(m.score(Q).distance, np.sort(Dq, axis=1)[:, 4] / np.median(own))


def test_rows_from_the_labelled_distribution_are_flagged_at_the_nominal_rate():
    # Fresh draws exceed the labelled 99th percentile 1 % of the time; the spread combines the
    # binomial error of the rate and that of the estimated quantile (common practice).
    rng = np.random.default_rng(1)
    n_lab, n_new = 3000, 6000
    m = novelty.NoveltyModel(k=5, quantile=0.99).fit(_draw(rng, n_lab), NAMES)
    rate = m.score(_draw(rng, n_new)).flag.mean()
    sigma = np.sqrt(0.01 * 0.99 * (1 / n_new + 1 / n_lab))
    assert abs(rate - 0.01) < 4 * sigma


def test_far_rows_are_flagged_and_out_of_range_features_named():
    rng = np.random.default_rng(2)
    X = _draw(rng, 2000)
    m = novelty.NoveltyModel().fit(X, NAMES)
    far = MEAN + 10 * np.sqrt(np.diag(COV))
    # Brighter (smaller magnitude) than every labelled row on the optical magnitude only.
    bright = MEAN.copy()
    bright[0] = X[:, 0].min() - 0.5
    res = m.score(np.vstack([far, bright, MEAN]))
    assert res.flag[0] and res.distance[0] > m.threshold
    assert not res.flag[2]
    np.testing.assert_array_equal(res.below[1], [True, False, False, False])
    assert not res.above[1].any()
    assert res.above[0].all()
    assert m.features_outside(res) == [tuple(f"{n}>" for n in NAMES), ("mag_optical<",), ()]


def test_missing_values_are_imputed_and_noted():
    rng = np.random.default_rng(3)
    X = _draw(rng, 1000)
    X[rng.random(X.shape) < 0.05] = np.nan
    m = novelty.NoveltyModel().fit(X, NAMES)
    # nanmedian of the labelled rows is the imputed value (numpy as reference).
    np.testing.assert_allclose(m.center, np.nanmedian(X, axis=0))
    Q = _draw(rng, 20)
    Q[0, 1] = np.nan
    Q[1, :] = np.nan
    res = m.score(Q)
    assert np.all(np.isfinite(res.distance))
    np.testing.assert_array_equal(res.imputed[0], [False, True, False, False])
    assert res.imputed[1].all()
    assert not res.below[1].any() and not res.above[1].any()
    # A row with every feature missing sits at the labelled median: the same distance as that point.
    at_median = m.score(np.nanmedian(X, axis=0)[None, :]).distance[0]
    assert res.distance[1] == pytest.approx(at_median)
    with pytest.raises(InputError):
        novelty.NoveltyModel().fit(np.column_stack([X[:, 0], np.full(len(X), np.nan)]))


def test_model_round_trips_through_npz():
    rng = np.random.default_rng(4)
    m = novelty.NoveltyModel(k=3, quantile=0.95).fit(_draw(rng, 500), NAMES)
    buf = io.BytesIO()
    np.savez(buf, **m.to_arrays())
    buf.seek(0)
    with np.load(buf, allow_pickle=False) as f:
        back = novelty.NoveltyModel.from_arrays(f)
    Q = _draw(rng, 100)
    a, b = m.score(Q), back.score(Q)
    np.testing.assert_array_equal(a.distance, b.distance)
    np.testing.assert_array_equal(a.flag, b.flag)
    assert back.feature_names == NAMES and back.k == 3
    with pytest.raises(InputError):
        novelty.NoveltyModel.from_arrays({"k": np.array(3)})


def test_coverage_of_a_like_candidate_set_gives_no_warning():
    # Same distribution: cross-validated AUC within 4 null standard deviations of 0.5
    # (Mann & Whitney 1947) and no warnings; KS values are those of scipy.stats.ks_2samp.
    rng = np.random.default_rng(5)
    A, B = _draw(rng, 1500), _draw(rng, 1500)
    cov = novelty.label_coverage(A, B, feature_names=NAMES)
    assert cov.warnings == []
    assert abs(cov.auc - 0.5) < 4 * np.sqrt((1500 + 1500 + 1) / (12 * 1500 * 1500))
    assert cov.ks_statistic[2] == pytest.approx(ks_2samp(A[:, 2], B[:, 2]).statistic)
    assert np.all(cov.outside_fraction < 0.05)


def test_coverage_warns_about_a_shifted_feature_by_name():
    # Candidates redder by 1σ in one colour: KS and the classifier test both notice.
    rng = np.random.default_rng(6)
    A, B = _draw(rng, 1500), _draw(rng, 1500)
    B[:, 2] += np.sqrt(COV[2, 2])
    B[::10, 3] = np.nan  # missing values are allowed
    cov = novelty.label_coverage(A, B, feature_names=NAMES)
    named = [w for w in cov.warnings if "'colour_3p4_4p6'" in w]
    assert named, cov.warnings
    assert not any("'mag_optical'" in w or "'log_sep'" in w for w in cov.warnings)
    assert cov.auc > 0.6
    assert any("AUC" in w and "colour_3p4_4p6" in w for w in cov.warnings)
