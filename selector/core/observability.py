"""Observability of targets from a site over a range of nights, priority classes, sexagesimal text.

Pure science on arrays: no files and no configuration imports. A site is anything with
``latitude_deg``, ``longitude_deg`` (east positive), ``height_m`` and ``name``; a priority rule
anything with the ``class1_*`` and ``class2_*`` attributes of the configuration's
``[targets.priority]``.

How observability is computed, and why it is fast. Astropy supplies, at knots two hours apart, the
apparent sidereal time (bundled Earth-rotation tables only, no download), the Sun's apparent
position and the Moon's topocentric position; these move smoothly, so they are interpolated
linearly to the time steps. Targets are moved once per block of 61 nights to the true equator and
equinox of date (precession, nutation, aberration), and their altitudes follow from the hour-angle
formula ``sin h = sin φ sin δ + cos φ cos δ cos(θ − α)``, written as one matrix product of
(targets × 3) by (3 × time steps). Altitudes are geometric: refraction is ignored, which makes
targets appear about 0.03° lower at 30° altitude than they are seen (Bennett 1982, J. Navigation 35,
255; from memory). The checks against astropy ``AltAz`` (with ``pressure = 0``) are in
``tests/external/test_observability.py``.
"""

from __future__ import annotations

import datetime
import math
import warnings
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from selector.core.frames import radians_to_xyz, xyz_to_radians
from selector.errors import ConfigError

from astropy.utils import iers  # noqa: E402  (configured before any time or coordinate work)

iers.conf.auto_download = False

__all__ = [
    "NightGrid",
    "Observability",
    "altitude_deg",
    "earth_rotation_table_end_mjd",
    "night_grid",
    "observability",
    "offline_earth_rotation",
    "priority_classes",
    "sexagesimal",
    "site_location",
]

# Rate of the Earth rotation angle, revolutions per UT1 day (IERS Conventions 2010, IERS Technical
# Note 36, eq. 5.15; from memory). Sidereal time minus this linear term varies slowly, so it
# interpolates well between knots.
_ERA_RATE = 1.00273781191135448
_KNOT_DAYS = 2.0 / 24.0
# Targets are moved to the equator of date once per block of nights, at the block's middle time:
# within +-30 nights of it annual aberration changes by up to 11" and precession by 4", together
# 0.004 deg, well inside the 0.1 deg the altitudes are checked to.
_NIGHTS_PER_EPOCH = 61
# Block sizes of the (targets × time steps) matrices: 8192 × 512 float64 is 32 MB.
_TARGET_CHUNK = 8192
_STEP_BLOCK = 512
_MJD_OF_1858_11_17 = datetime.date(1858, 11, 17)


# --- astropy, offline ---------------------------------------------------------------------------

@contextmanager
def offline_earth_rotation():
    """Use astropy's bundled Earth-rotation table only, also for dates beyond it.

    Past the table's predictions astropy holds UT1 − UTC at its last value; as UTC is kept within
    0.9 s of UT1, the hour angle is then good to 0.004°. Leap seconds after the bundled list are
    unknown too (a second or so of TT − UTC, far below any observability effect).
    """
    from erfa import ErfaWarning

    with ExitStack() as stack:
        stack.enter_context(iers.conf.set_temp("auto_download", False))
        stack.enter_context(iers.conf.set_temp("auto_max_age", None))
        stack.enter_context(iers.conf.set_temp("iers_degraded_accuracy", "ignore"))
        stack.enter_context(warnings.catch_warnings())
        warnings.simplefilter("ignore", ErfaWarning)
        warnings.filterwarnings("ignore", message=".*polar motion.*")
        yield


def earth_rotation_table_end_mjd() -> float:
    """Last MJD of astropy's bundled Earth-rotation table (recorded in the provenance of a list)."""
    with offline_earth_rotation():
        return float(np.max(iers.earth_orientation_table.get()["MJD"].value))


def site_location(site):
    """The site (``longitude_deg``, ``latitude_deg``, ``height_m``) as an astropy ``EarthLocation``."""
    import astropy.units as u
    from astropy.coordinates import EarthLocation

    return EarthLocation.from_geodetic(site.longitude_deg * u.deg, site.latitude_deg * u.deg, site.height_m * u.m)


# --- ephemeris and altitudes ----------------------------------------------------------------------

class _Ephemeris(NamedTuple):
    """Sidereal time, Sun and Moon at knots, for linear interpolation to any time in between."""

    knot_mjd: np.ndarray
    lst_residual_rad: np.ndarray   # local apparent sidereal time minus the linear Earth-rotation term
    sun_xyz: np.ndarray            # apparent direction (true equator and equinox of date)
    moon_xyz: np.ndarray | None    # topocentric direction (GCRS axes, aligned with ICRS)


def _ephemeris(site, mjd_lo: float, mjd_hi: float, moon: bool) -> _Ephemeris:
    import astropy.units as u
    from astropy.coordinates import TETE, get_body, get_sun
    from astropy.time import Time

    n = int(math.ceil((mjd_hi - mjd_lo) / _KNOT_DAYS)) + 3
    knots = mjd_lo - _KNOT_DAYS + _KNOT_DAYS * np.arange(n)
    loc = site_location(site)
    with offline_earth_rotation():
        t = Time(knots, format="mjd", scale="utc")
        lst = t.sidereal_time("apparent", longitude=site.longitude_deg * u.deg).rad
        sun = get_sun(t).transform_to(TETE(obstime=t))
        sun_xyz = radians_to_xyz(sun.ra.rad, sun.dec.rad)
        moon_xyz = None
        if moon:
            m = get_body("moon", t, location=loc)
            moon_xyz = radians_to_xyz(m.ra.rad, m.dec.rad)
    residual = np.unwrap(np.mod(lst - _linear_rotation_rad(knots, knots[0]), 2 * np.pi))
    return _Ephemeris(knots, residual, sun_xyz, moon_xyz)


def _linear_rotation_rad(mjd: np.ndarray, mjd_ref: float) -> np.ndarray:
    return 2.0 * np.pi * _ERA_RATE * (np.asarray(mjd) - mjd_ref)


def _lst_rad(eph: _Ephemeris, mjd: np.ndarray) -> np.ndarray:
    resid = np.interp(mjd, eph.knot_mjd, eph.lst_residual_rad)
    return np.mod(_linear_rotation_rad(mjd, eph.knot_mjd[0]) + resid, 2 * np.pi)


def _interp_xyz(knots: np.ndarray, xyz: np.ndarray, mjd: np.ndarray) -> np.ndarray:
    out = np.stack([np.interp(mjd, knots, xyz[:, k]) for k in range(3)], axis=1)
    return out / np.linalg.norm(out, axis=1, keepdims=True)


def _apparent_radec(ra_deg: np.ndarray, dec_deg: np.ndarray, mjd) -> tuple[np.ndarray, np.ndarray]:
    """ICRS positions moved to the true equator and equinox of each date: arrays (targets × dates), radians."""
    import astropy.units as u
    from astropy.coordinates import TETE, SkyCoord
    from astropy.time import Time

    mjd = np.atleast_1d(np.asarray(mjd, float))
    with offline_earth_rotation():
        # one broadcast transform: its fixed cost (precession-nutation matrices) is paid once
        c = SkyCoord(ra=ra_deg[:, None] * u.deg, dec=dec_deg[:, None] * u.deg, frame="icrs")
        c = c.transform_to(TETE(obstime=Time(mjd[None, :], format="mjd", scale="utc")))
        return c.ra.rad, c.dec.rad


def _sin_altitude(ra_rad: np.ndarray, dec_rad: np.ndarray, lat_rad: float, lst_rad: np.ndarray) -> np.ndarray:
    """sin(altitude) of every target (rows) at every sidereal time (columns).

    ``cos(θ − α) = cos θ cos α + sin θ sin α`` turns the hour-angle formula into one matrix product.
    """
    cd = np.cos(dec_rad)
    left = np.stack([np.sin(lat_rad) * np.sin(dec_rad), math.cos(lat_rad) * cd * np.cos(ra_rad),
                     math.cos(lat_rad) * cd * np.sin(ra_rad)], axis=1)
    right = np.stack([np.ones_like(lst_rad), np.cos(lst_rad), np.sin(lst_rad)])
    return left @ right


def altitude_deg(ra_deg, dec_deg, mjd_utc, site) -> np.ndarray:
    """Geometric altitude (deg, refraction ignored) of ICRS positions at UTC times, seen from a site.

    The same arithmetic as :func:`observability`, exposed for checks and plots.

    Parameters
    ----------
    ra_deg, dec_deg : array_like of float, shape (n,)
        ICRS positions (deg).
    mjd_utc : array_like of float, shape (m,)
        Times, as UTC modified Julian dates.
    site : SiteConfig or similar
        The observing site (``latitude_deg``, ``longitude_deg``, ``height_m``).

    Returns
    -------
    numpy.ndarray, shape (n, m)
    """
    ra = np.atleast_1d(np.asarray(ra_deg, float))
    dec = np.atleast_1d(np.asarray(dec_deg, float))
    mjd = np.atleast_1d(np.asarray(mjd_utc, float))
    eph = _ephemeris(site, float(mjd.min()), float(mjd.max()), moon=False)
    lst = _lst_rad(eph, mjd)
    block = np.floor((mjd - mjd.min()) / _NIGHTS_PER_EPOCH).astype(np.int64)
    epochs, which = np.unique(block, return_inverse=True)
    epoch_mjd = np.array([mjd[which == e].mean() for e in range(len(epochs))])
    a, d = _apparent_radec(ra, dec, epoch_mjd)
    out = np.empty((len(ra), len(mjd)))
    lat = math.radians(site.latitude_deg)
    for e in range(len(epochs)):
        cols = np.flatnonzero(which == e)
        out[:, cols] = np.degrees(np.arcsin(np.clip(_sin_altitude(a[:, e], d[:, e], lat, lst[cols]), -1.0, 1.0)))
    return out


# --- nights ---------------------------------------------------------------------------------------

@dataclass(frozen=True)
class NightGrid:
    """The nights of a date range, sampled in equal time steps from local noon to local noon.

    Attributes
    ----------
    site : SiteConfig or similar
        The observing site.
    sun_altitude_max_deg : float
        The twilight limit: dark time is when the Sun is below this altitude (deg).
    nights : list of str
        Local date of each night's evening (YYYY-MM-DD).
    step_min : int
        Sampling step (minutes); each step stands for the interval it is centred on.
    step_mjd : numpy.ndarray
        UTC MJD of the centre of every step (nights × steps per day, in time order).
    sun_altitude_deg : numpy.ndarray
        Geometric altitude of the Sun at every step.
    dark : numpy.ndarray of bool
        Sun below the twilight limit.
    dusk_mjd, dawn_mjd : numpy.ndarray
        Per night, the UTC MJD at which the Sun crosses the twilight limit, by linear interpolation of
        its altitude between steps; NaN when it does not cross (no dark time, or dark all night).
    dark_hours : numpy.ndarray
        Per night, dark steps times the step length (hours).
    """

    site: object
    sun_altitude_max_deg: float
    nights: list
    step_min: int
    step_mjd: np.ndarray
    sun_altitude_deg: np.ndarray
    dark: np.ndarray
    dusk_mjd: np.ndarray
    dawn_mjd: np.ndarray
    dark_hours: np.ndarray
    _dark_mjd: np.ndarray = field(repr=False)
    _dark_night: np.ndarray = field(repr=False)
    _dark_lst: np.ndarray = field(repr=False)
    _dark_moon_xyz: np.ndarray | None = field(repr=False)
    _window_start_mjd: float = field(repr=False)

    @property
    def step_hours(self) -> float:
        return self.step_min / 60.0


def night_grid(site, start_date: str, end_date: str, sun_altitude_max_deg: float,
               time_step_min: int = 10, *, moon: bool = False) -> NightGrid:
    """Sample the nights from ``start_date`` (first evening) to ``end_date`` (exclusive).

    Night *i* runs from local mean noon (UTC noon minus longitude / 15°·h) of its evening date to
    the next local noon, in ``1440 / time_step_min`` steps. ``moon=True`` also prepares the Moon's
    position for :func:`observability`'s distance test.
    """
    d0 = datetime.date.fromisoformat(start_date)
    n_nights = (datetime.date.fromisoformat(end_date) - d0).days
    if n_nights <= 0:
        raise ConfigError(f"end_date = {end_date!r} must be after start_date = {start_date!r}")
    if 1440 % int(time_step_min):
        raise ConfigError(f"time_step_min = {time_step_min!r} must divide a day (1440 minutes)")
    per_day = 1440 // int(time_step_min)
    step_d = time_step_min / 1440.0
    window0 = (d0 - _MJD_OF_1858_11_17).days + 0.5 - site.longitude_deg / 360.0
    k = np.arange(n_nights * per_day)
    step_mjd = window0 + (k + 0.5) * step_d
    eph = _ephemeris(site, float(step_mjd[0]), float(step_mjd[-1]), moon)
    lst = _lst_rad(eph, step_mjd)
    sun_ra, sun_dec = xyz_to_radians(_interp_xyz(eph.knot_mjd, eph.sun_xyz, step_mjd))
    lat = math.radians(site.latitude_deg)
    sin_alt = np.sin(lat) * np.sin(sun_dec) + np.cos(lat) * np.cos(sun_dec) * np.cos(lst - sun_ra)
    sun_alt = np.degrees(np.arcsin(np.clip(sin_alt, -1.0, 1.0)))
    dark = sun_alt < sun_altitude_max_deg

    alt2, dark2, mjd2 = (a.reshape(n_nights, per_day) for a in (sun_alt, dark, step_mjd))
    dusk = _crossing(alt2, mjd2, ~dark2[:, :-1] & dark2[:, 1:], sun_altitude_max_deg, step_d, first=True)
    dawn = _crossing(alt2, mjd2, dark2[:, :-1] & ~dark2[:, 1:], sun_altitude_max_deg, step_d, first=False)
    dark_idx = np.flatnonzero(dark)
    moon_xyz = _interp_xyz(eph.knot_mjd, eph.moon_xyz, step_mjd[dark_idx]) if moon else None
    nights = [(d0 + datetime.timedelta(days=i)).isoformat() for i in range(n_nights)]
    return NightGrid(site, float(sun_altitude_max_deg), nights, int(time_step_min), step_mjd, sun_alt, dark, dusk,
                     dawn, dark2.sum(axis=1) * (time_step_min / 60.0), step_mjd[dark_idx],
                     (dark_idx // per_day).astype(np.int64), lst[dark_idx], moon_xyz, float(window0))


def _crossing(alt, mjd, change, limit, step_d, *, first: bool) -> np.ndarray:
    """Per row, the interpolated time of the first (or last) change between steps j and j + 1."""
    has = change.any(axis=1)
    j = np.argmax(change, axis=1) if first else change.shape[1] - 1 - np.argmax(change[:, ::-1], axis=1)
    rows = np.arange(alt.shape[0])
    a0, a1 = alt[rows, j], alt[rows, j + 1]
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.clip((a0 - limit) / (a0 - a1), 0.0, 1.0)
    return np.where(has, mjd[rows, j] + frac * step_d, np.nan)


# --- observability ------------------------------------------------------------------------------

class Observability(NamedTuple):
    """What a date range at a site offers each target.

    Attributes
    ----------
    steps : numpy.ndarray of int64
        Time steps of dark time with the target above the altitude limit (and far enough from the Moon).
    hours : numpy.ndarray
        ``steps`` times the step length (hours).
    nights_observable : numpy.ndarray of int64
        Nights with at least one such step.
    best_night : numpy.ndarray of int64
        Index of the night with the most such steps (the earliest of equals); −1 when never observable.
    best_night_hours : numpy.ndarray
        Observable hours in that night.
    transit_altitude_deg : numpy.ndarray
        Geometric altitude at upper culmination, 90° − |φ − δ| (δ of the middle of the range).
    reason : numpy.ndarray of str
        Empty when observable, else one of ``below_altitude_limit`` (transit altitude under the
        limit), ``not_in_dark_time`` (above the limit only in daylight or twilight) and
        ``moon_too_close`` (dark and high enough only when near the Moon).
    """

    steps: np.ndarray
    hours: np.ndarray
    nights_observable: np.ndarray
    best_night: np.ndarray
    best_night_hours: np.ndarray
    transit_altitude_deg: np.ndarray
    reason: np.ndarray


def observability(ra_deg, dec_deg, grid: NightGrid, altitude_min_deg: float,
                  moon_separation_min_deg: float | None = None) -> Observability:
    """Observable dark time of ICRS positions over the nights of ``grid``.

    Parameters
    ----------
    ra_deg, dec_deg : array_like of float
        ICRS positions (deg); proper motions are ignored (candidates have none measurable).
    grid : NightGrid
        From :func:`night_grid` (with ``moon=True`` when a Moon distance is given).
    altitude_min_deg : float
        Lowest altitude (deg, geometric).
    moon_separation_min_deg : float, optional
        Smallest angular distance from the Moon (deg).

    Returns
    -------
    Observability
    """
    ra = np.atleast_1d(np.asarray(ra_deg, float))
    dec = np.atleast_1d(np.asarray(dec_deg, float))
    n, n_nights = len(ra), len(grid.nights)
    if moon_separation_min_deg is not None and grid._dark_moon_xyz is None:
        raise ValueError("a Moon distance needs a grid made with moon=True")
    s_min = math.sin(math.radians(altitude_min_deg))
    c_moon = None if moon_separation_min_deg is None else math.cos(math.radians(moon_separation_min_deg))
    lat = math.radians(grid.site.latitude_deg)
    epoch = grid._dark_night // _NIGHTS_PER_EPOCH
    bounds = np.flatnonzero(np.r_[True, epoch[1:] != epoch[:-1], True]) if epoch.size else np.array([0])
    mid_mjd = grid._window_start_mjd + n_nights / 2.0

    segments = list(zip(bounds[:-1], bounds[1:]))
    epoch_mjd = [float(grid._dark_mjd[s0:s1].mean()) for s0, s1 in segments] + [mid_mjd]

    steps = np.zeros(n, np.int64)
    nights_obs = np.zeros(n, np.int64)
    best = np.full(n, -1, np.int64)
    best_steps = np.zeros(n, np.int64)
    high_in_dark = np.zeros(n, bool)
    transit = np.empty(n)
    for c0 in range(0, n, _TARGET_CHUNK):
        sl = slice(c0, min(n, c0 + _TARGET_CHUNK))
        counts = np.zeros((sl.stop - sl.start, n_nights), np.int64)
        xyz = radians_to_xyz(np.radians(ra[sl]), np.radians(dec[sl])) if c_moon is not None else None
        a_all, d_all = _apparent_radec(ra[sl], dec[sl], epoch_mjd)
        for e, (s0, s1) in enumerate(segments):
            for b0 in range(s0, s1, _STEP_BLOCK):
                b = slice(b0, min(s1, b0 + _STEP_BLOCK))
                high = _sin_altitude(a_all[:, e], d_all[:, e], lat, grid._dark_lst[b]) >= s_min
                high_in_dark[sl] |= high.any(axis=1)
                if c_moon is not None:
                    high &= (xyz @ grid._dark_moon_xyz[b].T) <= c_moon
                night = grid._dark_night[b]
                starts = np.flatnonzero(np.r_[True, night[1:] != night[:-1]])
                counts[:, night[starts]] += np.add.reduceat(high, starts, axis=1, dtype=np.int64)
        transit[sl] = 90.0 - np.abs(grid.site.latitude_deg - np.degrees(d_all[:, -1]))
        steps[sl] = counts.sum(axis=1)
        nights_obs[sl] = (counts > 0).sum(axis=1)
        idx = np.argmax(counts, axis=1)
        best_steps[sl] = counts[np.arange(len(idx)), idx]
        best[sl] = np.where(steps[sl] > 0, idx, -1)
    reason = np.full(n, "", dtype=object)
    never = steps == 0
    reason[never & (transit < altitude_min_deg)] = "below_altitude_limit"
    reason[never & (reason == "") & ~high_in_dark] = "not_in_dark_time"
    reason[never & (reason == "")] = "moon_too_close"
    return Observability(steps, steps * grid.step_hours, nights_obs, best, best_steps * grid.step_hours, transit,
                         reason.astype(str))


# --- priorities ---------------------------------------------------------------------------------

def priority_classes(score, rank, mag, steps, *, step_min: int, priority, lbol_erg_s=None,
                     redshift=None) -> np.ndarray:
    """Priority class 1, 2 or 3 of every listed target, by the rule documented in configs/default.toml.

    A target is class 1 when its score is among the top ``ceil(class1_score_top_fraction × N)`` of
    the N listed targets (ties broken by rank), its magnitude is at most ``class1_mag_max`` and its
    observable hours reach ``class1_hours_min``; else class 2 under the class-2 limits; else 3. A
    missing magnitude fails the brightness limit. Where ``priority`` sets
    ``class<k>_lbol_min_erg_s`` or ``class<k>_redshift_min``, class k also needs ``lbol_erg_s`` or
    ``redshift`` at or above it (a missing value fails).
    """
    score = np.asarray(score, float)
    n = len(score)
    order = np.lexsort((np.asarray(rank), -score))
    position = np.empty(n, np.int64)
    position[order] = np.arange(n)
    mag = np.asarray(mag, float)
    steps = np.asarray(steps)

    physical = {"lbol_min_erg_s": lbol_erg_s, "redshift_min": redshift}

    def meets(k, fraction, mag_max, hours_min):
        # a relative tolerance keeps e.g. 0.1 × 30 from rounding up to 4
        top = position < math.ceil(fraction * n * (1 - 1e-12))
        steps_min = math.ceil(hours_min * 60.0 / step_min * (1 - 1e-12))
        with np.errstate(invalid="ignore"):
            ok = top & (mag <= mag_max) & (steps >= steps_min)
            for key, values in physical.items():
                limit = getattr(priority, f"class{k}_{key}", None)
                if limit is not None:
                    ok &= np.zeros(n, bool) if values is None else np.asarray(values, float) >= limit
        return ok

    out = np.full(n, 3, np.int8)
    out[meets(2, priority.class2_score_top_fraction, priority.class2_mag_max, priority.class2_hours_min)] = 2
    out[meets(1, priority.class1_score_top_fraction, priority.class1_mag_max, priority.class1_hours_min)] = 1
    return out


# --- text ---------------------------------------------------------------------------------------

def sexagesimal(ra_deg, dec_deg) -> tuple[np.ndarray, np.ndarray]:
    """``hh:mm:ss.sss`` and ``±dd:mm:ss.ss`` strings (rounded, with carries into minutes and hours)."""
    ra_ms = np.round(np.mod(np.asarray(ra_deg, float), 360.0) * (1000.0 * 3600.0 / 15.0)).astype(np.int64)
    ra_ms %= 24 * 3600 * 1000
    ra = _join(np.char.mod("%02d:", ra_ms // 3_600_000), np.char.mod("%02d:", ra_ms // 60_000 % 60),
               np.char.mod("%02d.", ra_ms // 1000 % 60), np.char.mod("%03d", ra_ms % 1000))
    dec = np.asarray(dec_deg, float)
    cas = np.round(np.abs(dec) * 360_000.0).astype(np.int64)  # hundredths of an arcsecond
    sign = np.where((dec < 0) & (cas > 0), "-", "+")
    dec_s = _join(sign, np.char.mod("%02d:", cas // 360_000), np.char.mod("%02d:", cas // 6000 % 60),
                  np.char.mod("%02d.", cas // 100 % 60), np.char.mod("%02d", cas % 100))
    return ra, dec_s


def _join(*parts):
    out = parts[0]
    for p in parts[1:]:
        out = np.char.add(out, p)
    return np.asarray(out, dtype=str)

