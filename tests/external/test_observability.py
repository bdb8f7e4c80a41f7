"""Observability checked against astropy.

Reference: astropy ``SkyCoord.transform_to(AltAz(..., pressure=0))`` (astropy.coordinates, no
refraction) for altitudes of targets, of the Sun (``get_sun``) and of the Moon (``get_body``), with
astropy's bundled Earth-rotation data (no download). The module computes altitudes from the hour
angle and the apparent sidereal time with interpolated ephemerides; these tests bound the
difference. The site is invented (round numbers); the dates are an arbitrary semester.
"""

from __future__ import annotations

import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import AltAz, SkyCoord, get_body, get_sun
from astropy.coordinates.errors import NonRotationTransformationWarning
from astropy.time import Time

from selector.core import observability as fu
from selector.settings.config import SiteConfig

SITE = SiteConfig(latitude_deg=-29.0, longitude_deg=-70.0, height_m=2400.0, name="test site")
MJD_2027_04_01 = 61496.0  # 2027-04-01T00:00 UTC (astropy Time("2027-04-01").mjd)


def _astropy_altaz(coord, mjd, site=SITE):
    with fu.offline_earth_rotation():
        t = Time(mjd, format="mjd", scale="utc")
        frame = AltAz(obstime=t, location=fu.site_location(site), pressure=0 * u.hPa)
        return coord(t).transform_to(frame).alt.deg


def test_mjd_constant():
    assert Time("2027-04-01", scale="utc").mjd == MJD_2027_04_01


@pytest.mark.parametrize("latitude_deg", [-29.0, 52.0, 0.0])
def test_target_altitudes_within_a_tenth_of_a_degree_of_astropy(latitude_deg):
    site = SiteConfig(latitude_deg=latitude_deg, longitude_deg=-70.0, height_m=2400.0)
    ra = np.repeat(np.arange(0.0, 360.0, 40.0), 7)
    dec = np.tile([-85.0, -60.0, -30.0, 0.0, 30.0, 60.0, 85.0], 9)
    mjd = MJD_2027_04_01 + np.linspace(0.0, 182.0, 23) + 0.1234
    ours = fu.altitude_deg(ra, dec, mjd, site)
    ref = _astropy_altaz(lambda t: SkyCoord(ra[:, None] * u.deg, dec[:, None] * u.deg), mjd[None, :], site)
    assert ref.shape == ours.shape
    assert np.max(np.abs(ours - ref)) < 0.1
    # in fact far better: the remaining difference is aberration drift within an epoch block
    assert np.max(np.abs(ours - ref)) < 0.01


def test_sun_altitude_of_the_night_grid_matches_astropy():
    grid = fu.night_grid(SITE, "2027-04-01", "2027-04-08", -18.0, 10)
    sub = np.arange(0, len(grid.step_mjd), 5)
    ref = _astropy_altaz(lambda t: get_sun(t), grid.step_mjd[sub])
    # the module's Sun is geocentric: the solar parallax (8.8", 0.0024 deg) is the main difference
    assert np.max(np.abs(grid.sun_altitude_deg[sub] - ref)) < 0.01
    clear = np.abs(ref + 18.0) > 0.01
    assert np.array_equal(grid.dark[sub][clear], (ref < -18.0)[clear])


@pytest.mark.parametrize("limit_deg", [-18.0, -12.0])
def test_night_boundaries_against_astropy_sun_altitude(limit_deg):
    grid = fu.night_grid(SITE, "2027-06-18", "2027-06-25", limit_deg, 10)
    assert np.all(np.isfinite(grid.dusk_mjd)) and np.all(np.isfinite(grid.dawn_mjd))
    for mjd in (grid.dusk_mjd, grid.dawn_mjd):
        # at our dusk and dawn astropy puts the Sun at the twilight altitude
        assert np.max(np.abs(_astropy_altaz(lambda t: get_sun(t), mjd) - limit_deg)) < 0.02
    five_min = 5.0 / 1440.0
    # and the Sun is above it five minutes before dusk and after dawn, below it five minutes inside
    assert np.all(_astropy_altaz(lambda t: get_sun(t), grid.dusk_mjd - five_min) > limit_deg)
    assert np.all(_astropy_altaz(lambda t: get_sun(t), grid.dusk_mjd + five_min) < limit_deg)
    assert np.all(_astropy_altaz(lambda t: get_sun(t), grid.dawn_mjd - five_min) < limit_deg)
    assert np.all(_astropy_altaz(lambda t: get_sun(t), grid.dawn_mjd + five_min) > limit_deg)
    # the dark hours are the dusk-to-dawn interval, to within one step at each end
    span_h = (grid.dawn_mjd - grid.dusk_mjd) * 24.0
    assert np.all(np.abs(grid.dark_hours - span_h) <= 2 * grid.step_hours)
    # June nights at latitude -29 are long: astronomical darkness of about 10.5 h (astropy above)
    if limit_deg == -18.0:
        assert np.all((span_h > 9.5) & (span_h < 11.5))


def test_observable_steps_match_astropy_on_the_same_grid():
    # three nights around a full Moon near RA 230-260 deg, dec -23 to -27 deg (astropy get_body)
    grid = fu.night_grid(SITE, "2027-05-19", "2027-05-22", -18.0, 10, moon=True)
    ra = np.array([215.0, 230.0, 245.0, 150.0, 30.0, 270.0])
    dec = np.array([-12.0, -18.0, -24.0, -60.0, -29.0, 10.0])
    obs = fu.observability(ra, dec, grid, 30.0, moon_separation_min_deg=40.0)
    no_moon = fu.observability(ra, dec, grid, 30.0)
    assert np.all(obs.steps[:3] < no_moon.steps[:3])  # the Moon limit bites for the first three
    mjd = grid.step_mjd[grid.dark]
    alt = _astropy_altaz(lambda t: SkyCoord(ra[:, None] * u.deg, dec[:, None] * u.deg), mjd[None, :])
    with fu.offline_earth_rotation():
        t = Time(mjd, format="mjd", scale="utc")
        moon = get_body("moon", t, location=fu.site_location(SITE))
        # the target goes into the Moon's (topocentric GCRS) frame: separation() the other way round
        # would move the Moon to the barycentre
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", NonRotationTransformationWarning)
            sep = moon[None, :].separation(SkyCoord(ra[:, None] * u.deg, dec[:, None] * u.deg)).deg
    ok = (alt >= 30.0) & (sep >= 40.0)
    # steps within 0.01 deg of either limit may fall either way
    edge = (np.abs(alt - 30.0) < 0.01) | (np.abs(sep - 40.0) < 0.05)
    assert np.all(np.abs(obs.steps - ok.sum(axis=1)) <= edge.sum(axis=1))
    assert obs.steps.sum() > 0


def test_transit_altitude_is_the_highest_astropy_altitude():
    ra, dec = np.array([100.0, 250.0]), np.array([-70.0, 15.0])
    grid = fu.night_grid(SITE, "2027-08-01", "2027-08-02", -18.0, 10)
    obs = fu.observability(ra, dec, grid, 0.0)
    mjd = MJD_2027_04_01 + 122.0 + np.arange(0, 1.0, 1.0 / 2880.0)  # every 30 s through one day
    alt = _astropy_altaz(lambda t: SkyCoord(ra[:, None] * u.deg, dec[:, None] * u.deg), mjd[None, :])
    assert np.max(np.abs(alt.max(axis=1) - obs.transit_altitude_deg)) < 0.05
