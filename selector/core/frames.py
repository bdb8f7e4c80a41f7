"""Positions on the sphere: ICRS degrees to unit vectors and back, and Galactic coordinates.

Every conversion between RA/Dec and 3-D unit vectors in the package goes through here (the mock sky keeps
its own, since a simulator should not reuse the code it checks).
"""

from __future__ import annotations

import os
from functools import lru_cache
from concurrent.futures import ThreadPoolExecutor
from typing import NamedTuple

import numpy as np


# Rows per block when computing unit vectors: small enough for the temporaries to stay in cache.
_XYZ_BLOCK = 1 << 16
# below this many rows one thread is faster than starting a pool
_SMALL = 1 << 15


def worker_count(workers: int) -> int:
    if workers == -1:
        try:
            return max(1, len(os.sched_getaffinity(0)))
        except AttributeError:  # platforms without affinity masks
            return max(1, os.cpu_count() or 1)
    if workers < 1:
        raise ValueError(f"workers = {workers!r} is not allowed; use -1 (all cores) or a positive count")
    return int(workers)


def as_1d(values, name: str) -> np.ndarray:
    arr = np.ascontiguousarray(values, dtype=np.float64)
    if arr.ndim == 0:
        arr = arr.reshape(1)
    if arr.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional; got shape {arr.shape}")
    return arr


def _xyz_block(ra_deg: np.ndarray, dec_deg: np.ndarray, out: np.ndarray) -> None:
    # Same ufuncs, in the same order, as astropy's unit-spherical to Cartesian conversion:
    # radians by one multiplication, x = cos(lat) cos(lon), y = cos(lat) sin(lon), z = sin(lat).
    lon = np.radians(ra_deg)
    lat = np.radians(dec_deg)
    cos_lat = np.cos(lat)
    trig = np.cos(lon)
    np.multiply(cos_lat, trig, out=out[:, 0])
    np.sin(lon, out=trig)
    np.multiply(cos_lat, trig, out=out[:, 1])
    np.sin(lat, out=out[:, 2])
    bad_lon = ~np.isfinite(ra_deg)
    if bad_lon.any():
        out[bad_lon, 2] = np.nan  # a row without RA has no position at all


def radec_to_xyz(ra_deg, dec_deg, *, workers: int = -1) -> np.ndarray:
    """Unit vectors of ICRS positions.

    Parameters
    ----------
    ra_deg, dec_deg : array_like of float
        Right ascension and declination (deg), one-dimensional and of equal length. RA outside
        [0, 360) is wrapped. A NaN Dec, or a NaN or infinite RA, gives a NaN vector (a row without
        a position); |Dec| > 90, infinite Dec included, is an error.
    workers : int, optional
        Threads for large inputs; -1 (default) uses every core available to the process.

    Returns
    -------
    numpy.ndarray, shape (n, 3)
        C-contiguous float64 ``(x, y, z)`` with x towards RA = 0, Dec = 0 and z towards the north
        pole (the usual spherical-to-Cartesian relation, e.g. Green 1985, *Spherical Astronomy*,
        ch. 1).
    """
    ra = as_1d(ra_deg, "ra_deg")
    dec = as_1d(dec_deg, "dec_deg")
    if ra.shape != dec.shape:
        raise ValueError(f"ra_deg and dec_deg must have the same length; got {ra.size} and {dec.size}")
    with np.errstate(invalid="ignore"):
        if np.any(np.abs(dec) > 90.0):
            bad = np.flatnonzero(np.abs(dec) > 90.0)
            raise ValueError(f"dec_deg must lie in [-90, 90]; {bad.size} value(s) outside, first at "
                             f"index {bad[0]} ({dec[bad[0]]!r})")
        if np.any((ra < 0.0) | (ra >= 360.0)):
            # fmod is exact, so values already in range keep their bits (and the reference's)
            ra = np.mod(ra, 360.0)
            ra[ra >= 360.0] = 0.0
    n = ra.size
    out = np.empty((n, 3), dtype=np.float64)
    starts = range(0, n, _XYZ_BLOCK)
    nthreads = min(worker_count(workers), len(starts))
    with np.errstate(invalid="ignore"):
        if nthreads > 1 and n > _SMALL:
            # numpy ufuncs release the GIL, so blocks run truly in parallel
            with ThreadPoolExecutor(max_workers=nthreads) as pool:
                for _ in pool.map(lambda s: _xyz_block(ra[s:s + _XYZ_BLOCK], dec[s:s + _XYZ_BLOCK],
                                                       out[s:s + _XYZ_BLOCK]), starts):
                    pass
        else:
            for s in starts:
                _xyz_block(ra[s:s + _XYZ_BLOCK], dec[s:s + _XYZ_BLOCK], out[s:s + _XYZ_BLOCK])
    return out


def xyz_to_radec(xyz) -> tuple[np.ndarray, np.ndarray]:
    """ICRS RA in [0, 360) and Dec (deg) of unit vectors (rows of an (n, 3) array; any length)."""
    lon, lat = xyz_to_radians(xyz)
    return np.degrees(lon) % 360.0, np.degrees(lat)


@lru_cache(maxsize=1)
def galactic_matrix() -> np.ndarray:
    """Rotation from ICRS to Galactic unit vectors, taken from astropy's Galactic frame once."""
    from astropy.coordinates import Galactic, SkyCoord
    import astropy.units as u

    basis = SkyCoord(ra=[0.0, 90.0, 0.0] * u.deg, dec=[0.0, 0.0, 90.0] * u.deg, frame="icrs")
    g = basis.transform_to(Galactic()).cartesian
    return np.vstack([g.x.value, g.y.value, g.z.value])  # columns are the images of the ICRS axes


def galactic(ra_deg, dec_deg):
    """Galactic longitude and latitude (deg) of ICRS positions, as astropy's Galactic frame gives them."""
    xyz = radec_to_xyz(ra_deg, dec_deg, workers=1) @ galactic_matrix().T
    l_deg = np.degrees(np.arctan2(xyz[:, 1], xyz[:, 0])) % 360.0
    b_deg = np.degrees(np.arcsin(np.clip(xyz[:, 2], -1.0, 1.0)))
    return l_deg, b_deg


def radians_to_xyz(lon_rad, lat_rad) -> np.ndarray:
    """Unit vectors of positions given in radians, such as astropy's ``.rad`` values.

    For angles that arrive in radians: going through degrees would round them twice. No checks
    and no wrapping; any shape, the vector along a new last axis.

    Parameters
    ----------
    lon_rad, lat_rad : array_like of float
        Longitude (right ascension) and latitude (declination), radians.

    Returns
    -------
    numpy.ndarray, shape (..., 3)
        ``(cos lat cos lon, cos lat sin lon, sin lat)``.
    """
    cos_lat = np.cos(lat_rad)
    return np.stack([cos_lat * np.cos(lon_rad), cos_lat * np.sin(lon_rad), np.sin(lat_rad)], axis=-1)


def xyz_to_radians(xyz) -> tuple[np.ndarray, np.ndarray]:
    """Longitude in (−π, π] and latitude (radians) of vectors along the last axis (any length).

    The inverse of :func:`radians_to_xyz`, without wrapping the longitude (so no rounding is added
    for arithmetic that goes on in radians); :func:`xyz_to_radec` gives ICRS degrees.
    """
    xyz = np.asarray(xyz, dtype=np.float64)
    return np.arctan2(xyz[..., 1], xyz[..., 0]), np.arctan2(xyz[..., 2], np.hypot(xyz[..., 0], xyz[..., 1]))


class SkyPositions(NamedTuple):
    """Sky positions (ICRS).

    Attributes
    ----------
    ra_deg : numpy.ndarray
        Right ascension (deg) in [0, 360).
    dec_deg : numpy.ndarray
        Declination (deg).
    """

    ra_deg: np.ndarray
    dec_deg: np.ndarray
