"""Follow-up target lists: known objects, observability from a site, priority classes, candidate history.

``selector targets`` turns the ranked candidates of ``selector run`` into a list for an observing
proposal:

1. candidates within ``known_radius_arcsec`` of a known object, or with a recorded follow-up
   outcome, are removed (or flagged);
2. every remaining candidate is followed through each night of the date range, sampled every
   ``time_step_min`` minutes: the hours of dark time (Sun below ``sun_altitude_max_deg``) during
   which it stands above the altitude limit and, optionally, far enough from the Moon, its best
   night and its altitude at transit. Candidates that are never observable are dropped, each with
   its reason;
3. the observable ones get a priority class from score, brightness and observable hours;
4. the list is written in ECSV, CSV, VOTable and/or FITS, with a plain-text summary; every
   candidate's history across runs is kept in SQLite.

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
import json
import math
import sqlite3
import warnings
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import NamedTuple

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv

from selector import __version__
from selector.core import schema
from selector.settings.config import Config, SiteConfig, config_hash
from selector.errors import ConfigError, InputError, SelectorError, describe_rows
from selector.store.io import atomic_path, file_sha256, fingerprint, guess_format, read_parquet

from astropy.utils import iers  # noqa: E402  (configured before any time or coordinate work)

iers.conf.auto_download = False

__all__ = [
    "DROP_REASONS",
    "NightGrid",
    "Observability",
    "STATUSES",
    "TargetsResult",
    "altitude_deg",
    "make_targets",
    "night_grid",
    "observability",
    "priority_classes",
    "read_history",
    "record_outcomes",
    "score_history",
    "sexagesimal",
    "training_labels",
    "unit_of",
]

#: Why a candidate is not on the list, in the order the reasons are tested.
DROP_REASONS = ("known_object", "observed", "below_altitude_limit", "not_in_dark_time", "moon_too_close")
#: Candidate status in the history, after each run.
STATUSES = ("new", "unchanged", "score_changed", "dropped", "observed")
#: Spectroscopic classes accepted by ``selector outcome`` and the training label each becomes.
OUTCOME_CLASSES = {"quasar": "quasar", "qso": "quasar", "star": "star", "galaxy": "galaxy"}
#: Column names accepted in an outcome file, for each field (matched without regard to case).
OUTCOME_COLUMNS = {
    "id": ("astro_id", "candidate_id", "id"),
    "class": ("spec_class", "spectroscopic_class", "class"),
    "redshift": ("redshift", "z"),
}
_REDSHIFT_RANGE = (-0.1, 20.0)  # stars may show small negative velocities; nothing known lies beyond z ~ 15

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
_EXTRA_UNITS = {"observable_hours": "h", "best_night_hours": "h", "dark_hours": "h"}


def unit_of(column: str) -> str | None:
    """Unit of a target-list column: the project's name suffixes, plus the hour columns."""
    return _EXTRA_UNITS.get(column) or schema.unit_of(column)


# --- astropy, offline ---------------------------------------------------------------------------

@contextmanager
def _offline_earth_rotation():
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


def _earth_rotation_table_end_mjd() -> float:
    with _offline_earth_rotation():
        return float(np.max(iers.earth_orientation_table.get()["MJD"].value))


def _location(site: SiteConfig):
    import astropy.units as u
    from astropy.coordinates import EarthLocation

    return EarthLocation.from_geodetic(site.longitude_deg * u.deg, site.latitude_deg * u.deg, site.height_m * u.m)


def _unit_vectors(ra_rad, dec_rad) -> np.ndarray:
    cd = np.cos(dec_rad)
    return np.stack([cd * np.cos(ra_rad), cd * np.sin(ra_rad), np.sin(dec_rad)], axis=-1)


def _radec(xyz: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    return np.arctan2(xyz[:, 1], xyz[:, 0]), np.arctan2(xyz[:, 2], np.hypot(xyz[:, 0], xyz[:, 1]))


class _Ephemeris(NamedTuple):
    """Sidereal time, Sun and Moon at knots, for linear interpolation to any time in between."""

    knot_mjd: np.ndarray
    lst_residual_rad: np.ndarray   # local apparent sidereal time minus the linear Earth-rotation term
    sun_xyz: np.ndarray            # apparent direction (true equator and equinox of date)
    moon_xyz: np.ndarray | None    # topocentric direction (GCRS axes, aligned with ICRS)


def _ephemeris(site: SiteConfig, mjd_lo: float, mjd_hi: float, moon: bool) -> _Ephemeris:
    import astropy.units as u
    from astropy.coordinates import TETE, get_body, get_sun
    from astropy.time import Time

    n = int(math.ceil((mjd_hi - mjd_lo) / _KNOT_DAYS)) + 3
    knots = mjd_lo - _KNOT_DAYS + _KNOT_DAYS * np.arange(n)
    loc = _location(site)
    with _offline_earth_rotation():
        t = Time(knots, format="mjd", scale="utc")
        lst = t.sidereal_time("apparent", longitude=site.longitude_deg * u.deg).rad
        sun = get_sun(t).transform_to(TETE(obstime=t))
        sun_xyz = _unit_vectors(sun.ra.rad, sun.dec.rad)
        moon_xyz = None
        if moon:
            m = get_body("moon", t, location=loc)
            moon_xyz = _unit_vectors(m.ra.rad, m.dec.rad)
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
    with _offline_earth_rotation():
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


def altitude_deg(ra_deg, dec_deg, mjd_utc, site: SiteConfig) -> np.ndarray:
    """Geometric altitude (deg, refraction ignored) of ICRS positions at UTC times, seen from a site.

    The same arithmetic as :func:`observability`, exposed for checks and plots.

    Parameters
    ----------
    ra_deg, dec_deg : array_like of float, shape (n,)
        ICRS positions (deg).
    mjd_utc : array_like of float, shape (m,)
        Times, as UTC modified Julian dates.
    site : SiteConfig
        The observing site.

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
    site : SiteConfig
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

    site: SiteConfig
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


def night_grid(site: SiteConfig, start_date: str, end_date: str, sun_altitude_max_deg: float,
               time_step_min: int = 10, moon: bool = False) -> NightGrid:
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
    sun_ra, sun_dec = _radec(_interp_xyz(eph.knot_mjd, eph.sun_xyz, step_mjd))
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


def _crossing(alt, mjd, change, limit, step_d, first: bool) -> np.ndarray:
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
        xyz = _unit_vectors(np.radians(ra[sl]), np.radians(dec[sl])) if c_moon is not None else None
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

def priority_classes(score, rank, mag, steps, step_min: int, priority) -> np.ndarray:
    """Priority class 1, 2 or 3 of every listed target, by the rule documented in configs/default.toml.

    A target is class 1 when its score is among the top ``ceil(class1_score_top_fraction × N)`` of
    the N listed targets (ties broken by rank), its magnitude is at most ``class1_mag_max`` and its
    observable hours reach ``class1_hours_min``; else class 2 under the class-2 limits; else 3. A
    missing magnitude fails the brightness limit.
    """
    score = np.asarray(score, float)
    n = len(score)
    order = np.lexsort((np.asarray(rank), -score))
    position = np.empty(n, np.int64)
    position[order] = np.arange(n)
    mag = np.asarray(mag, float)
    steps = np.asarray(steps)

    def meets(fraction, mag_max, hours_min):
        # a relative tolerance keeps e.g. 0.1 × 30 from rounding up to 4
        top = position < math.ceil(fraction * n * (1 - 1e-12))
        steps_min = math.ceil(hours_min * 60.0 / step_min * (1 - 1e-12))
        with np.errstate(invalid="ignore"):
            return top & (mag <= mag_max) & (steps >= steps_min)

    out = np.full(n, 3, np.int8)
    out[meets(priority.class2_score_top_fraction, priority.class2_mag_max, priority.class2_hours_min)] = 2
    out[meets(priority.class1_score_top_fraction, priority.class1_mag_max, priority.class1_hours_min)] = 1
    return out


def _band_column(band: str) -> str:
    if band.startswith("opt_"):
        return schema.optical_mag_column(band[4:])
    return schema.infrared_mag_column(band)


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


# --- inputs ------------------------------------------------------------------------------------

_PROVENANCE_KEYS = ("config_hash", "match_config_hash", "input_fingerprints", "selector_version")


def _read_candidates(cfg: Config):
    """The ranked candidates (score order, rank 1..N), their provenance and the file they came from."""
    path = cfg.run_dir / "candidates.parquet"
    if not path.exists():
        raise SelectorError(f"{path}: not found; run `selector run --config ...` first")
    table = read_parquet(path)
    if table.num_rows == 0:
        raise SelectorError(f"{path}: holds no candidates, so there is nothing to plan")
    need = ["astro_id", "ra_deg", "dec_deg"]
    need.append("p_quasar" if "p_quasar" in table.column_names else "criteria_score")
    band_col = _band_column(cfg.targets.priority.band)
    for col in need + [band_col]:
        if col not in table.column_names:
            raise InputError(f"{path}: column '{col}' is missing; re-run `selector run` with this configuration")
    ra = table.column("ra_deg").to_numpy(zero_copy_only=False)
    dec = table.column("dec_deg").to_numpy(zero_copy_only=False)
    bad = np.flatnonzero(~np.isfinite(ra) | ~np.isfinite(dec) | (np.abs(dec) > 90))
    if bad.size:
        raise InputError(f"{path}: {describe_rows(bad)} have no valid position (ra_deg, dec_deg); re-run `selector run`")
    if "rank" in table.column_names:
        table = table.sort_by([("rank", "ascending")])
    else:
        from selector.core.selection import sort_by_score

        table = sort_by_score(table)
        table = table.add_column(0, "rank", pa.array(np.arange(1, table.num_rows + 1, dtype=np.int64)))
    prov_path = cfg.run_dir / "provenance.json"
    if prov_path.exists():
        data = json.loads(prov_path.read_text())
        prov = {k: data[k] for k in _PROVENANCE_KEYS if k in data}
    else:
        meta = table.schema.metadata or {}
        if b"provenance" not in meta:
            raise InputError(f"{path}: carries no provenance and {prov_path.name} is missing beside it; "
                             "re-run `selector run`")
        prov = json.loads(meta[b"provenance"])
    return table, prov, path


class _Known(NamedTuple):
    table: pa.Table
    source: str
    fingerprint: str
    rows_in: int
    rejects: pa.Table | None   # rows of a directly read file that were refused, with the reason

    @property
    def rejected(self) -> dict[str, int]:
        if self.rejects is None:
            return {}
        reasons = self.rejects.column("reason").to_pylist()
        return {r: reasons.count(r) for r in sorted(set(reasons))}


_KNOWN_COLUMNS = ("known_name", "ra_deg", "dec_deg", "known_class")


def _read_known(cfg: Config) -> _Known | None:
    """The known-objects catalogue: ``targets.known`` read directly, else the ingested ``[known]``."""
    tcfg = cfg.targets
    if tcfg.known is not None:
        return _read_known_files(cfg, tcfg.known)
    if cfg.known is None:
        return None
    path = cfg.tiles_dir / "known" / "objects.parquet"
    if not path.exists():
        raise SelectorError(f"{path}: not found; run `selector ingest --config ...` to ingest the [known] catalogue")
    table = read_parquet(path)
    for col in _KNOWN_COLUMNS:
        if col not in table.column_names:
            raise InputError(f"{path}: column '{col}' is missing; run `selector ingest --config ...` again")
    if "redshift" not in table.column_names:
        table = table.append_column("redshift", pa.array(np.full(table.num_rows, np.nan)))
    return _Known(table, path.name, fingerprint(path), table.num_rows, None)


def _read_known_files(cfg: Config, cat) -> _Known:
    from selector.jobs import ingest
    from selector.store.io import expand_files, iter_chunks

    fields = ingest.plan_fields(cat, "known")
    sources = list(dict.fromkeys(f.source for f in fields))
    paths = expand_files(cat.files, cfg.path("."))
    parts, rejects, rows_in = [], [], 0
    for chunk in iter_chunks(paths, cat.format, sources, cat.chunk_rows):
        table, reason, column = ingest.map_chunk(chunk, fields, ingest.IdKind())
        rows_in += chunk.table.num_rows
        bad = np.flatnonzero(reason >= 0)
        rejects.append(pa.table({
            "input_file": pa.array([chunk.path.name] * bad.size, pa.string()),
            "input_row": pa.array(chunk.first_row + bad, pa.int64()),
            "reason": pa.array([ingest.REASONS[i] for i in reason[bad]], pa.string()),
            "column": pa.array(column[bad].tolist(), pa.string())}))
        parts.append(table.filter(pa.array(reason < 0)))
    table = pa.concat_tables(parts) if parts else pa.table({c: pa.array([], pa.float64()) for c in _KNOWN_COLUMNS})
    if "redshift" not in table.column_names:
        table = table.append_column("redshift", pa.array(np.full(table.num_rows, np.nan)))
    rejects = pa.concat_tables(rejects) if rejects else None
    if table.num_rows + (0 if rejects is None else rejects.num_rows) != rows_in:
        raise SelectorError("internal error: rows of the known-objects files were lost; please report this")
    prints = ";".join(f"{p.name}={fingerprint(p)}" for p in paths)
    return _Known(table, ", ".join(p.name for p in paths), prints, rows_in, rejects)


def _match_known(ra, dec, known: _Known, radius_arcsec: float):
    from selector.core.crossmatch import nearest_within, pairs_within

    k = known.table
    pairs = pairs_within(ra, dec, k.column("ra_deg").to_numpy(zero_copy_only=False).astype(float),
                         k.column("dec_deg").to_numpy(zero_copy_only=False).astype(float), radius_arcsec, workers=1)
    return nearest_within(pairs, len(ra))


# --- history -------------------------------------------------------------------------------------

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS runs (
    run INTEGER PRIMARY KEY, candidates_config_hash TEXT, candidates_sha256 TEXT NOT NULL,
    n_candidates INTEGER NOT NULL, recorded_utc TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS candidates (
    candidate_id TEXT PRIMARY KEY, status TEXT NOT NULL, first_run INTEGER NOT NULL, last_run INTEGER NOT NULL,
    score REAL NOT NULL, ra_deg REAL NOT NULL, dec_deg REAL NOT NULL);
CREATE TABLE IF NOT EXISTS scores (
    run INTEGER NOT NULL, candidate_id TEXT NOT NULL, score REAL NOT NULL, rank INTEGER NOT NULL,
    status TEXT NOT NULL, PRIMARY KEY (run, candidate_id));
CREATE TABLE IF NOT EXISTS outcomes (
    candidate_id TEXT PRIMARY KEY, spec_class TEXT NOT NULL, redshift REAL, source_file TEXT NOT NULL,
    recorded_utc TEXT NOT NULL);
"""


def _history_path(cfg: Config) -> Path:
    return cfg.output_dir / cfg.targets.history_file


def _connect(path: Path, create: bool) -> sqlite3.Connection:
    if not create and not path.exists():
        raise SelectorError(f"{path}: no candidate history yet; run `selector targets --config ...` first")
    path.parent.mkdir(parents=True, exist_ok=True)
    try:
        conn = sqlite3.connect(path, isolation_level=None)
        conn.executescript(_SCHEMA)
    except sqlite3.DatabaseError as exc:
        raise InputError(f"{path}: not a usable candidate history ({exc})") from None
    return conn


def _now_utc() -> str:
    return datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds")


def _id_kind(ids: pa.Array) -> str:
    return "int" if pa.types.is_integer(ids.type) else "text"


def _ids_as_text(ids: pa.ChunkedArray) -> np.ndarray:
    return np.asarray(ids.cast(pa.string()).to_pylist(), dtype=object)


def _check_id_kind(conn, kind: str, where: str) -> None:
    row = conn.execute("SELECT value FROM meta WHERE key = 'id_kind'").fetchone()
    if row is None:
        conn.execute("INSERT INTO meta (key, value) VALUES ('id_kind', ?)", (kind,))
    elif row[0] != kind:
        raise InputError(f"{where}: candidate ids are {'integers' if kind == 'int' else 'text'} but the history "
                         f"holds {'integers' if row[0] == 'int' else 'text'}; use a new targets.history_file")


def _update_history(conn, ids: np.ndarray, score: np.ndarray, rank: np.ndarray, ra: np.ndarray, dec: np.ndarray,
                    key: tuple[str, str], tolerance: float):
    """Record a run (inside the caller's transaction); returns (run, status per candidate, reused).

    A run whose candidates file and provenance equal those of the latest recorded run is not
    recorded again: its statuses are returned as stored, so repeating ``selector targets`` is harmless.
    """
    import pandas as pd

    last = conn.execute("SELECT run, candidates_config_hash, candidates_sha256 FROM runs "
                        "ORDER BY run DESC LIMIT 1").fetchone()
    prev = conn.execute("SELECT candidate_id, status, score FROM candidates ORDER BY candidate_id").fetchall()
    prev_ids = np.asarray([r[0] for r in prev], dtype=object)
    prev_status = np.asarray([r[1] for r in prev], dtype=object)
    prev_score = np.asarray([r[2] for r in prev], dtype=float)
    where = pd.Index(prev_ids).get_indexer(ids) if len(prev_ids) else np.full(len(ids), -1)
    if last is not None and (last[1], last[2]) == key and np.all(where >= 0):
        return int(last[0]), np.asarray(prev_status[where].tolist(), dtype=str), True
    run = 1 if last is None else int(last[0]) + 1
    found = where >= 0
    # index -1 (not in the history) picks the blank appended at the end
    old_status = np.append(prev_status, "")[where]
    old_score = np.append(prev_score, np.nan)[where]
    with np.errstate(invalid="ignore"):
        same = np.abs(score - old_score) <= tolerance
    status = np.where(~found | (old_status == "dropped"), "new",
                      np.where(old_status == "observed", "observed", np.where(same, "unchanged", "score_changed")))
    present = np.zeros(len(prev_ids), bool)
    present[where[found]] = True
    gone = ~present & (prev_status != "dropped") & (prev_status != "observed")
    conn.execute("INSERT INTO runs (run, candidates_config_hash, candidates_sha256, n_candidates, recorded_utc) "
                 "VALUES (?, ?, ?, ?, ?)", (run, key[0], key[1], len(ids), _now_utc()))
    conn.executemany(
        "INSERT INTO candidates (candidate_id, status, first_run, last_run, score, ra_deg, dec_deg) "
        "VALUES (?, ?, ?, ?, ?, ?, ?) ON CONFLICT (candidate_id) DO UPDATE SET status = excluded.status, "
        "last_run = excluded.last_run, score = excluded.score, ra_deg = excluded.ra_deg, dec_deg = excluded.dec_deg",
        zip(ids.tolist(), status.tolist(), [run] * len(ids), [run] * len(ids), score.tolist(), ra.tolist(),
            dec.tolist()))
    conn.executemany("INSERT INTO scores (run, candidate_id, score, rank, status) VALUES (?, ?, ?, ?, ?)",
                     zip([run] * len(ids), ids.tolist(), score.tolist(), rank.tolist(), status.tolist()))
    conn.executemany("UPDATE candidates SET status = 'dropped' WHERE candidate_id = ?",
                     ((i,) for i in prev_ids[gone].tolist()))
    return run, np.asarray(status.tolist(), dtype=str), False


def _history_counts(conn) -> dict[str, int]:
    rows = conn.execute("SELECT status, COUNT(*) FROM candidates GROUP BY status").fetchall()
    counts = dict.fromkeys(STATUSES, 0)
    counts.update({s: n for s, n in rows})
    return counts


def _typed_ids(conn, text_ids: list) -> pa.Array:
    row = conn.execute("SELECT value FROM meta WHERE key = 'id_kind'").fetchone()
    if row is not None and row[0] == "int":
        return pa.array([int(i) for i in text_ids], pa.int64())
    return pa.array(text_ids, pa.string())


def read_history(cfg: Config) -> pa.Table:
    """Every candidate ever listed: status, first and last run (and when), latest score, outcome."""
    conn = _connect(_history_path(cfg), create=False)
    try:
        rows = conn.execute(
            "SELECT c.candidate_id, c.status, c.first_run, f.recorded_utc, c.last_run, l.recorded_utc, c.score, "
            "(SELECT COUNT(*) FROM scores s WHERE s.candidate_id = c.candidate_id), o.spec_class, o.redshift "
            "FROM candidates c JOIN runs f ON f.run = c.first_run JOIN runs l ON l.run = c.last_run "
            "LEFT JOIN outcomes o ON o.candidate_id = c.candidate_id ORDER BY c.first_run, c.candidate_id").fetchall()
        cols = list(zip(*rows)) if rows else [[]] * 10
        return pa.table({
            "astro_id": _typed_ids(conn, list(cols[0])), "status": pa.array(cols[1], pa.string()),
            "first_run": pa.array(cols[2], pa.int64()), "first_seen_utc": pa.array(cols[3], pa.string()),
            "last_run": pa.array(cols[4], pa.int64()), "last_seen_utc": pa.array(cols[5], pa.string()),
            "score": pa.array(cols[6], pa.float64()), "n_runs": pa.array(cols[7], pa.int64()),
            "spec_class": pa.array(cols[8], pa.string()), "redshift": pa.array(cols[9], pa.float64()),
        })
    finally:
        conn.close()


def score_history(cfg: Config, candidate_id) -> list[tuple[int, float, str]]:
    """(run, score, status) of one candidate in every run that listed it, oldest first."""
    conn = _connect(_history_path(cfg), create=False)
    try:
        return [(int(r), float(s), str(st)) for r, s, st in conn.execute(
            "SELECT run, score, status FROM scores WHERE candidate_id = ? ORDER BY run", (str(candidate_id),))]
    finally:
        conn.close()


def training_labels(cfg: Config) -> pa.Table:
    """Recorded follow-up outcomes as labelled examples: ``astro_id``, ``label``, ``redshift``.

    ``label`` is ``quasar``, ``star`` or ``galaxy``; ``redshift`` is null where none was given. An
    empty table (int64 ids) when nothing has been recorded yet.
    """
    empty = pa.table({"astro_id": pa.array([], pa.int64()), "label": pa.array([], pa.string()),
                      "redshift": pa.array([], pa.float64())})
    if cfg.targets is None or not _history_path(cfg).exists():
        return empty
    conn = _connect(_history_path(cfg), create=False)
    try:
        rows = conn.execute("SELECT candidate_id, spec_class, redshift FROM outcomes ORDER BY candidate_id").fetchall()
        if not rows:
            return empty
        ids, labels, z = zip(*rows)
        table = pa.table({"astro_id": _typed_ids(conn, list(ids)), "label": pa.array(labels, pa.string()),
                          "redshift": pa.array(z, pa.float64())})
        return table.sort_by([("astro_id", "ascending")])
    finally:
        conn.close()


# --- outcomes ------------------------------------------------------------------------------------

def _read_small_table(path: Path) -> dict[str, list]:
    """Every column of a small file as a list of values (text for CSV), keyed by column name."""
    if not path.exists():
        raise InputError(f"{path}: no such file")
    kind = guess_format(path)
    try:
        if kind == "csv":
            with open(path, encoding="utf-8", errors="replace") as fh:
                header = [h.strip().strip('"') for h in fh.readline().strip().split(",")]
            t = pacsv.read_csv(path, convert_options=pacsv.ConvertOptions(
                column_types={h: pa.string() for h in header}, strings_can_be_null=True))
            return {name: t.column(name).to_pylist() for name in t.column_names}
        if kind == "parquet":
            t = read_parquet(path)
            return {name: t.column(name).to_pylist() for name in t.column_names}
        from astropy.table import Table

        t = Table.read(path, format={"fits": "fits", "ecsv": "ascii.ecsv", "votable": "votable"}[kind])
        out = {}
        for name in t.colnames:
            col = t[name]
            mask = np.asarray(getattr(col, "mask", np.zeros(len(col), bool)), bool)
            values = np.asarray(col).tolist()
            out[name] = [None if m else (v.decode() if isinstance(v, bytes) else v) for v, m in zip(values, mask)]
        return out
    except (OSError, ValueError, KeyError, pa.ArrowException) as exc:
        raise InputError(f"{path}: cannot read as {kind} ({str(exc).splitlines()[0] if str(exc) else exc})") from None


def _pick_column(path: Path, columns: dict, role: str, required: bool) -> str | None:
    lower = {c.lower(): c for c in columns}
    for name in OUTCOME_COLUMNS[role]:
        if name in lower:
            return lower[name]
    if required:
        raise InputError(f"{path}: no {role} column; name it one of {', '.join(OUTCOME_COLUMNS[role])}")
    return None


def _parse_outcomes(path: Path, id_kind: str):
    columns = _read_small_table(path)
    id_col = _pick_column(path, columns, "id", True)
    class_col = _pick_column(path, columns, "class", True)
    z_col = _pick_column(path, columns, "redshift", False)
    n = len(columns[id_col])

    def fail(rows, column, what):
        rows = np.flatnonzero(rows) + 1
        raise InputError(f"{path}: column '{column}', data {describe_rows(rows)} (1 = first row after the header): "
                         f"{what}; nothing was recorded")

    raw_ids = [None if v is None else str(v).strip() for v in columns[id_col]]
    missing = np.array([not v for v in raw_ids], bool)
    if missing.any():
        fail(missing, id_col, "no candidate id")
    if id_kind == "int":
        def as_int(text):
            try:
                return str(int(text))
            except ValueError:
                return None
        ids = [as_int(v) for v in raw_ids]
        bad = np.array([v is None for v in ids], bool)
        if bad.any():
            fail(bad, id_col, "candidate ids are integers here")
    else:
        ids = raw_ids
    ids_arr = np.asarray(ids, dtype=object)
    _, first, counts = np.unique(ids_arr.astype(str), return_index=True, return_counts=True)
    dup = np.ones(n, bool)
    dup[first] = False
    if dup.any():
        fail(dup, id_col, "the same candidate is given more than once")
    classes = [None if v is None else str(v).strip().lower() for v in columns[class_col]]
    bad = np.array([c not in OUTCOME_CLASSES for c in classes], bool)
    if bad.any():
        fail(bad, class_col, f"the class must be one of {', '.join(OUTCOME_CLASSES)}")
    labels = [OUTCOME_CLASSES[c] for c in classes]
    z = np.full(n, np.nan)
    if z_col is not None:
        import pandas as pd

        text = pd.Series([None if v is None else str(v).strip() for v in columns[z_col]], dtype=object)
        given = text.notna().to_numpy() & (text != "").to_numpy()
        z = pd.to_numeric(text.where(given), errors="coerce").to_numpy(float)
        unparsable = given & np.isnan(z)
        lo, hi = _REDSHIFT_RANGE
        with np.errstate(invalid="ignore"):
            bad = unparsable | ~np.isnan(z) & ~((z >= lo) & (z <= hi))
        if bad.any():
            fail(bad, z_col, f"the redshift must be a number from {lo} to {hi}, or empty")
    return ids_arr, labels, z


def record_outcomes(cfg: Config, path: str | Path, log=print) -> int:
    """Record follow-up outcomes from a file; every id must be a candidate of the history.

    The file (CSV, ECSV, VOTable, FITS or Parquet) holds a candidate id column (``astro_id``,
    ``candidate_id`` or ``id``), a class column (``spec_class``, ``spectroscopic_class`` or
    ``class``: quasar, qso, star or galaxy) and optionally ``redshift`` or ``z``. All rows are
    recorded in one transaction, or none. Returns the number recorded.
    """
    if cfg.targets is None:
        raise ConfigError("the configuration has no [targets] section, so there is no candidate history")
    path = Path(path)
    conn = _connect(_history_path(cfg), create=False)
    try:
        row = conn.execute("SELECT value FROM meta WHERE key = 'id_kind'").fetchone()
        ids, labels, z = _parse_outcomes(path, row[0] if row else "text")
        known = {r[0] for r in conn.execute("SELECT candidate_id FROM candidates")}
        unknown = np.array([i not in known for i in ids], bool)
        if unknown.any():
            names = ", ".join(ids[unknown][:5].tolist())
            raise InputError(f"{path}: {int(unknown.sum())} candidate ids are not in the candidate history "
                             f"(data {describe_rows(np.flatnonzero(unknown) + 1)}: {names}); nothing was recorded")
        stamp = _now_utc()
        conn.execute("BEGIN IMMEDIATE")
        try:
            conn.executemany(
                "INSERT INTO outcomes (candidate_id, spec_class, redshift, source_file, recorded_utc) VALUES "
                "(?, ?, ?, ?, ?) ON CONFLICT (candidate_id) DO UPDATE SET spec_class = excluded.spec_class, "
                "redshift = excluded.redshift, source_file = excluded.source_file, recorded_utc = excluded.recorded_utc",
                zip(ids.tolist(), labels, [None if np.isnan(v) else float(v) for v in z], [path.name] * len(ids),
                    [stamp] * len(ids)))
            conn.executemany("UPDATE candidates SET status = 'observed' WHERE candidate_id = ?",
                             ((i,) for i in ids.tolist()))
            conn.execute("COMMIT")
        except BaseException:
            conn.execute("ROLLBACK")
            raise
    finally:
        conn.close()
    counts = {lab: labels.count(lab) for lab in sorted(set(labels))}
    log(f"recorded {len(ids)} outcomes from {path.name} ({', '.join(f'{k}: {v}' for k, v in counts.items())}) "
        f"in {_history_path(cfg)}; they are labelled examples for the next `selector train`")
    return len(ids)


# --- the target list -----------------------------------------------------------------------------

@dataclass
class TargetsResult:
    """What ``selector targets`` produced (tables as written, counts, file paths)."""

    targets: object            # astropy Table
    dropped: object            # astropy Table
    nights: object             # astropy Table
    counts: dict
    history_run: int
    summary: str
    outputs: dict = field(default_factory=dict)
    history_reused: bool = False   # the candidates were those of the latest recorded run


_DESCRIPTIONS = {
    "priority": "priority class (1 highest); rule in the config's [targets.priority]",
    "rank": "rank in the candidate list of `selector run` (1 = highest score)",
    "ra_hms": "right ascension (ICRS), hours:minutes:seconds",
    "dec_dms": "declination (ICRS), degrees:arcminutes:arcseconds",
    "score": "ranking score: p_quasar when a classifier is configured, else criteria_score",
    "observable_hours": "dark hours above the altitude limit (and far from the Moon) over the date range",
    "nights_observable": "nights with some observable dark time",
    "best_night": "local evening date of the night with the most observable hours",
    "best_night_hours": "observable hours in the best night",
    "transit_altitude_deg": "geometric altitude at upper culmination (refraction ignored)",
    "history_status": "status in the candidate history: new, unchanged, score_changed or observed",
    "known_name": "nearest known object within targets.known_radius_arcsec",
    "known_class": "its class",
    "known_redshift": "its redshift",
    "known_sep_arcsec": "its separation",
    "reason": "why the candidate is not on the list",
    "detail": "the reason in words",
}


def _astropy_table(columns: dict, meta: dict):
    from astropy.table import Table

    t = Table()
    for name, values in columns.items():
        if isinstance(values, (pa.Array, pa.ChunkedArray)):
            if pa.types.is_string(values.type) or pa.types.is_large_string(values.type):
                values = np.asarray(values.fill_null("").to_pylist(), dtype=str)
            else:
                values = values.to_numpy(zero_copy_only=False)
        values = np.asarray(values)
        if values.dtype == object:
            values = values.astype(str)
        if values.dtype.kind == "U" and values.size == 0:
            values = np.zeros(0, dtype="U1")
        t[name] = values
        unit = unit_of(name)
        if unit:
            t[name].unit = unit
        if name in _DESCRIPTIONS:
            t[name].description = _DESCRIPTIONS[name]
    t.meta.update(meta)
    return t


def make_targets(cfg: Config, new_only: bool = False, log=print) -> TargetsResult:
    """Build and write the follow-up target list; update the candidate history.

    Everything is read and checked before anything is written; the list files are renamed into
    place together at the end, and the history transaction is committed only after that.
    """
    tcfg = cfg.targets
    if tcfg is None:
        raise ConfigError("the configuration has no [targets] section; add one (see configs/default.toml)")
    cand, cand_prov, cand_path = _read_candidates(cfg)
    known = _read_known(cfg)
    n_in = cand.num_rows
    ra = cand.column("ra_deg").to_numpy(zero_copy_only=False).astype(float)
    dec = cand.column("dec_deg").to_numpy(zero_copy_only=False).astype(float)
    score_col = "p_quasar" if "p_quasar" in cand.column_names else "criteria_score"
    score = cand.column(score_col).to_numpy(zero_copy_only=False).astype(float)
    rank = cand.column("rank").to_numpy()
    ids = cand.column("astro_id")
    ids_text = _ids_as_text(ids)

    reason = np.full(n_in, "", dtype=object)
    detail = np.full(n_in, "", dtype=object)
    known_cols = {}
    if known is not None:
        match = _match_known(ra, dec, known, tcfg.known_radius_arcsec)
        hit = match.index_b >= 0
        take = pa.array(match.index_b[hit])
        known_cols = {"known_name": np.full(n_in, "", dtype=object), "known_class": np.full(n_in, "", dtype=object),
                      "known_redshift": np.full(n_in, np.nan), "known_sep_arcsec": match.separation_arcsec}
        for name in ("known_name", "known_class"):
            known_cols[name][hit] = known.table.column(name).cast(pa.string()).take(take).fill_null("").to_pylist()
        known_cols["known_redshift"][hit] = (known.table.column("redshift").cast(pa.float64()).take(take)
                                             .to_numpy(zero_copy_only=False))
        known_cols["known_name"] = known_cols["known_name"].astype(str)
        known_cols["known_class"] = known_cols["known_class"].astype(str)
        if tcfg.known_action == "remove":
            reason[hit] = "known_object"
            detail[hit] = _join(known_cols["known_name"][hit], " (", known_cols["known_class"][hit], ")")

    conn = _connect(_history_path(cfg), create=True)
    try:
        conn.execute("BEGIN IMMEDIATE")
        try:
            _check_id_kind(conn, _id_kind(ids), str(cand_path))
            run, status, reused = _update_history(conn, ids_text, score, rank, ra, dec,
                                                  (cand_prov.get("config_hash"), file_sha256(cand_path)),
                                                  tcfg.score_tolerance)
            if tcfg.known_action == "remove":
                obs = (status == "observed") & (reason == "")
                reason[obs] = "observed"
                detail[obs] = "follow-up outcome recorded"
            history = _history_counts(conn)
            result = _build_and_write(cfg, cand, cand_prov, cand_path, known, known_cols, score, reason, detail,
                                      status, run, history, new_only)
            result.history_reused = reused
            conn.execute("COMMIT")
        except BaseException:
            conn.execute("ROLLBACK")
            raise
    finally:
        conn.close()
    _log_result(result, log)
    return result


def _build_and_write(cfg, cand, cand_prov, cand_path, known, known_cols, score, reason, detail, status, run, history,
                     new_only) -> TargetsResult:
    tcfg = cfg.targets
    n_in = cand.num_rows
    ra = cand.column("ra_deg").to_numpy(zero_copy_only=False).astype(float)
    dec = cand.column("dec_deg").to_numpy(zero_copy_only=False).astype(float)
    limit = tcfg.altitude_limit_deg
    grid = night_grid(tcfg.site, tcfg.start_date, tcfg.end_date, tcfg.sun_altitude_max_deg, tcfg.time_step_min,
                      moon=tcfg.moon_separation_min_deg is not None)
    todo = np.flatnonzero(reason == "")
    obs = observability(ra[todo], dec[todo], grid, limit, tcfg.moon_separation_min_deg)
    reason[todo] = obs.reason
    transit = np.full(n_in, np.nan)
    transit[todo] = obs.transit_altitude_deg
    never = todo[obs.reason != ""]
    detail_text = {
        "below_altitude_limit": np.char.mod(f"transit altitude %.1f deg is below the limit of {limit:.1f} deg",
                                            transit[never]),
        "not_in_dark_time": f"above {limit:.1f} deg only outside dark time (Sun above "
                            f"{tcfg.sun_altitude_max_deg:g} deg) from {tcfg.start_date} to {tcfg.end_date}",
        "moon_too_close": f"within {tcfg.moon_separation_min_deg} deg of the Moon whenever dark and high enough",
    }
    for code, text in detail_text.items():
        sel = reason[never] == code
        detail[never[sel]] = text[sel] if isinstance(text, np.ndarray) else text

    listed = reason == ""
    keep_obs = obs.reason == ""
    kept = todo[keep_obs]
    mag = cand.column(_band_column(tcfg.priority.band)).to_numpy(zero_copy_only=False).astype(float)
    rank = cand.column("rank").to_numpy()
    prio = priority_classes(score[kept], rank[kept], mag[kept], obs.steps[keep_obs], tcfg.time_step_min,
                            tcfg.priority)
    not_new = np.zeros(len(kept), bool)
    if new_only:
        not_new = status[kept] != "new"
    # listed order: priority class, then score, then rank
    order = np.lexsort((rank[kept], -score[kept], prio))
    order = order[~not_new[order]]
    rows = kept[order]
    best = obs.best_night[keep_obs][order]
    ra_hms, dec_dms = sexagesimal(ra[rows], dec[rows])
    cols = {
        "priority": prio[order].astype(np.int64), "rank": rank[rows], "astro_id": cand.column("astro_id").take(rows),
        "ra_deg": ra[rows], "dec_deg": dec[rows], "ra_hms": ra_hms, "dec_dms": dec_dms, "score": score[rows],
        "observable_hours": obs.hours[keep_obs][order], "nights_observable": obs.nights_observable[keep_obs][order],
        "best_night": np.asarray(grid.nights, dtype=str)[best] if len(best) else np.zeros(0, "U10"),
        "best_night_hours": obs.best_night_hours[keep_obs][order], "transit_altitude_deg": transit[rows],
        "history_status": status[rows],
    }
    if known_cols and tcfg.known_action == "flag":
        cols.update({k: v[rows] for k, v in known_cols.items()})
    for name in cand.column_names:
        if name not in cols:
            cols[name] = cand.column(name).take(rows)

    counts = {"candidates": n_in, "listed": len(rows), "not_new": int(not_new.sum()),
              "dropped": {code: int((reason == code).sum()) for code in DROP_REASONS},
              "priority": {str(c): int((prio[order] == c).sum()) for c in (1, 2, 3)},
              "observable_hours": float(np.sum(cols["observable_hours"])),
              "known_flagged": int((known_cols["known_name"][rows] != "").sum()) if known_cols else 0}
    if counts["listed"] + counts["not_new"] + sum(counts["dropped"].values()) != n_in:
        raise SelectorError("internal error: target accounting does not add up; nothing was written, please report this")

    prov = _provenance(cfg, cand_prov, cand_path, known, run, grid)
    meta = {"description": "follow-up targets; statistical candidates, spectroscopic confirmation needed",
            "selector_provenance": prov}
    targets = _astropy_table(cols, meta)
    gone = np.flatnonzero(~listed)
    gone = gone[np.argsort(rank[gone], kind="stable")]
    dropped_cols = {"rank": rank[gone], "astro_id": cand.column("astro_id").take(gone), "ra_deg": ra[gone],
                    "dec_deg": dec[gone], "score": score[gone], "reason": reason[gone].astype(str),
                    "detail": detail[gone].astype(str), "transit_altitude_deg": transit[gone]}
    if known_cols:
        dropped_cols.update({k: v[gone] for k, v in known_cols.items()})
    dropped = _astropy_table(dropped_cols, {"description": "candidates not on the target list, with the reason",
                                            "selector_provenance": prov})
    nights = _nights_table(grid, prov)
    summary = _summary(cfg, grid, counts, history, run, new_only, known)

    folder = cfg.output_dir / tcfg.output_folder
    stem = "targets_new" if new_only else "targets"
    endings = {"ecsv": "ecsv", "csv": "csv", "votable": "vot", "fits": "fits"}
    outputs = {fmt: folder / f"{stem}.{endings[fmt]}" for fmt in tcfg.formats}
    outputs.update({"dropped": folder / "dropped.ecsv", "nights": folder / "nights.ecsv",
                    "summary": folder / ("summary_new.txt" if new_only else "summary.txt"),
                    "provenance": folder / "provenance.json"})
    if known is not None and known.rejects is not None:
        outputs["known_rejects"] = folder / "known_rejects.ecsv"
    with ExitStack() as stack:
        tmp = {k: stack.enter_context(atomic_path(p)) for k, p in outputs.items()}
        for fmt in tcfg.formats:
            _write(targets, tmp[fmt], fmt, prov)
        _write(dropped, tmp["dropped"], "ecsv", prov)
        _write(nights, tmp["nights"], "ecsv", prov)
        if "known_rejects" in tmp:
            rejects = {name: known.rejects.column(name) for name in known.rejects.column_names}
            _write(_astropy_table(rejects, {"description": "rows of the known-objects files that were refused"}),
                   tmp["known_rejects"], "ecsv", prov)
        tmp["summary"].write_text(summary, encoding="utf-8")
        tmp["provenance"].write_text(json.dumps(prov, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    return TargetsResult(targets, dropped, nights, counts, run, summary, outputs)


def _provenance(cfg, cand_prov, cand_path, known, run, grid) -> dict:
    import astropy

    tcfg = cfg.targets
    return {
        "candidates": {**cand_prov, "file": cand_path.name, "sha256": file_sha256(cand_path)},
        "known_objects": None if known is None else {"files": known.source, "fingerprint": known.fingerprint},
        "targets_config_hash": config_hash(cfg, ("targets",)),
        "history_run": run,
        "site": {"name": tcfg.site.name, "latitude_deg": tcfg.site.latitude_deg,
                 "longitude_deg": tcfg.site.longitude_deg, "height_m": tcfg.site.height_m},
        "nights": {"first": grid.nights[0], "last": grid.nights[-1], "count": len(grid.nights)},
        "method": "geometric altitude from the hour angle (apparent sidereal time, true equator and equinox of "
                  "date); refraction ignored; Sun, Moon and sidereal time from astropy, bundled Earth-rotation data",
        "earth_rotation_table_end_mjd": _earth_rotation_table_end_mjd(),
        "astropy_version": astropy.__version__,
        "selector_version": __version__,
    }


def _nights_table(grid: NightGrid, prov: dict):
    from astropy.time import Time

    def iso(mjd):
        out = np.full(len(mjd), "", dtype="U19")
        ok = np.isfinite(mjd)
        if ok.any():
            t = Time(mjd[ok], format="mjd", scale="utc")
            t.precision = 0
            out[ok] = t.isot
        return out

    return _astropy_table({"night": np.asarray(grid.nights, dtype=str), "dusk_utc": iso(grid.dusk_mjd),
                           "dawn_utc": iso(grid.dawn_mjd), "dark_hours": grid.dark_hours},
                          {"description": f"nights at {grid.site.name}: dark time with the Sun below "
                                          f"{grid.sun_altitude_max_deg:g} deg", "selector_provenance": prov})


def _write(table, tmp: Path, fmt: str, prov: dict) -> None:
    """One table in one format, at a temporary path. Provenance: ECSV in its header, FITS as a JSON
    header card, VOTable as an INFO element; CSV has no place for it (provenance.json lies beside)."""
    if fmt == "ecsv":
        table.write(tmp, format="ascii.ecsv", overwrite=True)
    elif fmt == "csv":
        plain = table.copy(copy_data=False)
        plain.meta.clear()
        plain.write(tmp, format="ascii.csv", overwrite=True)
    elif fmt == "fits":
        out = table.copy(copy_data=False)
        out.meta = {"PROVJSON": json.dumps(prov, sort_keys=True, separators=(",", ":"))}
        out.write(tmp, format="fits", overwrite=True)
    elif fmt == "votable":
        from astropy.io.votable import from_table, writeto
        from astropy.io.votable.tree import Info

        out = table.copy(copy_data=False)
        out.meta = {"description": table.meta.get("description", "")}
        vot = from_table(out)
        vot.get_first_table().infos.append(Info(name="selector_provenance",
                                                value=json.dumps(prov, sort_keys=True, separators=(",", ":"))))
        writeto(vot, str(tmp))
    else:
        raise ValueError(fmt)


_SUMMARY_LABELS = {"known_object": "known objects removed", "observed": "outcome recorded, removed",
                   "below_altitude_limit": "never above the altitude limit",
                   "not_in_dark_time": "high only outside dark time", "moon_too_close": "too close to the Moon"}


def _summary(cfg, grid, counts, history, run, new_only, known) -> str:
    """The plain-text summary: setting, where the candidates went, classes, hours, history."""
    tcfg, s, p = cfg.targets, cfg.targets.site, cfg.targets.priority
    limit = tcfg.altitude_limit_deg

    def row(label, value, note=""):
        return f"{label + ':':<36}{value:>8}" + (f"  {note}" if note else "")

    moon = (f"Moon distance >= {tcfg.moon_separation_min_deg:g} deg" if tcfg.moon_separation_min_deg is not None
            else "no Moon limit")
    lines = [
        f"Follow-up targets for {s.name} (latitude {s.latitude_deg:+.4f} deg, longitude {s.longitude_deg:+.4f} deg, "
        f"height {s.height_m:.0f} m)",
        f"Nights: evenings {grid.nights[0]} to {grid.nights[-1]} ({len(grid.nights)} nights); dark time (Sun below "
        f"{tcfg.sun_altitude_max_deg:g} deg) {grid.dark_hours.sum():.1f} h in all",
        f"Limits: altitude >= {limit:.2f} deg (airmass <= {1.0 / math.sin(math.radians(limit)):.3f}, refraction "
        f"ignored), {moon}; nights sampled every {tcfg.time_step_min} min",
        "",
        row("Candidates read", counts["candidates"]),
    ]
    for code in DROP_REASONS:
        if counts["dropped"][code] or code in ("below_altitude_limit", "not_in_dark_time"):
            lines.append(row("  " + _SUMMARY_LABELS[code], counts["dropped"][code]))
    if known is None:
        lines.append("  (no known-objects catalogue configured)")
    elif known.rejects is not None:
        refused = ", ".join(f"{k}: {v}" for k, v in known.rejected.items()) or "none"
        lines.append(f"  (known objects from {known.source}: {known.rows_in} rows, {known.table.num_rows} used; "
                     f"refused: {refused}; see known_rejects.ecsv)")
    elif tcfg.known_action == "flag":
        lines.append(row("  known objects flagged", counts["known_flagged"], "(kept on the list)"))
    if new_only:
        lines.append(row("  not new since the previous run", counts["not_new"], "(left out: --new-only)"))
    lines.append(row("Targets listed", counts["listed"]))
    band = p.band[4:] if p.band.startswith("opt_") else f"[{p.band}]"
    for c in ("1", "2"):
        fraction, mag_max, hours_min = (getattr(p, f"class{c}_{k}") for k in ("score_top_fraction", "mag_max",
                                                                              "hours_min"))
        lines.append(row(f"  priority class {c}", counts["priority"][c],
                         f"score in the top {fraction:.0%}, {band} <= {mag_max:g} mag, >= {hours_min:g} h"))
    lines.append(row("  priority class 3", counts["priority"]["3"], "every other observable target"))
    lines.append(f"Total observable hours of the listed targets: {counts['observable_hours']:.1f} h")
    lines.append("")
    lines.append(f"Candidate history after run {run}: " + ", ".join(f"{k} {history[k]}" for k in STATUSES))
    return "\n".join(lines) + "\n"


def _log_result(result: TargetsResult, log) -> None:
    c = result.counts
    dropped = ", ".join(f"{k}: {v}" for k, v in c["dropped"].items() if v)
    log(f"targets: {c['listed']} listed of {c['candidates']} candidates (class 1: {c['priority']['1']}, "
        f"2: {c['priority']['2']}, 3: {c['priority']['3']}); {sum(c['dropped'].values())} dropped"
        + (f" ({dropped})" if dropped else "")
        + (f"; {c['not_new']} not new, left out" if c["not_new"] else "")
        + f"; {c['observable_hours']:.1f} observable hours in all")
    if result.history_reused:
        log(f"candidate history: these candidates were already recorded as run {result.history_run}; "
            "statuses are those of that run")
    folder = Path(next(iter(result.outputs.values()))).parent
    log(f"written to {folder}: " + ", ".join(Path(p).name for p in result.outputs.values()))


# --- commands -----------------------------------------------------------------------------------
