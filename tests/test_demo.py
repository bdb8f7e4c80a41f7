"""Tests of the invented mock sky (selector.demo)."""

import numpy as np
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest
from astropy.coordinates import SkyCoord
from astropy.table import Table
from astropy.time import Time
import astropy.units as u

from selector.demo import mocksky as demo

SCALE = 0.05


@pytest.fixture(scope="module")
def sky():
    return demo.make_mock_sky(seed=3, scale=SCALE)


@pytest.fixture(scope="module")
def frames(sky):
    """Pandas views of the four tables, with the truth split by catalogue."""
    truth = sky.truth.to_pandas()
    return {
        "astrometric": sky.astrometric.to_pandas(),
        "infrared": sky.infrared.to_pandas(),
        "known": sky.known.to_pandas(),
        "truth_astrometric": truth[truth.catalogue == "astrometric"].reset_index(drop=True),
        "truth_infrared": truth[truth.catalogue == "infrared"].reset_index(drop=True),
    }


def _unit_vectors(ra_deg, dec_deg):
    ra, dec = np.radians(ra_deg), np.radians(dec_deg)
    return np.stack([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)], axis=-1)


def _separation_arcsec(ra1, dec1, ra2, dec2):
    chord = np.linalg.norm(_unit_vectors(ra1, dec1) - _unit_vectors(ra2, dec2), axis=-1)
    return np.degrees(2.0 * np.arcsin(chord / 2.0)) * 3600.0


def test_raw_column_names(sky):
    assert sky.astrometric.column_names == [
        "srcid", "alpha", "delta", "alpha_unc", "delta_unc", "plx", "plx_unc", "mu_a", "mu_d",
        "mu_a_unc", "mu_d_unc", "mu_corr", "plx_mu_a_corr", "plx_mu_d_corr", "mag_broad",
        "mag_broad_unc", "mag_blue", "mag_blue_unc", "mag_red", "mag_red_unc", "fit_excess",
        "ext_excess", "ext_excess_unc"]
    assert sky.infrared.column_names == [
        "ir_name", "ra_ir", "dec_ir", "pos_unc", "m34", "m34_unc", "m46", "m46_unc", "m120",
        "m120_unc", "m220", "m220_unc", "qual_bits", "ext_flag"]
    assert sky.known.column_names == ["label", "ra_k", "dec_k", "kind", "z"]
    assert sky.truth.column_names[:6] == [
        "catalogue", "id", "population", "redshift", "counterpart_id", "blend"]
    assert str(sky.astrometric.schema.field("srcid").type) == "int64"
    for name in ("qual_bits", "ext_flag"):
        assert str(sky.infrared.schema.field(name).type) == "int64"
    units = {f.name: (f.metadata or {}).get(b"unit") for f in sky.truth.schema}
    assert units["true_lbol_erg_s"] == b"erg/s" and units["true_absmag_broad"] == b"mag"
    assert units["true_ra_ir_epoch"] == b"deg" and units["true_ext_excess"] == b"mag"
    assert sky.astrometric.schema.field("ext_excess").metadata[b"unit"] == b"mag"


def test_same_seed_gives_identical_tables_and_bytes(tmp_path):
    first = demo.make_mock_sky(seed=11, scale=0.02)
    second = demo.make_mock_sky(seed=11, scale=0.02)
    for name in ("astrometric", "infrared", "known", "truth"):
        table_a, table_b = getattr(first, name), getattr(second, name)
        assert table_a.schema.equals(table_b.schema, check_metadata=True), name
        # pandas' equals treats NaN in the same place as equal; pyarrow's does not.
        assert table_a.to_pandas().equals(table_b.to_pandas()), name
    paths_a = demo.write_mock_sky(first, tmp_path / "a")
    paths_b = demo.write_mock_sky(second, tmp_path / "b")
    for part in ("part-0.parquet", "part-1.parquet"):
        assert ((paths_a["astrometric"] / part).read_bytes()
                == (paths_b["astrometric"] / part).read_bytes())
    for name in ("truth", "known", "infrared"):
        assert paths_a[name].read_bytes() == paths_b[name].read_bytes(), name


def test_different_seed_differs():
    first = demo.make_mock_sky(seed=11, scale=0.02)
    other = demo.make_mock_sky(seed=12, scale=0.02)
    assert not first.astrometric.equals(other.astrometric)
    assert not first.infrared.equals(other.infrared)


def test_truth_covers_every_row_once(sky, frames):
    ta, ti = frames["truth_astrometric"], frames["truth_infrared"]
    assert sky.truth.num_rows == sky.astrometric.num_rows + sky.infrared.num_rows
    assert list(ta.id) == list(frames["astrometric"].srcid.astype(str))
    assert list(ti.id) == list(frames["infrared"].ir_name)
    assert not sky.truth.to_pandas().id.duplicated().any()


def test_counterparts_point_back(frames):
    ta, ti = frames["truth_astrometric"], frames["truth_infrared"]
    opt_to_ir = dict(zip(ta.id, ta.counterpart_id))
    ir_to_opt = dict(zip(ti.id, ti.counterpart_id))
    for ir_id, opt_id in ir_to_opt.items():
        if opt_id:
            assert opt_to_ir[opt_id] == ir_id
    for opt_id, ir_id in opt_to_ir.items():
        if ir_id:
            assert ir_to_opt[ir_id] == opt_id
    # There are sources in only one of the two catalogues.
    assert (ta.counterpart_id == "").sum() > 0
    assert (ti.counterpart_id == "").sum() > 0


def test_every_population_present(frames):
    for key in ("truth_astrometric", "truth_infrared"):
        assert set(frames[key].population) == {
            "star", "brown_dwarf", "galaxy", "quasar", "bright_quasar"}, key


def test_coordinate_ranges(frames):
    for table, ra, dec in (("astrometric", "alpha", "delta"), ("infrared", "ra_ir", "dec_ir"),
                           ("known", "ra_k", "dec_k")):
        df = frames[table]
        assert ((df[ra] >= 0.0) & (df[ra] < 360.0)).all(), table
        assert ((df[dec] >= -90.0) & (df[dec] <= 90.0)).all(), table


def test_ids_unique(frames):
    assert frames["astrometric"].srcid.is_unique
    assert frames["infrared"].ir_name.is_unique
    assert frames["known"].label.is_unique
    # Identifiers of our own: a 2-degree cell and a serial, and patch number x 10^7 + serial.
    assert frames["infrared"].ir_name.str.fullmatch(r"IRX-\d{5}-\d{4,}").all()
    patch_number = frames["truth_astrometric"].patch.map(
        {p.name: i + 1 for i, p in enumerate(demo._PATCHES)})
    assert (frames["astrometric"].srcid // 10_000_000 == patch_number).all()


def test_infrared_identifiers_stay_unique_for_coincident_sources():
    names = demo._ir_identifiers(np.array([10.0, 10.0, 10.0, 11.0, 359.999999]),
                                 np.array([-5.0, -5.0, -5.0, -5.5, 89.9999999]))
    # cell = zone (floor((dec + 90) / 2)) * 180 + floor(ra / 2)
    assert list(names) == ["IRX-07565-0001", "IRX-07565-0002", "IRX-07565-0003",
                           "IRX-07565-0004", "IRX-16199-0001"]


def test_write_and_read_back(sky, tmp_path):
    paths = demo.write_mock_sky(sky, tmp_path / "out")
    assert set(paths) == {"astrometric", "infrared", "known", "truth"}
    parts = sorted(p.name for p in paths["astrometric"].iterdir())
    assert parts == ["part-0.parquet", "part-1.parquet"]
    astro = pq.read_table(paths["astrometric"])
    assert astro.num_rows == sky.astrometric.num_rows
    assert astro.schema.field("plx").metadata[b"unit"] == b"mas"
    ir = Table.read(paths["infrared"], format="fits")
    assert len(ir) == sky.infrared.num_rows
    assert ir["ra_ir"].unit == u.deg and ir["pos_unc"].unit == u.arcsec
    assert ir["m46"].unit == u.mag
    assert list(ir["ir_name"][:5]) == sky.infrared.column("ir_name").to_pylist()[:5]
    known = pacsv.read_csv(paths["known"])
    assert known.num_rows == sky.known.num_rows
    assert pq.read_table(paths["truth"]).num_rows == sky.truth.num_rows


def test_pole_and_wrap_patches_present(frames):
    astro = frames["astrometric"]
    assert (astro.delta > 89.0).sum() > 10
    wrap = (astro.delta > -36.0) & (astro.delta < -24.0)
    assert ((astro.alpha < 3.0) & wrap).sum() > 10
    assert ((astro.alpha > 357.0) & wrap).sum() > 10
    assert set(frames["truth_astrometric"].patch) >= {"north_pole", "ra_wrap"}


def test_patches_separate_and_span_galactic_latitude():
    centres, radii_deg, _ = demo._patch_geometry()
    separation_deg = np.degrees(np.arccos(np.clip(centres @ centres.T, -1, 1)))
    np.fill_diagonal(separation_deg, 360.0)
    assert (separation_deg > radii_deg[:, None] + radii_deg[None, :]).all()
    icrs = SkyCoord(*[np.degrees(a) for a in (np.arctan2(centres[:, 1], centres[:, 0]),
                                              np.arcsin(centres[:, 2]))], unit="deg")
    abs_b = np.abs(icrs.galactic.b.deg)
    assert abs_b.min() < 15.0 and abs_b.max() > 70.0 and ((abs_b > 20) & (abs_b < 45)).any()


def test_star_density_rises_toward_plane(frames):
    ta = frames["truth_astrometric"]
    _, _, areas = demo._patch_geometry()
    names = [p.name for p in demo._PATCHES]
    stars = ta[ta.population == "star"].patch.value_counts()
    density = {name: stars.get(name, 0) / area for name, area in zip(names, areas)}
    assert density["low_north"] > 3 * density["high_north"]
    assert density["low_south"] > density["mid_south"] > 0.8 * density["ra_wrap"]


def test_quasars_are_at_rest(frames):
    ta, astro = frames["truth_astrometric"], frames["astrometric"]
    qso = ta.population.isin(["quasar", "bright_quasar"]).to_numpy()
    assert (ta.true_parallax[qso] == 0).all()
    assert (ta.true_pmra[qso] == 0).all() and (ta.true_pmdec[qso] == 0).all()
    z_plx = (astro.plx / astro.plx_unc)[qso]
    assert abs(z_plx.mean()) < 0.2
    assert 0.85 < z_plx.std() < 1.15
    # Proper-motion chi^2 with the stated correlation has two degrees of freedom.
    a = (astro.mu_a / astro.mu_a_unc)[qso]
    d = (astro.mu_d / astro.mu_d_unc)[qso]
    rho = astro.mu_corr[qso]
    chi2 = (a**2 - 2 * rho * a * d + d**2) / (1 - rho**2)
    assert 1.7 < chi2.mean() < 2.3
    assert (ta.redshift[qso] >= 0.3).all() and (ta.redshift[qso] <= 4.0).all()


def test_brown_dwarfs_move_between_epochs(frames):
    ta, astro, ir = frames["truth_astrometric"], frames["astrometric"], frames["infrared"]
    bd = (ta.population == "brown_dwarf").to_numpy()
    pm_mas_yr = np.hypot(ta.true_pmra, ta.true_pmdec)[bd]
    assert (pm_mas_yr >= 100.0).all() and (ta.true_parallax[bd] >= 15.0).all()
    matched = bd & (ta.counterpart_id != "").to_numpy()
    assert matched.sum() >= 1
    ir_index = ir.reset_index().set_index("ir_name").loc[ta.counterpart_id[matched], "index"]
    sep = _separation_arcsec(astro.alpha[matched].to_numpy(), astro.delta[matched].to_numpy(),
                             ir.ra_ir.to_numpy()[ir_index], ir.dec_ir.to_numpy()[ir_index])
    dt_yr = demo.ASTROMETRIC_EPOCH_JYEAR - demo.INFRARED_EPOCH_JYEAR
    expected = pm_mas_yr[matched[bd]] * dt_yr / 1000.0
    assert np.all(np.abs(sep - expected) < 5 * ir.pos_unc.to_numpy()[ir_index] + 0.1)


def test_counterpart_offsets_match_stated_errors(frames):
    ta, astro, ir = frames["truth_astrometric"], frames["astrometric"], frames["infrared"]
    use = ((ta.counterpart_id != "") & ~ta.blend
           & ta.population.isin(["quasar", "galaxy"])).to_numpy()
    ir_index = ir.reset_index().set_index("ir_name").loc[ta.counterpart_id[use], "index"]
    sep = _separation_arcsec(astro.alpha[use].to_numpy(), astro.delta[use].to_numpy(),
                             ir.ra_ir.to_numpy()[ir_index], ir.dec_ir.to_numpy()[ir_index])
    sigma = ir.pos_unc.to_numpy()[ir_index]
    # A 2-D Gaussian offset: sep^2 / sigma^2 has mean 2.
    assert 1.7 < np.mean((sep / sigma) ** 2) < 2.3


def test_infrared_colours_by_population(frames):
    ti, ir = frames["truth_infrared"], frames["infrared"]
    colour = ir.m34 - ir.m46
    bright = (ir.m46 < 14.0).to_numpy()
    star = (ti.population == "star").to_numpy() & bright
    assert abs(np.nanmedian(colour[star])) < 0.05
    qso = (ti.population == "quasar").to_numpy()
    assert np.nanmedian(colour[qso]) > 0.9
    gal = (ti.population == "galaxy").to_numpy()
    assert 0.1 < np.nanmedian(colour[gal]) < 0.6
    bq = (ti.population == "bright_quasar").to_numpy()
    assert bq.sum() >= 2
    assert ((ir.m46[bq] > 7.0) & (ir.m46[bq] < 14.5)).all()
    assert ir.m46[bq].median() < np.nanmedian(ir.m46[qso]) - 1.0
    # The long-wavelength bands are much shallower.
    assert ir.m120.isna().mean() > 0.5 > ir.m34.isna().mean()


def test_blends_have_two_optical_sources_in_the_beam(frames):
    ta, ti, astro, ir = (frames[k] for k in ("truth_astrometric", "truth_infrared",
                                             "astrometric", "infrared"))
    blended = ti.blend.to_numpy()
    assert 0 < blended.sum() < 0.05 * len(ti)
    assert ta.blend.sum() == 2 * blended.sum()
    opt_xyz = _unit_vectors(astro.alpha[ta.blend].to_numpy(), astro.delta[ta.blend].to_numpy())
    ir_xyz = _unit_vectors(ir.ra_ir[blended].to_numpy(), ir.dec_ir[blended].to_numpy())
    sep_arcsec = np.degrees(np.arccos(np.clip(ir_xyz @ opt_xyz.T, -1, 1))) * 3600.0
    # Allow for motion over six years and infrared positional noise.
    assert ((sep_arcsec < 4.0).sum(axis=1) >= 2).all()


def test_known_objects(frames):
    known, ta = frames["known"], frames["truth_astrometric"]
    assert set(known.kind) == {"quasar", "star", "galaxy"}
    assert known.z[known.kind == "star"].isna().all()
    assert known.z[known.kind == "quasar"].notna().all()
    n_qso = ta.population.isin(["quasar", "bright_quasar"]).sum()
    assert 0.2 * n_qso < (known.kind == "quasar").sum() < 0.4 * n_qso


def test_astrometric_errors_grow_with_magnitude(frames):
    astro = frames["astrometric"]
    good = astro.fit_excess < 1.2
    for mag, lo, hi in ((15.0, 0.012, 0.035), (18.0, 0.06, 0.16), (20.0, 0.3, 0.8)):
        near = good & (np.abs(astro.mag_broad - mag) < 0.3)
        assert lo < np.median(astro.plx_unc[near]) < hi, mag


def test_propagation_matches_astropy_near_the_pole():
    ra = np.array([10.0, 200.0, 359.9, 45.0])
    dec = np.array([89.99, 89.5, -30.0, 0.0])
    pmra = np.array([2000.0, -1500.0, 800.0, 100.0])
    pmdec = np.array([-500.0, 1800.0, -300.0, 50.0])
    dt_yr = demo.INFRARED_EPOCH_JYEAR - demo.ASTROMETRIC_EPOCH_JYEAR
    moved = demo._propagate(_unit_vectors(ra, dec), pmra, pmdec, dt_yr)
    ra_new, dec_new = demo._xyz_to_lonlat(moved)
    start = SkyCoord(ra=ra * u.deg, dec=dec * u.deg, pm_ra_cosdec=pmra * u.mas / u.yr,
                     pm_dec=pmdec * u.mas / u.yr, distance=10 * u.pc,
                     radial_velocity=0 * u.km / u.s,
                     obstime=Time(demo.ASTROMETRIC_EPOCH_JYEAR, format="jyear"))
    ref = start.apply_space_motion(new_obstime=Time(demo.INFRARED_EPOCH_JYEAR, format="jyear"))
    sep_mas = _separation_arcsec(ra_new, dec_new, ref.ra.deg, ref.dec.deg) * 1000.0
    assert sep_mas.max() < 0.05


@pytest.mark.parametrize("kwargs", [{"seed": -1}, {"seed": 1.5}, {"scale": 0.0},
                                    {"scale": float("nan")}, {"scale": "1"}])
def test_invalid_arguments_are_rejected(kwargs):
    with pytest.raises(ValueError, match="seed|scale"):
        demo.make_mock_sky(**kwargs)


# --- extents, positional errors, correlations, luminosities ---------------------------------------


def test_extent_separates_galaxies_from_point_sources_with_overlap(frames):
    """ext_excess is about 0 ± its error for point sources and positive, broad for galaxies."""
    ta, astro = frames["truth_astrometric"], frames["astrometric"]
    point = ta.population.isin(["star", "quasar", "bright_quasar", "brown_dwarf"]).to_numpy()
    gal = (ta.population == "galaxy").to_numpy()
    pull = (astro.ext_excess / astro.ext_excess_unc)[point & (ta.true_ext_excess == 0).to_numpy()]
    assert abs(pull.mean()) < 0.1 and 0.9 < pull.std() < 1.1
    ext = astro.ext_excess.to_numpy()
    assert np.median(ext[gal]) > 0.08 and np.percentile(ext[gal], 90) > 0.3
    # Separated, but not perfectly: the rank statistic (AUC) is high and below 1.
    from scipy.stats import mannwhitneyu
    auc = mannwhitneyu(ext[gal], ext[point]).statistic / (gal.sum() * point.sum())
    assert 0.85 < auc < 0.995
    # Some compact or faint galaxies look point-like (within 2 sigma of zero).
    point_like = np.abs(ext[gal] / astro.ext_excess_unc.to_numpy()[gal]) < 2.0
    assert 0.02 < point_like.mean() < 0.5
    # The point-source noise grows with faintness.
    unc = astro.ext_excess_unc.to_numpy()
    mag = astro.mag_broad.to_numpy()
    assert np.median(unc[mag < 17]) < 0.01 < 0.05 < np.median(unc[mag > 20.5])


def test_infrared_extendedness_flag(frames):
    ti, ir = frames["truth_infrared"], frames["infrared"]
    assert set(np.unique(ir.ext_flag)) <= {0, 1}
    gal = (ti.population == "galaxy").to_numpy()
    point = ti.population.isin(["star", "quasar", "bright_quasar"]).to_numpy() & ~ti.blend.to_numpy()
    assert ir.ext_flag[point].mean() < 0.01
    assert ir.ext_flag[gal].mean() > 5 * max(ir.ext_flag[point].mean(), 0.002)
    # Resolved galaxies are the larger ones.
    flagged = gal & (ir.ext_flag == 1).to_numpy()
    assert np.median(ti.true_ext_excess[flagged]) > 2 * np.median(ti.true_ext_excess[gal])


def test_quality_bits_are_the_documented_ones(frames):
    bits = frames["infrared"].qual_bits.to_numpy()
    allowed = sum(demo.QUAL_BITS.values())
    assert ((bits & ~allowed) == 0).all() and (bits >= 0).all()
    assert 0.005 < (bits > 0).mean() < 0.2


def test_infrared_offsets_follow_a_rayleigh_law_with_the_stated_sigma(frames):
    """Observed infrared position minus the true centre at the infrared epoch, over pos_unc."""
    from scipy import stats

    ti, ir = frames["truth_infrared"], frames["infrared"]
    sep = _separation_arcsec(ir.ra_ir.to_numpy(), ir.dec_ir.to_numpy(),
                             ti.true_ra_ir_epoch.to_numpy(), ti.true_dec_ir_epoch.to_numpy())
    sigma = ir.pos_unc.to_numpy()
    assert stats.kstest(sep / sigma, stats.rayleigh.cdf).pvalue > 0.001
    # The same holds for the faint and the bright half separately (the sigma is right at every S/N).
    faint = sigma > np.median(sigma)
    for part in (faint, ~faint):
        assert stats.kstest(sep[part] / sigma[part], stats.rayleigh.cdf).pvalue > 0.001


def test_infrared_positional_error_grows_toward_the_faint_limit(frames):
    ir = frames["infrared"]
    bright = ir.m46 < 12.0
    faint = ir.m46 > 15.8
    assert 0.07 < np.median(ir.pos_unc[bright]) < 0.12
    assert 0.3 < np.median(ir.pos_unc[faint]) < 1.0
    assert 0.6 < ir.pos_unc.max() < 1.2


def test_true_ir_epoch_centre_is_the_propagated_position_for_single_sources(frames):
    """For unblended sources, true_*_ir_epoch is true_ra/dec moved by the true proper motion."""
    ta = frames["truth_astrometric"]
    movers = (~ta.blend & (np.hypot(ta.true_pmra, ta.true_pmdec) > 50)).to_numpy()
    assert movers.sum() >= 1
    start = SkyCoord(ra=ta.true_ra[movers].to_numpy() * u.deg, dec=ta.true_dec[movers].to_numpy() * u.deg,
                     pm_ra_cosdec=ta.true_pmra[movers].to_numpy() * u.mas / u.yr,
                     pm_dec=ta.true_pmdec[movers].to_numpy() * u.mas / u.yr, distance=10 * u.pc,
                     radial_velocity=0 * u.km / u.s,
                     obstime=Time(demo.ASTROMETRIC_EPOCH_JYEAR, format="jyear"))
    ref = start.apply_space_motion(new_obstime=Time(demo.INFRARED_EPOCH_JYEAR, format="jyear"))
    sep_mas = _separation_arcsec(ta.true_ra_ir_epoch[movers].to_numpy(),
                                 ta.true_dec_ir_epoch[movers].to_numpy(), ref.ra.deg, ref.dec.deg) * 1e3
    assert sep_mas.max() < 0.05


def test_parallax_and_motion_noise_follow_the_stated_correlations(frames):
    """For sources at rest the 3-D chi^2 with the stated correlation matrix has 3 degrees of freedom."""
    from scipy import stats

    ta, astro = frames["truth_astrometric"], frames["astrometric"]
    rest = ta.population.isin(["quasar", "bright_quasar", "galaxy"]).to_numpy()
    z = np.stack([(astro.plx / astro.plx_unc)[rest], (astro.mu_a / astro.mu_a_unc)[rest],
                  (astro.mu_d / astro.mu_d_unc)[rest]], axis=1)
    a, b, c = (astro[k].to_numpy()[rest] for k in ("plx_mu_a_corr", "plx_mu_d_corr", "mu_corr"))
    assert (np.abs(a) <= 0.2).all() and (np.abs(b) <= 0.2).all() and np.std(a) > 0.03
    corr = np.empty((rest.sum(), 3, 3))
    corr[:] = np.eye(3)
    corr[:, 0, 1] = corr[:, 1, 0] = a
    corr[:, 0, 2] = corr[:, 2, 0] = b
    corr[:, 1, 2] = corr[:, 2, 1] = c
    chi2 = np.einsum("ni,ni->n", z, np.linalg.solve(corr, z[..., None])[..., 0])
    assert stats.kstest(chi2, stats.chi2(3).cdf).pvalue > 0.001
    # Ignoring the parallax–motion terms would give a visibly different law only if they mattered;
    # here they are small, so the check above is the one that counts.


def test_quasar_luminosities_agree_with_planck18_distances(frames):
    """M = m − dimming − DM(z) + 1.25 log10(1 + z) and L_bol = 5.15 νL_ν(3000 Å) along ν^−0.5."""
    from astropy.cosmology import Planck18

    ta = frames["truth_astrometric"]
    qso = ta.population.isin(["quasar", "bright_quasar"]).to_numpy()
    assert qso.sum() > 100
    q = ta[qso]
    dm = Planck18.distmod(q.redshift.to_numpy()).to_value(u.mag)
    expected_m = q.true_mag_broad - q.true_dimming_broad - dm + 1.25 * np.log10(1 + q.redshift)
    assert np.allclose(q.true_absmag_broad, expected_m, atol=1e-3)
    # L_nu at 10 pc from the AB zero point, carried along f_nu ∝ nu^-0.5 from 6200 Å to 3000 Å.
    l_nu = (4 * np.pi * (10 * u.pc) ** 2 * 10 ** (-0.4 * (q.true_absmag_broad.to_numpy() + 48.60))
            * u.erg / u.s / u.cm**2 / u.Hz)
    nu_3000 = (3000 * u.AA).to(u.Hz, equivalencies=u.spectral())
    nu_eff = (6200 * u.AA).to(u.Hz, equivalencies=u.spectral())
    lbol = (5.15 * nu_3000 * l_nu * (nu_3000 / nu_eff) ** -0.5).to_value(u.erg / u.s)
    assert np.allclose(q.true_lbol_erg_s, lbol, rtol=1e-6)
    assert 1e44 < np.median(lbol) < 1e47
    # Other populations carry no luminosity; every quasar has a finite one.
    assert ta.true_lbol_erg_s[~qso].isna().all() and np.isfinite(q.true_lbol_erg_s).all()


def test_very_bright_quasars_top_the_luminosity_distribution(sky, frames):
    truth = sky.truth.to_pandas()
    qso = truth[truth.population.isin(["quasar", "bright_quasar"])]
    bright = qso.population == "bright_quasar"
    assert bright.sum() >= 2
    assert qso.true_lbol_erg_s[bright].min() > qso.true_lbol_erg_s[~bright].max()
    assert (qso.true_absmag_broad[bright] <= -28.4).all()
    # Some nearby and apparently bright, some at high redshift.
    assert (qso.redshift[bright] < 1.0).any() and (qso.redshift[bright] > 2.0).any()
    assert qso.true_mag_broad[bright & (qso.redshift < 1.0)].max() < 16.0


@pytest.mark.parametrize("scale, at_least", [(1.0, 5), (0.3, 2), (SCALE, 2)])
def test_very_bright_quasar_count_scales_with_the_sky(scale, at_least):
    objs = demo._make_bright_quasars(np.random.default_rng(0), scale)
    n = len(objs["pop"])
    assert n >= at_least and n == max(2, round(demo._BRIGHT_QUASARS_AT_SCALE_1 * scale))


def test_known_quasars_carry_redshifts_for_training(frames):
    known, ta = frames["known"], frames["truth_astrometric"]
    q = known[known.kind == "quasar"]
    assert q.z.notna().all() and (q.z > 0.2).all()
    # Each known quasar's redshift is its true redshift (to the four decimals given).
    truth_q = ta[ta.population.isin(["quasar", "bright_quasar"])]
    coords_t = _unit_vectors(truth_q.true_ra.to_numpy(), truth_q.true_dec.to_numpy())
    coords_k = _unit_vectors(q.ra_k.to_numpy(), q.dec_k.to_numpy())
    nearest = np.argmax(coords_k @ coords_t.T, axis=1)
    assert np.allclose(q.z.to_numpy(), np.round(truth_q.redshift.to_numpy()[nearest], 4))
