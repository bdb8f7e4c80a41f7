"""Probabilistic counterparts: covariances, offsets, Bayes factor, posterior, one-to-one, chance rate."""

from __future__ import annotations

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord, cartesian_to_spherical
from scipy import stats
from scipy.integrate import trapezoid
from scipy.spatial import cKDTree

from selector.core import counterparts as cp
from selector.errors import ConfigError, InputError

ARCSEC_PER_RAD = 180 * 3600 / np.pi


# --------------------------------------------------------------------------------------------------
# Covariances
# --------------------------------------------------------------------------------------------------

def _random_correlation(rng, dim):
    a = rng.normal(size=(dim, dim))
    c = a @ a.T + 0.1 * np.eye(dim)
    s = np.sqrt(np.diag(c))
    return c / np.outer(s, s)


def test_astrometric_covariance_is_linear_propagation():
    rng = np.random.default_rng(1)
    for _ in range(20):
        sig = rng.uniform(0.05, 2.0, 4)  # σα*, σδ (mas), σμα*, σμδ (mas/yr)
        r = _random_correlation(rng, 4)  # order: α*, δ, μα*, μδ
        dt = rng.uniform(-15, 15)
        k, floor = rng.uniform(1, 2), rng.uniform(0, 0.1)
        c4 = r * np.outer(sig, sig)
        # x(t) = x0 + t μ: J = [I, t I], C(t) = J C Jᵀ (linear error propagation, common practice)
        j = np.hstack([np.eye(2), dt * np.eye(2)])
        ref = (k ** 2 * (j @ c4 @ j.T)) * 1e-6 + floor ** 2 * np.eye(2)
        got = cp.astrometric_covariance(
            sig[0], sig[1], dt, sig[2], sig[3], ra_dec_corr=r[0, 1], pmra_pmdec_corr=r[2, 3],
            ra_pmra_corr=r[0, 2], dec_pmdec_corr=r[1, 3], ra_pmdec_corr=r[0, 3], dec_pmra_corr=r[1, 2],
            systematic_arcsec=floor, inflation=k)
        np.testing.assert_allclose([got.var_east_arcsec2, got.var_north_arcsec2, got.cov_en_arcsec2],
                                   [ref[0, 0], ref[1, 1], ref[0, 1]], rtol=1e-12, atol=1e-18)


def test_missing_correlations_and_motion_default_to_zero():
    got = cp.astrometric_covariance([100.0, 200.0], [50.0, 50.0], 10.0, [2.0, 3.0], [4.0, 5.0])
    # independent components: variances add, σ² + (t σμ)² (common practice)
    np.testing.assert_allclose(got.var_east_arcsec2, (np.array([100.0, 200.0]) ** 2 + [400, 900]) * 1e-6)
    np.testing.assert_allclose(got.var_north_arcsec2, (2500 + np.array([1600.0, 2500.0])) * 1e-6)
    np.testing.assert_array_equal(got.cov_en_arcsec2, 0.0)
    still = cp.astrometric_covariance(100.0, 50.0)
    np.testing.assert_allclose([still.var_east_arcsec2, still.var_north_arcsec2], [0.01, 0.0025])


def test_infrared_covariance_and_rotation():
    ir = cp.infrared_covariance([0.3, 0.5], [0.4, 0.5], [0.5, np.nan], systematic_arcsec=0.1,
                                inflation=1.5)
    np.testing.assert_allclose(ir.var_east_arcsec2, 2.25 * np.array([0.09, 0.25]) + 0.01)
    np.testing.assert_allclose(ir.cov_en_arcsec2, [2.25 * 0.5 * 0.12, 0.0])
    circ = cp.infrared_covariance(0.4)
    assert circ.var_east_arcsec2 == circ.var_north_arcsec2 == pytest.approx(0.16)
    rng = np.random.default_rng(2)
    for _ in range(10):
        c = _random_correlation(rng, 2) * np.outer(*[rng.uniform(0.1, 1, 2)] * 2)
        theta = rng.uniform(-np.pi, np.pi)
        j = np.array([[np.cos(theta), np.sin(theta)], [-np.sin(theta), np.cos(theta)]])
        ref = j @ c @ j.T  # rotation of a covariance, J C Jᵀ (common practice)
        got = cp.rotate_covariance(cp.PositionCovariance(c[0, 0], c[1, 1], c[0, 1]), theta)
        np.testing.assert_allclose(got, [ref[0, 0], ref[1, 1], ref[0, 1]], atol=1e-14)
        # largest eigenvalue against numpy's symmetric eigen-solver
        np.testing.assert_allclose(cp.major_sigma_arcsec(got) ** 2, np.linalg.eigvalsh(c)[1], rtol=1e-12)


# --------------------------------------------------------------------------------------------------
# Offsets and shifts on the sphere
# --------------------------------------------------------------------------------------------------

def _pairs_near(rng, n, max_arcsec, dec_range=(-89.9, 89.9)):
    ra = rng.uniform(0, 360, n)
    dec = rng.uniform(*dec_range, n)
    new = cp.shift_positions(ra, dec, rng.uniform(0, max_arcsec, n), rng.uniform(0, 360, n))
    return ra, dec, new.ra_deg, new.dec_deg


def test_offsets_match_astropy():
    rng = np.random.default_rng(3)
    ra_a, dec_a, ra_b, dec_b = _pairs_near(rng, 500, 10.0)
    a = SkyCoord(ra_a * u.deg, dec_a * u.deg)
    b = SkyCoord(ra_b * u.deg, dec_b * u.deg)
    off = cp.tangent_offset(ra_a, dec_a, ra_b, dec_b)
    # separations: astropy SkyCoord.separation
    np.testing.assert_allclose(off.separation_arcsec, a.separation(b).arcsec, rtol=0, atol=1e-8)
    np.testing.assert_allclose(np.hypot(off.east_arcsec, off.north_arcsec), off.separation_arcsec,
                               rtol=1e-12)
    # directions: astropy spherical_offsets_to (offset-frame longitude and latitude, equal to the
    # tangent-plane offsets to third order in the separation, < 1e-6 arcsec below 10 arcsec)
    d_lon, d_lat = a.spherical_offsets_to(b)
    np.testing.assert_allclose(off.east_arcsec, d_lon.arcsec, atol=1e-6)
    np.testing.assert_allclose(off.north_arcsec, d_lat.arcsec, atol=1e-6)
    xyz = cp.tangent_offset_xyz(cp.unit_vectors(ra_a, dec_a), cp.unit_vectors(ra_b, dec_b))
    np.testing.assert_allclose(xyz.east_arcsec, off.east_arcsec, atol=1e-8)
    np.testing.assert_allclose(xyz.north_arcsec, off.north_arcsec, atol=1e-8)
    gn = cp.tangent_offset(ra_a, dec_a, ra_b, dec_b, projection="gnomonic")
    # gnomonic radius is tan ψ (standard coordinates, common practice)
    np.testing.assert_allclose(np.hypot(gn.east_arcsec, gn.north_arcsec),
                               np.tan(off.separation_arcsec / ARCSEC_PER_RAD) * ARCSEC_PER_RAD, rtol=1e-9)


def test_shift_positions_matches_astropy():
    rng = np.random.default_rng(4)
    ra = rng.uniform(0, 360, 300)
    dec = np.concatenate([rng.uniform(-90, 90, 290), [90, -90, 89.99, -89.99, 0, 0, 45, 45, 1, -1]])
    pa = rng.uniform(0, 360, 300)
    shift = rng.uniform(0, 600, 300)
    got = cp.shift_positions(ra, dec, shift, pa)
    # reference: astropy SkyCoord.directional_offset_by
    ref = SkyCoord(ra * u.deg, dec * u.deg).directional_offset_by(pa * u.deg, shift * u.arcsec)
    sep = SkyCoord(got.ra_deg * u.deg, got.dec_deg * u.deg).separation(ref).arcsec
    assert sep.max() < 1e-6
    assert np.all((got.ra_deg >= 0) & (got.ra_deg < 360))


def test_bayes_factor_symmetric_across_the_pole():
    # two positions 1-2 arcsec apart on either side of the pole: the east axes differ by up to 180°,
    # and B must not depend on which position's axes are used (B is symmetric in the two positions,
    # Budavári & Szalay 2008, ApJ 679, 301)
    rng = np.random.default_rng(5)
    n = 50
    ra_a = rng.uniform(0, 360, n)
    dec_a = 90 - rng.uniform(0.2, 1.0, n) / 3600
    ra_b = ra_a + rng.uniform(90, 270, n)
    dec_b = 90 - rng.uniform(0.2, 1.0, n) / 3600
    cov_a = cp.PositionCovariance(*(np.full(n, v) for v in (0.04, 0.01, 0.01)))
    cov_b = cp.PositionCovariance(*(np.full(n, v) for v in (0.25, 0.09, -0.05)))
    ab = cp.tangent_offset(ra_a, dec_a, ra_b, dec_b)
    ba = cp.tangent_offset(ra_b, dec_b, ra_a, dec_a)
    ln_ab = cp.bayes_factor(ab.east_arcsec, ab.north_arcsec,
                            cp.combine_covariances(cov_a, cp.rotate_covariance(cov_b, ab.rotation_rad))).ln_b
    ln_ba = cp.bayes_factor(ba.east_arcsec, ba.north_arcsec,
                            cp.combine_covariances(cov_b, cp.rotate_covariance(cov_a, ba.rotation_rad))).ln_b
    np.testing.assert_allclose(ln_ab, ln_ba, atol=1e-6)
    # without the rotation the answer would differ: the test can fail
    ln_wrong = cp.bayes_factor(ba.east_arcsec, ba.north_arcsec, cp.combine_covariances(cov_b, cov_a)).ln_b
    assert np.max(np.abs(ln_wrong - ln_ab)) > 0.1


# --------------------------------------------------------------------------------------------------
# Bayes factor and posterior
# --------------------------------------------------------------------------------------------------

def test_bayes_factor_equals_integral_of_product_of_gaussians():
    rng = np.random.default_rng(6)
    for _ in range(6):
        c1 = _random_correlation(rng, 2) * np.outer(*[rng.uniform(0.05, 0.8, 2)] * 2)
        c2 = _random_correlation(rng, 2) * np.outer(*[rng.uniform(0.05, 0.8, 2)] * 2)
        x1 = np.zeros(2)
        x2 = rng.normal(size=2) * np.sqrt(np.diag(c1 + c2)) * 1.5
        # the product of the two densities is a Gaussian around the weighted mean, with covariance
        # (Σ1⁻¹ + Σ2⁻¹)⁻¹: integrate on a fine grid spanning ±10 of its widths
        cp_inv = np.linalg.inv(np.linalg.inv(c1) + np.linalg.inv(c2))
        centre = cp_inv @ (np.linalg.solve(c1, x1) + np.linalg.solve(c2, x2))
        half = 10 * np.sqrt(np.linalg.eigvalsh(cp_inv)[1])
        g = np.linspace(-half, half, 801)
        xx, yy = np.meshgrid(centre[0] + g, centre[1] + g, indexing="ij")
        pts = np.stack([xx, yy], -1)
        # reference densities: scipy.stats.multivariate_normal
        f = stats.multivariate_normal(x1, c1).pdf(pts) * stats.multivariate_normal(x2, c2).pdf(pts)
        integral_arcsec2 = trapezoid(trapezoid(f, g, axis=1), g)
        # B = 4π ∫ f1 f2 dm (Budavári & Szalay 2008, ApJ 679, 301); densities per arcsec² → per sr
        b_ref = 4 * np.pi * integral_arcsec2 * ARCSEC_PER_RAD ** 2
        d = x2 - x1
        got = cp.bayes_factor(d[0], d[1], cp.PositionCovariance(*(c1 + c2)[[0, 1, 0], [0, 1, 1]]))
        np.testing.assert_allclose(got.b, b_ref, rtol=1e-7)
        np.testing.assert_allclose(got.ln_b, np.log(b_ref), rtol=0, atol=1e-7)


def test_circular_form_equals_elliptical_and_paper_formula():
    rng = np.random.default_rng(7)
    s1 = rng.uniform(0.01, 1.0, 100)
    s2 = rng.uniform(0.01, 1.0, 100)
    psi = rng.uniform(0, 5, 100)
    pa = rng.uniform(0, 2 * np.pi, 100)
    circ = cp.bayes_factor_circular(psi, s1, s2)
    s2sum = s1 ** 2 + s2 ** 2
    ell = cp.bayes_factor(psi * np.sin(pa), psi * np.cos(pa),
                          cp.PositionCovariance(s2sum, s2sum, np.zeros(100)))
    np.testing.assert_allclose(circ.ln_b, ell.ln_b, rtol=1e-12)
    # B = 2/(σ1²+σ2²) exp[−ψ²/(2(σ1²+σ2²))], σ in radians (Budavári & Szalay 2008, ApJ 679, 301;
    # from memory)
    s2rad = s2sum / ARCSEC_PER_RAD ** 2
    b_paper = 2 / s2rad * np.exp(-(psi / ARCSEC_PER_RAD) ** 2 / (2 * s2rad))
    np.testing.assert_allclose(circ.b, b_paper, rtol=1e-10)
    pos = circ.b > 0
    assert pos.sum() > 50
    np.testing.assert_allclose(circ.ln_b[pos], np.log(circ.b[pos]), rtol=1e-12)
    # far apart: B underflows, ln B does not
    far = cp.bayes_factor_circular(600.0, 0.1, 0.1)
    assert far.b == 0.0 and np.isfinite(far.ln_b) and far.ln_b < -1e6


def test_posterior_matches_paper_formula():
    rng = np.random.default_rng(8)
    ln_b = rng.uniform(-5, 40, 200)
    p0 = 10 ** rng.uniform(-12, -1, 200)
    # P = [1 + (1 − P0)/(B P0)]⁻¹ (Budavári & Szalay 2008, ApJ 679, 301; from memory)
    ref = 1.0 / (1.0 + (1.0 - p0) / (np.exp(ln_b) * p0))
    np.testing.assert_allclose(cp.posterior_probability(ln_b, p0), ref, rtol=1e-12)
    # extremes stay finite and in order where the direct formula overflows
    ext = cp.posterior_probability([-1e6, 1e6, 0.0], [1e-9, 1e-9, 0.5])
    np.testing.assert_array_equal(ext, [0.0, 1.0, 0.5])
    odds = cp.posterior_log_odds([50.0, 60.0], 1e-3)
    assert odds[1] > odds[0]  # ranking survives where P rounds to 1


def test_prior_and_local_density():
    rng = np.random.default_rng(9)
    # uniform points on the whole sphere: density N / 4π (common practice)
    n = 200_000
    z = rng.uniform(-1, 1, n)
    phi = rng.uniform(0, 2 * np.pi, n)
    xyz = np.stack([np.sqrt(1 - z * z) * np.cos(phi), np.sqrt(1 - z * z) * np.sin(phi), z], -1)
    q = xyz[:200]
    rho = cp.local_density_per_sr(q, xyz, 3600.0)
    cap = 2 * np.pi * (1 - np.cos(np.radians(1.0)))  # solid angle of a cap, 2π(1 − cos r)
    # brute-force count with astropy separations for a few query points
    _, lat, lon = cartesian_to_spherical(*xyz[:20000].T)
    cat = SkyCoord(lon, lat)
    for i in range(3):
        count = np.sum(cat[i].separation(cat).deg < 1.0)
        np.testing.assert_allclose(cp.local_density_per_sr(q[i], xyz[:20000], 3600.0), count / cap)
    expected = n / (4 * np.pi)
    # mean of 200 Poisson counts around a mean of about 15
    assert abs(rho.mean() / expected - 1) < 4 / np.sqrt(200 * expected * cap)
    half = cp.local_density_per_sr(q, xyz, 3600.0, area_fraction=0.5)
    np.testing.assert_allclose(half, 2 * rho)
    # P0 = c / (4πρ): with the whole-sphere count N2 = 4πρ, P0 = N*/(N1 N2) per pair
    np.testing.assert_allclose(cp.prior_from_density(expected, 0.5), 0.5 / n)
    assert cp.prior_from_density(0.0) == 1.0


# --------------------------------------------------------------------------------------------------
# One-to-one assignment
# --------------------------------------------------------------------------------------------------

def _greedy_reference(ia, ib, odds, sep, n_a):
    """Plain greedy walk in a Python loop (common practice for one-to-one matching)."""
    keys = sorted(range(len(ia)), key=lambda k: (-odds[k], sep[k], ia[k], ib[k]))
    taken_a, taken_b = set(), set()
    chosen = np.full(n_a, -1)
    for k in keys:
        if ia[k] in taken_a or ib[k] in taken_b:
            continue
        taken_a.add(ia[k])
        taken_b.add(ib[k])
        chosen[ia[k]] = ib[k]
    return chosen


def _random_pairs(rng, n_a, n_b, m):
    flat = rng.choice(n_a * n_b, size=m, replace=False)
    ia, ib = flat // n_b, flat % n_b
    # few distinct values so that ties in ln B and separation are frequent
    ln_b = rng.integers(0, 6, m).astype(float)
    sep = rng.integers(0, 3, m).astype(float)
    return ia, ib, ln_b, sep


def test_assignment_equals_greedy_reference_and_ignores_pair_order():
    for seed in range(60):
        rng = np.random.default_rng(seed)
        n_a, n_b = int(rng.integers(1, 30)), int(rng.integers(1, 30))
        m = int(rng.integers(0, n_a * n_b + 1))
        ia, ib, ln_b, sep = _random_pairs(rng, n_a, n_b, m)
        prior = 0.3
        res = cp.assign_one_to_one(ia, ib, ln_b, prior, sep, n_astrometric=n_a)
        odds = cp.posterior_log_odds(ln_b, prior)
        np.testing.assert_array_equal(res.ib, _greedy_reference(ia, ib, odds, sep, n_a))
        chosen = res.ib[res.ib >= 0]
        assert len(np.unique(chosen)) == len(chosen)  # no infrared source twice
        perm = rng.permutation(m)
        res2 = cp.assign_one_to_one(ia[perm], ib[perm], ln_b[perm], prior, sep[perm], n_astrometric=n_a)
        for field in ("ib", "probability", "ln_b", "separation_arcsec", "n_candidates", "n_rivals",
                      "n_competitors", "runner_up_ratio", "ambiguous"):
            np.testing.assert_array_equal(getattr(res2, field), getattr(res, field))
        np.testing.assert_array_equal(perm[res2.pair_index[res2.pair_index >= 0]],
                                      res.pair_index[res.pair_index >= 0])


def test_loser_takes_next_best_and_counts():
    # a1 is closer to b0 than a0 is; a0 falls back on b1; a2 only wanted b0 and gets nothing
    ia = np.array([0, 0, 1, 2])
    ib = np.array([10, 11, 10, 10])
    sep = np.array([0.5, 1.0, 0.2, 0.9])
    cov = cp.PositionCovariance(0.25, 0.25, 0.0)
    ln_b = cp.bayes_factor(sep, 0.0, cov).ln_b
    prior = 1e-9
    res = cp.assign_one_to_one(ia, ib, ln_b, prior, sep, n_astrometric=4)
    assert res.ib.tolist() == [11, 10, -1, -1]
    assert res.pair_index.tolist() == [1, 2, -1, -1]
    assert res.n_candidates.tolist() == [2, 1, 1, 0]
    assert res.n_rivals.tolist() == [0, 2, 0, 0]
    assert res.n_competitors.tolist() == [1, 2, 1, 0]
    p = cp.posterior_probability(ln_b, prior)
    np.testing.assert_allclose(res.probability, [p[1], p[2], 0.0, 0.0])
    assert np.isnan(res.ln_b[2]) and np.isnan(res.separation_arcsec[3])
    # runner-up of a0 is its lost pair with b0 (more probable than b1): ratio > 1, ambiguous
    np.testing.assert_allclose(res.runner_up_ratio[0], p[0] / p[1])
    # runner-up of a1 is the best other claimant of b0, a0 at 0.5 arcsec
    np.testing.assert_allclose(res.runner_up_ratio[1], p[0] / p[2])
    assert res.ambiguous.tolist() == [bool(p[0] / p[1] > 0.5), bool(p[0] / p[2] > 0.5), False, False]
    # with a NaN ln B the pair is not a candidate at all
    res_nan = cp.assign_one_to_one(ia, ib, np.where(ia == 1, np.nan, ln_b), prior, sep, n_astrometric=4)
    assert res_nan.ib.tolist() == [10, -1, -1, -1] and res_nan.n_candidates.tolist() == [2, 0, 1, 0]


def test_search_radius():
    got = cp.search_radius_arcsec([0.1, 0.5, np.nan], 5.0, 2.0)
    np.testing.assert_allclose(got, [0.5, 2.0, 2.0])
    with pytest.raises(ConfigError, match="n_sigma"):
        cp.search_radius_arcsec(0.1, 0.0, 2.0)


# --------------------------------------------------------------------------------------------------
# A simulated field with known truth
# --------------------------------------------------------------------------------------------------

def _uniform_box(rng, n, ra_lo, ra_hi, dec_lo, dec_hi):
    ra = rng.uniform(ra_lo, ra_hi, n)
    dec = np.degrees(np.arcsin(rng.uniform(np.sin(np.radians(dec_lo)), np.sin(np.radians(dec_hi)), n)))
    return ra, dec


def _match(ra_a, dec_a, cov_a, ra_b, dec_b, cov_b, completeness, n_sigma=5.0, max_radius=5.0):
    xyz_a, xyz_b = cp.unit_vectors(ra_a, dec_a), cp.unit_vectors(ra_b, dec_b)
    chord = 2 * np.sin(max_radius / ARCSEC_PER_RAD / 2)
    hits = cKDTree(xyz_b).query_ball_point(xyz_a, chord)
    ia = np.repeat(np.arange(len(hits)), [len(h) for h in hits])
    ib = np.concatenate([np.asarray(h, int) for h in hits])
    off = cp.tangent_offset(ra_a[ia], dec_a[ia], ra_b[ib], dec_b[ib])
    pair_cov_b = cp.rotate_covariance(cp.PositionCovariance(*(c[ib] for c in cov_b)), off.rotation_rad)
    total = cp.combine_covariances(cp.PositionCovariance(*(c[ia] for c in cov_a)), pair_cov_b)
    radius = cp.search_radius_arcsec(cp.major_sigma_arcsec(total), n_sigma, max_radius)
    keep = off.separation_arcsec <= radius
    ia, ib, off = ia[keep], ib[keep], cp.TangentOffset(*(x[keep] for x in off))
    total = cp.PositionCovariance(*(x[keep] for x in total))
    ln_b = cp.bayes_factor(off.east_arcsec, off.north_arcsec, total).ln_b
    rho = cp.local_density_per_sr(xyz_a, xyz_b, 120.0)
    prior = cp.prior_from_density(rho, completeness)[ia]
    return cp.assign_one_to_one(ia, ib, ln_b, prior, off.separation_arcsec, n_astrometric=len(ra_a))


def test_simulated_field_recovery_and_chance_rate():
    rng = np.random.default_rng(2024)
    n_a, frac = 6000, 0.3
    # astrometric sources in a 1°×1° box; infrared chance sources over a box 9 arcmin wider on every
    # side so that shifted positions (3 arcmin) and density caps (2 arcmin) stay inside the data
    ra_a, dec_a = _uniform_box(rng, n_a, 149.5, 150.5, -0.5, 0.5)
    n_chance = int(4e4 * 1.3 * 1.3)
    ra_c, dec_c = _uniform_box(rng, n_chance, 149.35, 150.65, -0.65, 0.65)
    has = rng.random(n_a) < frac
    true_a = np.flatnonzero(has)
    # astrometric errors: 20-100 mas positions, 0.5 mas/yr motions over 6 years
    s_ra = rng.uniform(20, 100, n_a)
    s_dec = rng.uniform(20, 100, n_a)
    cov_a = cp.astrometric_covariance(s_ra, s_dec, -6.0, np.full(n_a, 0.5), np.full(n_a, 0.5))
    # infrared errors 0.3-0.7 arcsec per axis, with correlations
    n_b = n_chance + true_a.size
    s_b = rng.uniform(0.3, 0.7, n_b)
    rho_b = rng.uniform(-0.3, 0.3, n_b)
    cov_b = cp.infrared_covariance(s_b, s_b * rng.uniform(0.8, 1.2, n_b), rho_b)
    # true infrared positions: the astrometric position plus a draw from the summed covariance
    tot = cp.combine_covariances(cp.PositionCovariance(*(c[true_a] for c in cov_a)),
                                 cp.PositionCovariance(*(c[n_chance:] for c in cov_b)))
    z1, z2 = rng.normal(size=(2, true_a.size))
    l11 = np.sqrt(tot.var_east_arcsec2)
    l21 = tot.cov_en_arcsec2 / l11
    l22 = np.sqrt(tot.var_north_arcsec2 - l21 ** 2)
    de, dn = l11 * z1, l21 * z1 + l22 * z2
    moved = cp.shift_positions(ra_a[true_a], dec_a[true_a], np.hypot(de, dn), np.degrees(np.arctan2(de, dn)))
    ra_b = np.concatenate([ra_c, moved.ra_deg])
    dec_b = np.concatenate([dec_c, moved.dec_deg])
    truth = np.full(n_a, -1)
    truth[true_a] = n_chance + np.arange(true_a.size)

    res = _match(ra_a, dec_a, cov_a, ra_b, dec_b, cov_b, frac)
    accepted = res.probability > 0.5
    recovered = np.mean((res.ib[true_a] == truth[true_a]) & accepted[true_a])
    assert recovered > 0.93
    false = int(np.sum(accepted & (res.ib != truth)))

    # chance matches measured by shifting the astrometric catalogue 3 arcmin in four directions
    shifted_p = []
    for pa in (45.0, 135.0, 225.0, 315.0):
        s = cp.shift_positions(ra_a, dec_a, 180.0, pa)
        r = _match(s.ra_deg, s.dec_deg, cov_a, ra_b, dec_b, cov_b, frac)
        shifted_p.append(r.probability[r.ib >= 0])
    est = cp.chance_counterparts(np.concatenate(shifted_p), 4 * n_a, n_a, int(accepted.sum()))
    assert est.n_shifted_matches > 100  # enough chance pairs for the comparison to mean something
    # one realisation scatters by its own binomial error on top of the estimate's (common practice)
    assert abs(false - est.expected) < 3 * np.sqrt(est.error ** 2 + est.expected)
    assert 20 < false


# --------------------------------------------------------------------------------------------------
# Bad input
# --------------------------------------------------------------------------------------------------

def test_negative_errors_raise_input_error_naming_the_argument():
    with pytest.raises(InputError, match="sigma_dec_mas"):
        cp.astrometric_covariance([1.0, 2.0], [1.0, -2.0])
    with pytest.raises(InputError, match="pmra_error_mas_yr"):
        cp.astrometric_covariance(1.0, 1.0, 5.0, -0.1, 0.1)
    with pytest.raises(InputError, match="sigma_ra_arcsec"):
        cp.infrared_covariance([-0.3])
    with pytest.raises(InputError, match="sigma_b_arcsec"):
        cp.bayes_factor_circular(1.0, 0.1, -0.1)
    with pytest.raises(InputError, match="ra_dec_corr"):
        cp.infrared_covariance(0.3, 0.3, 1.2)
    with pytest.raises(ConfigError, match="inflation"):
        cp.infrared_covariance(0.3, inflation=-1.0)
    with pytest.raises(ConfigError, match="systematic_arcsec"):
        cp.astrometric_covariance(1.0, 1.0, systematic_arcsec=np.nan)
