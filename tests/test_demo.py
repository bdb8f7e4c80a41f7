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
        "mu_a_unc", "mu_d_unc", "mu_corr", "mag_broad", "mag_broad_unc", "mag_blue",
        "mag_blue_unc", "mag_red", "mag_red_unc", "fit_excess"]
    assert sky.infrared.column_names == [
        "ir_name", "ra_ir", "dec_ir", "pos_unc", "m34", "m34_unc", "m46", "m46_unc", "m120",
        "m120_unc", "m220", "m220_unc", "qual"]
    assert sky.known.column_names == ["label", "ra_k", "dec_k", "kind", "z"]
    assert sky.truth.column_names[:6] == [
        "catalogue", "id", "population", "redshift", "counterpart_id", "blend"]
    assert str(sky.astrometric.schema.field("srcid").type) == "int64"


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
    assert frames["infrared"].ir_name.str.match(r"^MOCKIR J\d{6}\.\d{2}[+-]\d{6}\.\d").all()


def test_designations_stay_unique_for_coincident_sources():
    names = demo._designations("X ", np.array([10.0, 10.0, 10.0, 359.999999]),
                               np.array([-5.0, -5.0, -5.0, 89.9999999]))
    assert list(names) == ["X J004000.00-050000.0", "X J004000.00-050000.0-2",
                           "X J004000.00-050000.0-3", "X J235959.99+895959.9"]


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
    assert ((ir.m46[bq] > 9.5) & (ir.m46[bq] < 12.5)).all()
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
