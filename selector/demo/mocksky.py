"""The invented mock sky used by the demo and the tests.

Everything here is fictional: two made-up surveys observed a handful of sky patches at made-up
epochs.  The *astrometric* catalogue measures optical positions, parallaxes and proper motions at
:data:`ASTROMETRIC_EPOCH_JYEAR`; the *infrared* catalogue measures positions and Vega magnitudes at
3.4, 4.6, 12 and 22 µm at :data:`INFRARED_EPOCH_JYEAR`, about six years earlier.  A third, small
*known-objects* catalogue lists spectroscopically "confirmed" quasars, stars and galaxies, and a
*truth* table labels every row of the first two catalogues.

The physical ingredients are simple but chosen at the level of real data, so that the selection
pipeline meets realistic numbers:

* a Galactic star model (thin disc, thick disc and halo; Jurić et al. 2008, ApJ 673, 864, parameters
  from memory), with a toy luminosity function, a colour–magnitude relation, a dust layer, and
  disc kinematics (flat rotation curve, velocity dispersions, solar motion of Schönrich, Binney &
  Dehnen 2010, MNRAS 403, 1829, from memory), so stellar density rises toward the Galactic plane
  and proper motions follow from the 4.74 km/s factor;
* nearby brown dwarfs with large parallaxes and proper motions and red 3.4−4.6 µm colours;
* compact galaxies, at rest, with intermediate infrared colours and a poor astrometric fit;
* dusty star-forming galaxies, at rest, faint at 4.6 µm, with 3.4−4.6 µm colours reaching about
  1.0 and a moderately poor fit: the galaxies that leak into infrared colour selections;
* quasars, at rest, with a smooth invented 3.4−4.6 µm colour–redshift relation, plus a handful of
  very luminous ones (``bright_quasar``: some nearby and apparently bright, some at redshift 2–3.5),
  some optically obscured ones that appear only in the infrared, and a share at high redshift whose
  colours fall below 0.8; every quasar's true redshift, absolute magnitude and bolometric
  luminosity follow from its apparent magnitude through the Planck18 luminosity distance (astropy),
  a power-law K-correction (α_ν = −0.5) and L_bol = 5.15 λL_λ(3000 Å) (Richards et al. 2006,
  AJ 131, 2766; from memory); no ordinary quasar is more luminous than M = −28.0, every very bright
  one is (M from −30.0 to −28.4);
* an extent statistic of our own in the astrometric catalogue, ``ext_excess`` = point-source-fit
  magnitude minus aperture magnitude (mag): 0 ± noise for point sources, the noise growing from a
  few mmag for bright sources to about 0.1 mag at the faint limit, positive and broad for galaxies
  (log-normal, median about 0.15 mag observed), with a tail of compact or distant galaxies that
  look point-like; and an infrared extendedness flag ``ext_flag`` (1 for about 15 % of galaxies,
  the large and well-detected ones, for 15 % of two-source blends, and 0.3 % of point sources);
* astrometric errors that grow with magnitude as in modern space astrometry, correlated
  proper-motion noise, infrared photometric noise from a flux-limited detection model, blends of two
  optical sources inside one infrared beam, a few infrared sources whose flux includes an unrelated
  red source below the detection limit (which turns some faint stars red), and true motion applied
  between the two epochs by 3-D unit-vector propagation;
* astrometric parallax and proper-motion noise drawn with the stated 3 x 3 correlations (small
  parallax–motion correlations, |r| ≤ 0.2, and the patch's pmra–pmdec correlation), and observed
  infrared positions drawn around the true (for blends, light-weighted) centre with a circular
  Gaussian of exactly the catalogued ``pos_unc`` per axis (0.08 arcsec floor, about 0.1 arcsec for
  bright sources and 0.8 arcsec at the S/N 5 limit), so a probabilistic cross-match is testable.

The mock sky is a simulator of what the package checks, so it keeps its own geometry (unit
vectors, tangent-plane offsets, epoch propagation), identifiers and distance arithmetic, and imports
nothing from the rest of ``selector`` for them: a mistake in the package cannot then hide behind the
same mistake in its test data.  Reference libraries (astropy's frames and cosmology) are used
directly where the simulator needs them.

Names are our own: infrared identifiers look like ``IRX-04007-0012`` (a 2 deg cell number and a
serial inside it, see :func:`_ir_identifiers`), astrometric ``srcid`` is the patch number
times 10^7 plus a running number, and infrared quality is a small bitmask ``qual_bits``
(:data:`QUAL_BITS`).

Only :func:`make_mock_sky`, :func:`write_mock_sky`, :func:`write_demo_catalogues`,
:class:`MockSky` and the module constants are public; everything prefixed with ``_`` may change.

Notes
-----
Column names of the raw tables are deliberately unlike the roles used by the rest of the package,
so that the column mapping of the ingest stage is exercised.  The truth table carries, beyond the
required label columns, the true astrometric parameters, a few true magnitudes, the true centre at
the infrared epoch, the true extent and, for quasars, the dimming, absolute magnitude and
bolometric luminosity (``true_*`` columns), the name of the sky patch, and ``above_completeness``.
Units are in each field's metadata.
"""

from __future__ import annotations

import dataclasses
import functools
import math
import pathlib

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from selector.core.truth import compare
from selector.errors import SelectorError
from selector.jobs.ingest import ingest
from selector.jobs.run import run
from selector.jobs.targets import make_targets
from selector.jobs.train import redshift_figures, train
from selector.present.report import write_report
from selector.present.training_plots import write_training_plots
from selector.settings.config import from_dict, load_config, plain
from selector.store.io import read_parquet
from selector.store.layout import classifier_dir, layout_of, targets_dir

__all__ = [
    "ASTROMETRIC_EPOCH_JYEAR",
    "INFRARED_EPOCH_JYEAR",
    "COMPLETENESS",
    "QUAL_BITS",
    "MockSky",
    "make_mock_sky",
    "write_mock_sky",
    "write_demo_catalogues",
    "DEMO_CATALOGUES_SEED",
    "DEMO_CATALOGUES_SCALE",
]

#: Reference epoch of the positions in the (fictional) astrometric catalogue, Julian years.
ASTROMETRIC_EPOCH_JYEAR = 2019.5
#: Mean observing epoch of the (fictional) infrared catalogue, Julian years.
INFRARED_EPOCH_JYEAR = 2013.5

#: Quasars whose *true* optical broad-band AB magnitude and *true* 4.6 µm Vega magnitude are
#: both brighter than these limits are "above the completeness limit": they are always present in
#: both catalogues with good signal-to-noise (4.6 µm S/N of about 10 or more), so a sound
#: selection should recover nearly all of those that pass its colour cut.  The 4.6 µm value
#: matches the magnitude limit of the Stern et al. 2012 (ApJ 753, 30) criterion.  The truth
#: table's ``above_completeness`` column applies these limits; at ``scale=1`` about 1600–1700
#: quasars (3.3 per deg^2) are above them, of which about 98 % have measured 3.4−4.6 µm colours of
#: 0.8 or redder (the rest are mostly at high redshift: apparently bright quasars are mostly
#: nearby, since no ordinary quasar is more luminous than M = −28).
COMPLETENESS = {"opt_broad_abmag_max": 20.0, "ir_4p6_vegamag_max": 15.0}

# --------------------------------------------------------------------------------------------
# Invented survey characteristics
# --------------------------------------------------------------------------------------------

#: Faint limit of the astrometric catalogue in the broad optical band (AB); real space astrometry
#: reaches about 20.7–21 (common practice).
_OPT_LIMIT_ABMAG = 21.0
#: Bright limit: brighter stars are left out (they would saturate and add nothing to the demo).
_OPT_BRIGHT_ABMAG = 12.0
#: The blue band loses faint red sources; beyond this the blue magnitude is missing (NaN).
_BLUE_LIMIT_ABMAG = 23.0

#: Infrared bands, their 5-sigma point-source limits (Vega) and systematic error floors (mag).
#: Limits are those of a deep all-sky mid-infrared coadd, from memory.
_IR_BANDS = ("m34", "m46", "m120", "m220")
_IR_LIMIT5_VEGAMAG = np.array([16.9, 16.0, 11.5, 8.0])
_IR_FLOOR_MAG = np.array([0.015, 0.020, 0.030, 0.050])
#: A source enters the infrared catalogue if it has S/N >= 5 at 3.4 or 4.6 µm; each band is then
#: reported where its S/N >= 3 and is NaN otherwise.
_IR_SNR_SOURCE = 5.0
_IR_SNR_BAND = 3.0
#: Infrared positional error (per axis) = floor (+) beam / S/N, with S/N the better of 3.4 and
#: 4.6 µm; a 6 arcsec beam gives about 0.1 arcsec for bright sources (S/N 60 and more) and
#: 0.8 arcsec at the S/N 5 detection limit (common practice: 0.1 to about 1 arcsec).
_IR_POS_FLOOR_ARCSEC = 0.08
_IR_POS_BEAM_ARCSEC = 4.0

#: Bits of the infrared ``qual_bits`` column (an invented scheme of our own; 0 means clean).
#: Bits 0–2 are set when an artefact of that kind touches the source in any band; bit 3 when the
#: 3.4 µm core is brighter than :data:`_IR_SATURATION_VEGAMAG` and its flux is extrapolated.
QUAL_BITS = {"halo": 1, "spike": 2, "ghost": 4, "saturated": 8}
#: 3.4 µm magnitude (Vega) brighter than which the core saturates (about 8 in deep mid-infrared
#: all-sky coadds; from memory).
_IR_SATURATION_VEGAMAG = 8.0

#: Extent statistic ``ext_excess`` of the astrometric catalogue: point-source-fit magnitude minus
#: a 1-arcsec aperture magnitude (our own definition).  Its measurement error (mag) is
#: ``hypot(floor, coeff * 10**(0.4 (m - 20)))`` in the broad band: a few mmag for bright sources,
#: about 0.1 mag at the faint limit (invented, realistic in spirit).
_EXT_FLOOR_MAG = 0.004
_EXT_COEFF_MAG = 0.04
#: Infrared extendedness flag ``ext_flag``: a galaxy is flagged resolved with a probability rising
#: as a logistic in log10 of its intrinsic optical extent (half-way at this extent, mag, with this
#: width in dex) times its S/N share; point sources are flagged by chance, and a blend of two
#: sources in the beam sometimes looks extended (invented numbers).
_IR_EXT_HALF_MAG = 0.25
_IR_EXT_WIDTH_DEX = 0.15
_IR_EXT_FALSE_RATE = 0.003
_IR_EXT_BLEND_RATE = 0.15

#: Extinction A_band / A_V for the optical bands and the four infrared bands (approximate, from
#: memory of a standard diffuse-medium law).
_EXT_PER_AV = {
    "broad": 0.84, "blue": 1.08, "red": 0.63,
    "m34": 0.065, "m46": 0.052, "m120": 0.060, "m220": 0.030,
}
#: A thin dust layer: V-band extinction per kpc in the mid-plane and its scale height (common
#: practice, roughly 1 mag/kpc and about 100–130 pc).
_DUST_AV_PER_PC = 1.0e-3
_DUST_SCALE_HEIGHT_PC = 120.0

# --------------------------------------------------------------------------------------------
# Populations and their surface densities (per deg^2 at scale 1)
# --------------------------------------------------------------------------------------------

_POPULATIONS = ("star", "brown_dwarf", "galaxy", "quasar", "bright_quasar")
_STAR, _BROWN_DWARF, _GALAXY, _QUASAR, _BRIGHT_QUASAR = range(5)

#: Stars with 12 < broad < 21 toward the Galactic pole.  About ten times sparser than the real
#: sky, so the demo stays small; the latitude dependence comes from the disc model.
_STAR_DENSITY_AT_POLE_PER_DEG2 = 120.0
#: Unobscured quasars with 16 < broad < 21.5 (before extinction); the real sky has a few tens per
#: deg^2 to 21 (common practice).
_QUASAR_DENSITY_PER_DEG2 = 36.0
_OBSCURED_QUASAR_DENSITY_PER_DEG2 = 4.0
_GALAXY_DENSITY_PER_DEG2 = 70.0
#: Only a fraction of compact galaxies make it into a point-source astrometric catalogue.
_GALAXY_OPTICAL_FRACTION = 0.35
#: Dusty star-forming galaxies, faint at 4.6 µm; more of them look point-like than ordinary
#: galaxies because their light is concentrated in a compact starburst (invented numbers).
_DUSTY_GALAXY_DENSITY_PER_DEG2 = 6.0
_DUSTY_GALAXY_OPTICAL_FRACTION = 0.6
#: Share of quasars drawn at high redshift (z 3.3–4.0), where the rest-frame near-infrared bump
#: moving through the bands lowers 3.4−4.6 µm below 0.8 for many of them.
_HIGH_Z_QUASAR_FRACTION = 0.06
_HIGH_Z_RANGE = (3.3, 4.0)
#: Share of infrared sources whose measured flux includes an unrelated red source below the
#: detection limit inside the beam (confusion), and that source's 4.6 µm magnitude range (Vega)
#: and 3.4−4.6 µm colour (invented, realistic in spirit).
_IR_CONFUSION_FRACTION = 0.03
_IR_CONFUSION_M46 = (14.6, 17.0)
_IR_CONFUSION_COLOUR = (1.0, 0.15)
_BROWN_DWARF_DENSITY_PER_DEG2 = 0.06
#: Very luminous quasars: their count scales with ``scale`` (at least 2, one nearby and one at high
#: redshift), their intrinsic absolute magnitudes lie between these limits, and no ordinary quasar
#: is drawn brighter than ``_ORDINARY_QUASAR_ABSMAG_MIN`` (absolute magnitudes in the broad band,
#: AB, K-corrected to z = 0, of the unobscured nucleus).  Nearby ones are at z 0.45–1.0, the rest
#: at z 2–3.5; none is brighter than 13 AB in the optical (invented numbers, realistic in spirit).
_BRIGHT_QUASARS_AT_SCALE_1 = 7
_BRIGHT_QUASAR_ABSMAG = (-30.0, -28.4)
_BRIGHT_QUASAR_Z_NEAR = (0.45, 1.0)
_BRIGHT_QUASAR_Z_FAR = (2.0, 3.5)
_BRIGHT_QUASAR_OPT_MIN_ABMAG = 13.0
_ORDINARY_QUASAR_ABSMAG_MIN = -28.0
#: Typical intrinsic broad-band (AB) minus 3.4 µm (Vega) colour of an unobscured quasar (common
#: practice); obscured quasars are redder than this by their nuclear obscuration.
_QUASAR_OPT_MINUS_34 = 2.7
#: Quasar continuum f_nu ∝ nu**alpha_nu used for the K-correction and the bolometric luminosity,
#: effective wavelength of the invented broad optical band, and the bolometric correction at
#: 3000 Å (L_bol = 5.15 lambda L_lambda; Richards et al. 2006, AJ 131, 2766; from memory).
_QUASAR_ALPHA_NU = -0.5
_BROAD_EFFECTIVE_WAVELENGTH_ANGSTROM = 6200.0
_BOLOMETRIC_CORRECTION_3000 = 5.15
#: Fraction of well-detected optical+infrared sources that get a second optical source in the beam.
_BLEND_FRACTION = 0.015
_BLEND_SEPARATION_ARCSEC = (0.8, 2.0)
#: Fraction of stars that are unresolved binaries with a poor astrometric fit.
_BINARY_FRACTION = 0.06
#: Known-objects catalogue: fraction of quasars, number of stars and galaxies at scale 1.
_KNOWN_QUASAR_FRACTION = 0.30
_KNOWN_STARS_AT_SCALE_1 = 300
_KNOWN_GALAXIES_AT_SCALE_1 = 40

_MAS_TO_RAD = math.pi / (180.0 * 3600.0e3)
_ARCSEC_TO_RAD = math.pi / (180.0 * 3600.0)
#: km/s per (AU/yr): v_tan [km/s] = 4.74047 * mu [mas/yr] / parallax [mas].
_KMS_PER_AU_YR = 4.74047


# --------------------------------------------------------------------------------------------
# Sky patches
# --------------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class _Patch:
    """A circular sky patch; the centre is given in ICRS or Galactic coordinates (deg)."""

    name: str
    frame: str
    lon_deg: float
    lat_deg: float
    radius_deg: float
    #: Mean pmra–pmdec error correlation of the invented scanning pattern in this patch.
    mu_corr_mean: float


_PATCHES = (
    # Galactic latitude of the north celestial pole is about +27 deg: intermediate.
    _Patch("north_pole", "icrs", 0.0, 90.0, 5.0, 0.25),
    # Straddles RA = 0/360 close to the south Galactic pole (b about -78 deg): high latitude.
    _Patch("ra_wrap", "icrs", 0.0, -30.0, 6.0, -0.15),
    _Patch("high_north", "galactic", 60.0, 72.0, 6.0, 0.05),
    _Patch("mid_south", "galactic", 200.0, -38.0, 5.0, 0.30),
    _Patch("low_north", "galactic", 100.0, 12.0, 4.0, -0.30),
    _Patch("low_south", "galactic", 250.0, -20.0, 4.5, 0.10),
)


@functools.lru_cache(maxsize=1)
def _icrs_to_galactic_matrix():
    """Rotation matrix taking ICRS unit vectors to Galactic unit vectors, from astropy's frames."""
    from astropy.coordinates import CartesianRepresentation, SkyCoord

    basis = SkyCoord(CartesianRepresentation(np.eye(3)), frame="icrs").galactic
    xyz = basis.cartesian.xyz.value  # column j = Galactic vector of ICRS axis j
    matrix = np.array(xyz, dtype=float)
    matrix.setflags(write=False)
    return matrix


@functools.lru_cache(maxsize=1)
def _patch_geometry():
    """ICRS unit vectors (n, 3), radii (deg) and areas (deg^2) of the patches."""
    to_gal = _icrs_to_galactic_matrix()
    centres = []
    for patch in _PATCHES:
        vec = _lonlat_to_xyz(np.array([patch.lon_deg]), np.array([patch.lat_deg]))[0]
        if patch.frame == "galactic":
            vec = to_gal.T @ vec
        centres.append(vec / np.linalg.norm(vec))
    centres = np.array(centres)
    radii_deg = np.array([p.radius_deg for p in _PATCHES])
    areas_deg2 = 2.0 * np.pi * (1.0 - np.cos(np.radians(radii_deg))) * (180.0 / np.pi) ** 2
    for arr in (centres, radii_deg, areas_deg2):
        arr.setflags(write=False)
    return centres, radii_deg, areas_deg2


# --------------------------------------------------------------------------------------------
# Geometry on the sphere
# --------------------------------------------------------------------------------------------


def _lonlat_to_xyz(lon_deg, lat_deg):
    """Unit vectors (n, 3) from longitude and latitude in degrees."""
    lon = np.radians(np.asarray(lon_deg, dtype=float))
    lat = np.radians(np.asarray(lat_deg, dtype=float))
    cos_lat = np.cos(lat)
    return np.stack([cos_lat * np.cos(lon), cos_lat * np.sin(lon), np.sin(lat)], axis=-1)


def _xyz_to_lonlat(xyz):
    """Longitude in [0, 360) and latitude in [-90, 90], degrees, from vectors (n, 3)."""
    x, y, z = xyz[:, 0], xyz[:, 1], xyz[:, 2]
    lon_deg = np.degrees(np.arctan2(y, x)) % 360.0
    # A tiny negative angle modulo 360 rounds to exactly 360.0.
    lon_deg = np.where(lon_deg >= 360.0, 0.0, lon_deg)
    lat_deg = np.degrees(np.arctan2(z, np.hypot(x, y)))
    return lon_deg, lat_deg


def _tangent_basis(xyz):
    """Local east and north unit vectors (n, 3) at each position.

    At the pole itself the longitude from ``arctan2(0, 0)`` is 0, which still gives a valid
    orthonormal pair, so no position is special.
    """
    lon = np.arctan2(xyz[:, 1], xyz[:, 0])
    lat = np.arctan2(xyz[:, 2], np.hypot(xyz[:, 0], xyz[:, 1]))
    sin_lon, cos_lon = np.sin(lon), np.cos(lon)
    sin_lat, cos_lat = np.sin(lat), np.cos(lat)
    east = np.stack([-sin_lon, cos_lon, np.zeros_like(lon)], axis=-1)
    north = np.stack([-sin_lat * cos_lon, -sin_lat * sin_lon, cos_lat], axis=-1)
    return east, north


def _offset(xyz, east_rad, north_rad):
    """Move positions by tangent-plane offsets (radians) and renormalise (gnomonic inverse)."""
    east, north = _tangent_basis(xyz)
    moved = xyz + east * np.asarray(east_rad)[:, None] + north * np.asarray(north_rad)[:, None]
    return moved / np.linalg.norm(moved, axis=1)[:, None]


def _propagate(xyz, pmra_mas_yr, pmdec_mas_yr, dt_yr):
    """Propagate positions by ``dt_yr`` years of proper motion on 3-D unit vectors.

    The position moves along the tangent vector ``mu * dt`` and is renormalised, which is exact
    straight-line space motion for zero radial velocity (as astropy's ``apply_space_motion``) and
    has no trouble at the poles.
    """
    return _offset(
        xyz,
        np.asarray(pmra_mas_yr) * dt_yr * _MAS_TO_RAD,
        np.asarray(pmdec_mas_yr) * dt_yr * _MAS_TO_RAD,
    )


def _sample_caps(rng, patch_index):
    """Uniform random unit vectors inside the patches given per point by ``patch_index``."""
    centres, radii_deg, _ = _patch_geometry()
    n = len(patch_index)
    cos_r = np.cos(np.radians(radii_deg[patch_index]))
    cos_t = 1.0 - rng.random(n) * (1.0 - cos_r)
    sin_t = np.sqrt(np.clip(1.0 - cos_t**2, 0.0, None))
    phi = rng.random(n) * 2.0 * np.pi
    centre = centres[patch_index]
    east, north = _tangent_basis(centre)
    return (
        centre * cos_t[:, None]
        + east * (sin_t * np.cos(phi))[:, None]
        + north * (sin_t * np.sin(phi))[:, None]
    )


def _galactic_lb(xyz):
    """Galactic longitude and latitude (deg) of ICRS unit vectors."""
    return _xyz_to_lonlat(xyz @ _icrs_to_galactic_matrix().T)


def _random_patches(rng, n):
    """Patch indices for ``n`` objects spread over the patches in proportion to area."""
    _, _, areas = _patch_geometry()
    return rng.choice(len(_PATCHES), size=n, p=areas / areas.sum())


def _per_patch_counts(rng, density_per_deg2, scale):
    """Poisson counts per patch for a uniform surface density."""
    _, _, areas = _patch_geometry()
    return rng.poisson(density_per_deg2 * scale * areas)


# --------------------------------------------------------------------------------------------
# Galactic star model
# --------------------------------------------------------------------------------------------

_R_SUN_PC = 8200.0  # from memory
_Z_SUN_PC = 20.0  # from memory
# (scale length pc, scale height pc, local normalisation) of thin and thick disc; halo local
# normalisation, axis ratio and power law (Jurić et al. 2008, ApJ 673, 864; from memory).
_THIN = (2600.0, 300.0, 1.0)
_THICK = (3600.0, 900.0, 0.12)
_HALO = (0.005, 0.64, 2.77)
#: Circular velocity and solar peculiar motion (U, V, W) in km/s (Schönrich et al. 2010; from
#: memory).
_V_CIRC_KMS = 232.0
_SUN_UVW_KMS = np.array([11.1, 12.24, 7.25])
#: Velocity dispersions (R, phi, Z) and asymmetric drift in km/s per component (common practice).
_KINEMATICS = {
    0: ((35.0, 25.0, 18.0), 15.0),
    1: ((60.0, 45.0, 40.0), 50.0),
    2: ((140.0, 100.0, 95.0), _V_CIRC_KMS),  # the halo does not rotate
}

#: Heliocentric distance grid for the line-of-sight integrals: parallaxes 0.07–33 mas.
_LN_D_GRID = np.linspace(np.log(30.0), np.log(15000.0), 240)
_D_GRID_PC = np.exp(_LN_D_GRID)
_DLN_D = _LN_D_GRID[1] - _LN_D_GRID[0]
#: Cell size (deg) over which the line-of-sight distance distribution is treated as constant.
_CELL_DEG = 0.5

# Toy luminosity function in absolute broad-band magnitude: a main sequence rising to M ~ 10.5 and
# falling after, tapered at the bright end, plus a red-clump/giant bump (invented, realistic in
# spirit).
_M_GRID = np.arange(-1.5, 16.0001, 0.05)


def _lf_components():
    m = _M_GRID
    main = np.where(m < 10.5, 10 ** (0.13 * (m - 4.0)), 10 ** (0.13 * 6.5 - 0.35 * (m - 10.5)))
    main = main / (1.0 + np.exp(-(m - 1.5) / 0.3))
    giants = 0.03 * np.exp(-0.5 * ((m - 0.6) / 0.5) ** 2)
    return main + 1e-9, giants


_LF_MAIN, _LF_GIANT = _lf_components()
_LF_CDF = np.concatenate([[0.0], np.cumsum(0.5 * (_LF_MAIN + _LF_GIANT)[1:]
                                           + 0.5 * (_LF_MAIN + _LF_GIANT)[:-1])])
_LF_CDF = _LF_CDF / _LF_CDF[-1]
# Main-sequence colour (blue - red, AB) against absolute broad-band magnitude (invented table).
_MS_ABSMAG = np.array([1.0, 2.0, 3.0, 4.0, 4.7, 6.0, 7.0, 8.0, 9.0, 10.0, 11.0, 12.0, 13.0, 14.0,
                       15.5])
_MS_COLOUR = np.array([0.20, 0.45, 0.62, 0.75, 0.82, 1.05, 1.35, 1.70, 2.05, 2.40, 2.70, 3.00,
                       3.40, 3.80, 4.30])


def _disc_densities(l_rad, b_rad, d_pc):
    """Relative number densities of thin disc, thick disc and halo (broadcasting arrays)."""
    cos_b = np.cos(b_rad)
    x_pc = d_pc * cos_b * np.cos(l_rad) - _R_SUN_PC
    y_pc = d_pc * cos_b * np.sin(l_rad)
    z_pc = d_pc * np.sin(b_rad) + _Z_SUN_PC
    r_pc = np.hypot(x_pc, y_pc)
    thin = _THIN[2] * np.exp(-(r_pc - _R_SUN_PC) / _THIN[0] - np.abs(z_pc) / _THIN[1])
    thick = _THICK[2] * np.exp(-(r_pc - _R_SUN_PC) / _THICK[0] - np.abs(z_pc) / _THICK[1])
    r_halo = np.maximum(np.sqrt(r_pc**2 + (z_pc / _HALO[1]) ** 2), 1000.0)
    halo = _HALO[0] * (_R_SUN_PC / r_halo) ** _HALO[2]
    return thin, thick, halo


def _extinction_av(b_rad, d_pc):
    """V-band extinction (mag) to distance ``d_pc`` through the exponential dust layer."""
    sin_b = np.maximum(np.abs(np.sin(b_rad)), 1e-3)
    return (_DUST_AV_PER_PC * _DUST_SCALE_HEIGHT_PC / sin_b
            * (1.0 - np.exp(-d_pc * sin_b / _DUST_SCALE_HEIGHT_PC)))


def _visible_fraction(b_rad, d_pc):
    """Fraction of the luminosity function inside the optical magnitude window at ``d_pc``."""
    shift = 5.0 * np.log10(d_pc / 10.0) + _EXT_PER_AV["broad"] * _extinction_av(b_rad, d_pc)
    hi = np.interp(_OPT_LIMIT_ABMAG - shift, _M_GRID, _LF_CDF)
    lo = np.interp(_OPT_BRIGHT_ABMAG - shift, _M_GRID, _LF_CDF)
    return hi - lo


def _cell_weights(xyz):
    """Line-of-sight weights for the cells containing ``xyz``.

    Returns
    -------
    cell_of_point : ndarray of int, shape (n,)
        Index of each point's cell.
    weights : ndarray, shape (n_cells, n_grid)
        Number of visible stars per steradian in each distance bin (arbitrary units).
    """
    l_deg, b_deg = _galactic_lb(xyz)
    key = (np.floor(l_deg / _CELL_DEG).astype(np.int64) * 1000
           + np.floor((b_deg + 90.0) / _CELL_DEG).astype(np.int64))
    cells, cell_of_point = np.unique(key, return_inverse=True)
    l_rad = np.radians((cells // 1000 + 0.5) * _CELL_DEG)[:, None]
    b_rad = np.radians((cells % 1000 + 0.5) * _CELL_DEG - 90.0)[:, None]
    d = _D_GRID_PC[None, :]
    density = sum(_disc_densities(l_rad, b_rad, d))
    weights = density * d**3 * _DLN_D * _visible_fraction(b_rad, d)
    return cell_of_point.ravel(), weights


@functools.lru_cache(maxsize=1)
def _column_at_galactic_pole():
    """Visible-star column toward the north Galactic pole, used to normalise densities."""
    # Just off the exact pole, so the latitude cell is an ordinary one.
    near_pole_gal = _lonlat_to_xyz(np.array([0.0]), np.array([89.75]))
    _, weights = _cell_weights(near_pole_gal @ _icrs_to_galactic_matrix())
    return float(weights.sum())


def _sample_star_positions(rng, patch_id, scale):
    """Star positions in one patch, with a count and a distribution following the disc model."""
    _, _, areas_deg2 = _patch_geometry()
    probe = _sample_caps(rng, np.full(3000, patch_id))
    cell, weights = _cell_weights(probe)
    column = weights.sum(axis=1)[cell]
    expected = (_STAR_DENSITY_AT_POLE_PER_DEG2 * scale * areas_deg2[patch_id]
                * column.mean() / _column_at_galactic_pole())
    n_wanted = int(rng.poisson(expected))
    column_max = 1.2 * column.max()
    accepted = []
    n_have = 0
    # Rejection sampling in batches (not per row) until enough positions are accepted.
    while n_have < n_wanted:
        n_try = int(1.5 * (n_wanted - n_have) * column_max / column.mean()) + 64
        trial = _sample_caps(rng, np.full(n_try, patch_id))
        cell_t, weights_t = _cell_weights(trial)
        keep = rng.random(n_try) * column_max < weights_t.sum(axis=1)[cell_t]
        accepted.append(trial[keep])
        n_have += int(keep.sum())
    if not accepted:
        return np.empty((0, 3))
    return np.concatenate(accepted)[:n_wanted]


def _draw_from_cells(rng, cell_of_point, weights):
    """Draw one distance bin per point from its cell's weights (vectorised inverse CDF)."""
    cdf = np.cumsum(weights, axis=1)
    cdf = cdf / cdf[:, -1:]
    n_cells, n_grid = cdf.shape
    # Offsetting row k by k makes the flattened CDF monotonic, so one searchsorted serves all.
    flat = (cdf + np.arange(n_cells)[:, None]).ravel()
    target = rng.random(len(cell_of_point)) + cell_of_point
    index = np.searchsorted(flat, target, side="right")
    index = np.minimum(index, n_cells * n_grid - 1) - cell_of_point * n_grid
    return np.clip(index, 0, n_grid - 1)


def _star_properties(rng, xyz, patch):
    """True properties of Galactic stars at the given positions (astrometric epoch)."""
    n = len(xyz)
    cell, weights = _cell_weights(xyz)
    k = _draw_from_cells(rng, cell, weights)
    d_pc = np.exp(_LN_D_GRID[k] + (rng.random(n) - 0.5) * _DLN_D)
    l_deg, b_deg = _galactic_lb(xyz)
    l_rad, b_rad = np.radians(l_deg), np.radians(b_deg)

    # Absolute magnitude from the luminosity function truncated to the visible window.
    av = _extinction_av(b_rad, d_pc)
    shift = 5.0 * np.log10(d_pc / 10.0) + _EXT_PER_AV["broad"] * av
    cdf_lo = np.interp(_OPT_BRIGHT_ABMAG - shift, _M_GRID, _LF_CDF)
    cdf_hi = np.interp(_OPT_LIMIT_ABMAG - shift, _M_GRID, _LF_CDF)
    absmag = np.interp(cdf_lo + rng.random(n) * (cdf_hi - cdf_lo), _LF_CDF, _M_GRID)
    broad = np.clip(absmag + shift, _OPT_BRIGHT_ABMAG, _OPT_LIMIT_ABMAG)
    lf_main = np.interp(absmag, _M_GRID, _LF_MAIN)
    lf_giant = np.interp(absmag, _M_GRID, _LF_GIANT)
    giant = rng.random(n) < lf_giant / (lf_main + lf_giant)
    colour = np.where(giant, 1.15 + 0.12 * rng.standard_normal(n),
                      np.interp(absmag, _MS_ABSMAG, _MS_COLOUR) + 0.04 * rng.standard_normal(n))

    # Optical-minus-infrared colour grows with optical colour: about 1.5 for a solar-type star,
    # about 5 for a mid-M dwarf (AB optical minus Vega infrared; invented fit, realistic in spirit).
    intrinsic = broad - _EXT_PER_AV["broad"] * av
    m34 = intrinsic - (0.25 + 1.55 * colour + 0.05 * rng.standard_normal(n))
    m46 = m34 - 0.04 * rng.standard_normal(n)
    m120 = m46 - (0.03 + 0.06 * rng.standard_normal(n))
    m220 = m120 - (0.02 + 0.10 * rng.standard_normal(n))

    # Kinematics: pick the component from the local density mix at the drawn distance.
    thin, thick, halo = _disc_densities(l_rad, b_rad, d_pc)
    u = rng.random(n) * (thin + thick + halo)
    component = np.where(u < thin, 0, np.where(u < thin + thick, 1, 2))
    sigma = np.array([_KINEMATICS[c][0] for c in range(3)])[component]
    drift = np.array([_KINEMATICS[c][1] for c in range(3)])[component]
    cos_b = np.cos(b_rad)
    x_pc = d_pc * cos_b * np.cos(l_rad) - _R_SUN_PC
    y_pc = d_pc * cos_b * np.sin(l_rad)
    r_pc = np.hypot(x_pc, y_pc)
    radial = np.stack([x_pc / r_pc, y_pc / r_pc, np.zeros(n)], axis=-1)
    # Rotation sense: at the Sun's position (-R_sun, 0, 0) the disc moves toward l = 90 deg.
    rotation = np.stack([y_pc / r_pc, -x_pc / r_pc, np.zeros(n)], axis=-1)
    v_r = sigma[:, 0] * rng.standard_normal(n)
    v_phi = _V_CIRC_KMS - drift + sigma[:, 1] * rng.standard_normal(n)
    v_z = sigma[:, 2] * rng.standard_normal(n)
    v_gal = radial * v_r[:, None] + rotation * v_phi[:, None]
    v_gal[:, 2] += v_z
    v_sun = np.array([_SUN_UVW_KMS[0], _V_CIRC_KMS + _SUN_UVW_KMS[1], _SUN_UVW_KMS[2]])
    v_icrs = (v_gal - v_sun) @ _icrs_to_galactic_matrix()  # rows: v_gal_row @ M == M.T @ v
    east, north = _tangent_basis(xyz)
    parallax_mas = 1000.0 / d_pc
    pmra = np.einsum("ij,ij->i", v_icrs, east) * parallax_mas / _KMS_PER_AU_YR
    pmdec = np.einsum("ij,ij->i", v_icrs, north) * parallax_mas / _KMS_PER_AU_YR

    binary = rng.random(n) < _BINARY_FRACTION
    fit_excess = np.where(binary, 10 ** rng.uniform(0.1, 0.5, n), 1.0)
    return _objects(
        pop=np.full(n, _STAR), patch=patch, xyz=xyz, parallax=parallax_mas, pmra=pmra,
        pmdec=pmdec, redshift=np.full(n, np.nan),
        broad=broad,
        blue=broad + 0.45 * colour + (_EXT_PER_AV["blue"] - _EXT_PER_AV["broad"]) * av,
        red=broad - 0.55 * colour + (_EXT_PER_AV["red"] - _EXT_PER_AV["broad"]) * av,
        ir=np.stack([m34, m46, m120, m220], axis=1)
        + av[:, None] * np.array([_EXT_PER_AV[b] for b in _IR_BANDS]),
        fit_excess=fit_excess, optical_prob=np.ones(n),
    )


# --------------------------------------------------------------------------------------------
# Other populations
# --------------------------------------------------------------------------------------------

_OBJECT_FIELDS = ("pop", "patch", "xyz", "parallax", "pmra", "pmdec", "redshift", "broad",
                  "blue", "red", "ir", "fit_excess", "optical_prob", "dimming")


def _objects(**fields):
    """A population as a dict of equal-length arrays (true values at the astrometric epoch).

    ``dimming`` (mag) is the broad-band light lost on the way (Galactic extinction plus, for
    obscured quasars, nuclear obscuration); it is needed only for quasar luminosities and is NaN
    where not given.
    """
    n = len(fields["pop"])
    fields.setdefault("dimming", np.nan)
    out = {}
    for name in _OBJECT_FIELDS:
        value = np.asarray(fields[name])
        if value.ndim == 0:
            value = np.full(n, value)
        out[name] = value
    return out


def _concat(parts):
    return {name: np.concatenate([p[name] for p in parts]) for name in _OBJECT_FIELDS}


def _power_law_mags(rng, n, faint, bright, slope):
    """Magnitudes with cumulative counts N(<m) proportional to 10**(slope*m) in [bright, faint]."""
    lo = 10 ** (slope * (bright - faint))
    return faint + np.log10(lo + rng.random(n) * (1.0 - lo)) / slope


@functools.lru_cache(maxsize=1)
def _distance_modulus_grid():
    """Distance modulus (mag) of the Planck18 cosmology on a fine grid of log(1 + z).

    astropy integrates the distance once per grid point; interpolating in log(1 + z) is then
    accurate to about a micro-magnitude, and far faster than one integral per object.
    """
    from astropy.cosmology import Planck18

    ln1z = np.linspace(np.log1p(1e-3), np.log1p(6.0), 1200)
    dl_pc = Planck18.luminosity_distance(np.expm1(ln1z)).to_value("pc")
    dm = 5.0 * np.log10(dl_pc / 10.0)
    for arr in (ln1z, dm):
        arr.setflags(write=False)
    return ln1z, dm


def _distance_modulus(z):
    """Distance modulus (mag) at redshift ``z`` (0.001–6) in the Planck18 cosmology."""
    ln1z, dm = _distance_modulus_grid()
    return np.interp(np.log1p(np.asarray(z, dtype=float)), ln1z, dm)


def _k_correction(z):
    """K-correction (mag) of a power-law continuum f_nu ∝ nu**alpha_nu to the same band at z = 0.

    m = M + DM(z) + K(z) with K = -2.5 (1 + alpha_nu) log10(1 + z): -1.25 log10(1 + z) for
    alpha_nu = -0.5 (the convention of Richards et al. 2006, AJ 131, 2766).
    """
    return -2.5 * (1.0 + _QUASAR_ALPHA_NU) * np.log10(1.0 + np.asarray(z, dtype=float))


def _quasar_luminosity(intrinsic_broad_abmag, z):
    """Absolute broad-band magnitude (AB, z = 0) and bolometric luminosity (erg/s) of quasars.

    ``intrinsic_broad_abmag`` is the apparent magnitude the nucleus would have with no Galactic
    extinction and no obscuration.  The rest-frame luminosity density at the band's effective
    wavelength, L_nu = 4 pi (10 pc)^2 10**(-0.4 (M + 48.60)), is carried along the power law to
    3000 Å, and L_bol = 5.15 nu L_nu there (Richards et al. 2006; from memory).
    """
    absmag = intrinsic_broad_abmag - _distance_modulus(z) - _k_correction(z)
    ten_pc_cm = 10.0 * 3.0856775814913673e18
    l_nu_eff = 4.0 * np.pi * ten_pc_cm**2 * 10 ** (-0.4 * (absmag + 48.60))
    c_angstrom_s = 2.99792458e18
    nu_eff = c_angstrom_s / _BROAD_EFFECTIVE_WAVELENGTH_ANGSTROM
    nu_3000 = c_angstrom_s / 3000.0
    nu_l_nu_3000 = nu_3000 * l_nu_eff * (nu_3000 / nu_eff) ** _QUASAR_ALPHA_NU
    return absmag, _BOLOMETRIC_CORRECTION_3000 * nu_l_nu_3000


def _quasar_colour_34_46(z):
    """Invented mean 3.4−4.6 µm colour (Vega) of quasars against redshift.

    Hot dust keeps the colour red (about 1.1–1.25) over most of the range; host light lowers it at
    low redshift and the rest-frame near-infrared bump moving through both bands lowers it
    toward 0.6–0.7 around z ≈ 4.  A smooth made-up function, realistic in spirit.
    """
    z = np.asarray(z, dtype=float)
    return (1.12 + 0.12 * np.exp(-(((z - 1.2) / 0.5) ** 2))
            - 0.50 * np.exp(-(((z - 4.1) / 0.9) ** 2))
            - 0.25 * np.exp(-(((z - 0.3) / 0.3) ** 2)))


def _extragalactic_av(xyz):
    """Full-column V-band extinction (mag) toward each position."""
    _, b_deg = _galactic_lb(xyz)
    return _extinction_av(np.radians(b_deg), np.inf)


def _quasar_like(rng, xyz, patch, pop, broad0, z, opt_minus_34=None, obscuration=0.0):
    """Quasars at rest, from broad-band magnitude (AB, before Galactic extinction) and redshift.

    ``opt_minus_34`` is the broad-band (AB) minus 3.4 µm (Vega) colour; by default about
    2.7 ± 0.4, typical of unobscured quasars (common practice).  ``obscuration`` (mag) is the
    nuclear obscuration already included in ``broad0``; with Galactic extinction it makes up the
    ``dimming`` that the truth luminosities undo.
    """
    n = len(xyz)
    av = _extragalactic_av(xyz)
    c_34_46 = _quasar_colour_34_46(z) + 0.12 * rng.standard_normal(n)
    if opt_minus_34 is None:
        opt_minus_34 = _QUASAR_OPT_MINUS_34 + 0.4 * rng.standard_normal(n)
    m34 = broad0 - opt_minus_34
    m46 = m34 - c_34_46
    m120 = m46 - (2.9 + 0.25 * rng.standard_normal(n))
    m220 = m120 - (2.4 + 0.30 * rng.standard_normal(n))
    # Optical colour: blue quasar continuum, reddened strongly once the absorption forest enters
    # the blue band at high redshift (invented).
    colour = (0.45 + 0.05 * z + 0.7 / (1.0 + np.exp(-(z - 3.2) / 0.25))
              + 0.08 * rng.standard_normal(n))
    # Host galaxies of low-redshift quasars make them look slightly extended.
    fit_excess = 1.0 + 0.5 * np.exp(-z / 0.2) * rng.random(n)
    ir = np.stack([m34, m46, m120, m220], axis=1)
    ir = ir + av[:, None] * np.array([_EXT_PER_AV[b] for b in _IR_BANDS])
    broad = broad0 + _EXT_PER_AV["broad"] * av
    return _objects(
        pop=np.full(n, pop), patch=patch, xyz=xyz, parallax=0.0, pmra=0.0, pmdec=0.0,
        redshift=z, broad=broad,
        blue=broad + 0.45 * colour + (_EXT_PER_AV["blue"] - _EXT_PER_AV["broad"]) * av,
        red=broad - 0.55 * colour + (_EXT_PER_AV["red"] - _EXT_PER_AV["broad"]) * av,
        ir=ir, fit_excess=fit_excess, optical_prob=1.0,
        dimming=_EXT_PER_AV["broad"] * av + obscuration,
    )


def _make_quasars(rng, aux, scale):
    counts = _per_patch_counts(rng, _QUASAR_DENSITY_PER_DEG2, scale)
    patch = np.repeat(np.arange(len(_PATCHES)), counts)
    xyz = _sample_caps(rng, patch)
    n = len(patch)
    broad0 = _power_law_mags(rng, n, 21.5, 16.0, 0.4)
    z = 0.3 + 3.7 * rng.beta(2.0, 3.0, n)
    high = rng.random(n) < _HIGH_Z_QUASAR_FRACTION
    z = np.where(high, rng.uniform(*_HIGH_Z_RANGE, n), z)
    z = _cap_luminosity(aux, broad0, z, 0.3)
    return _quasar_like(rng, xyz, patch, _QUASAR, broad0, z)


def _cap_luminosity(aux, intrinsic_broad_abmag, z, z_min):
    """Redraw (uniformly above ``z_min``) the redshift of quasars that would outshine the very
    bright population, so no ordinary quasar has M < :data:`_ORDINARY_QUASAR_ABSMAG_MIN`.

    The magnitudes are kept, so the number counts do not change; apparently bright quasars simply
    end up nearer, as on the real sky.  ``aux`` makes the draws, leaving the main sequence as it was.
    """
    ln1z, dm = _distance_modulus_grid()
    shift = dm + _k_correction(np.expm1(ln1z))  # increases with z
    z_max = np.expm1(np.interp(intrinsic_broad_abmag - _ORDINARY_QUASAR_ABSMAG_MIN, shift, ln1z))
    too_bright = z > z_max
    redrawn = z_min + aux.random(len(z)) * np.maximum(z_max - z_min, 0.0)
    return np.where(too_bright, redrawn, z)


def _make_obscured_quasars(rng, aux, scale):
    """Dust-reddened quasars: red in the infrared, mostly too faint for the optical catalogue."""
    counts = _per_patch_counts(rng, _OBSCURED_QUASAR_DENSITY_PER_DEG2, scale)
    patch = np.repeat(np.arange(len(_PATCHES)), counts)
    xyz = _sample_caps(rng, patch)
    n = len(patch)
    m34 = _power_law_mags(rng, n, 17.0, 13.0, 0.45)
    z = 0.5 + 2.5 * rng.beta(2.0, 3.0, n)
    # The unobscured nucleus would have broad = m34 + 2.7; cap its luminosity like ordinary ones.
    z = _cap_luminosity(aux, m34 + _QUASAR_OPT_MINUS_34, z, 0.3)
    opt_minus_34 = 5.5 + 0.8 * rng.standard_normal(n)
    objs = _quasar_like(rng, xyz, patch, _QUASAR, m34 + opt_minus_34, z, opt_minus_34,
                        obscuration=opt_minus_34 - _QUASAR_OPT_MINUS_34)
    objs["ir"][:, 1:] -= 0.25  # extra dust reddening of 3.4−4.6 and beyond
    return objs


def _make_bright_quasars(rng, scale):
    """A handful of very luminous quasars, the most luminous objects of the sky.

    Their number is ``round(7 * scale)``, at least 2; the first half (rounded down, at least one)
    are nearby (z 0.45–1.0, optical 13–14.5 AB), the rest at high redshift (z 2–3.5, optical about
    16–18.5 AB).  The apparent magnitude is drawn inside the interval that puts the absolute
    magnitude in :data:`_BRIGHT_QUASAR_ABSMAG`, so these are more luminous than any ordinary
    quasar.  Hot dust makes them a little brighter in the infrared than ordinary quasars
    (broad − 3.4 µm about 3.2), so 4.6 µm is about 8.5–14 Vega.
    """
    n = max(2, int(round(_BRIGHT_QUASARS_AT_SCALE_1 * scale)))
    patch = _random_patches(rng, n)
    xyz = _sample_caps(rng, patch)
    near = np.arange(n) < max(1, n // 2)
    z = np.where(near, rng.uniform(*_BRIGHT_QUASAR_Z_NEAR, n), rng.uniform(*_BRIGHT_QUASAR_Z_FAR, n))
    shift = _distance_modulus(z) + _k_correction(z)
    lo = np.maximum(_BRIGHT_QUASAR_ABSMAG[0] + shift, _BRIGHT_QUASAR_OPT_MIN_ABMAG)
    hi = _BRIGHT_QUASAR_ABSMAG[1] + shift
    broad0 = lo + rng.random(n) * np.maximum(hi - lo, 0.0)
    opt_minus_34 = 3.2 + 0.3 * rng.standard_normal(n)
    return _quasar_like(rng, xyz, patch, _BRIGHT_QUASAR, broad0, z, opt_minus_34)


def _make_galaxies(rng, scale):
    """Compact galaxies at rest: intermediate 3.4−4.6 colours, red 4.6−12, poor astrometric fit."""
    counts = _per_patch_counts(rng, _GALAXY_DENSITY_PER_DEG2, scale)
    patch = np.repeat(np.arange(len(_PATCHES)), counts)
    xyz = _sample_caps(rng, patch)
    n = len(patch)
    av = _extragalactic_av(xyz)
    m34 = _power_law_mags(rng, n, 17.5, 12.5, 0.5)
    z = np.clip(0.02 + 0.12 * (m34 - 12.5) + 0.06 * rng.standard_normal(n), 0.01, 1.2)
    c_34_46 = 0.1 + 0.5 * rng.beta(1.5, 3.0, n)
    m46 = m34 - c_34_46
    m120 = m46 - (3.2 + 0.4 * rng.standard_normal(n))
    m220 = m120 - (2.3 + 0.3 * rng.standard_normal(n))
    broad0 = m34 + 3.0 + 2.0 * z + 0.5 * rng.standard_normal(n)
    colour = 1.0 + 0.6 * rng.random(n)
    # the fit-quality draw comes last, as in the other galaxy population
    fit_excess = 10 ** (0.4 + 0.15 * rng.standard_normal(n))
    return _galaxy_objects(patch, xyz, av, z, broad0, colour, (m34, m46, m120, m220), fit_excess,
                           _GALAXY_OPTICAL_FRACTION)


def _make_dusty_galaxies(rng, scale):
    """Dusty star-forming galaxies at rest: faint at 4.6 µm, 3.4−4.6 µm colours of 0.4–1.05.

    Hot dust around young stars, plus a weak buried nucleus in some, pushes their colour toward
    the quasar locus; they are very bright at 12 µm (warm dust and aromatic bands), somewhat
    extended in the optical, and optically faint for their infrared flux.  These are the galaxies
    that leak into infrared colour selections near their faint limit (invented relations, realistic
    in spirit).
    """
    counts = _per_patch_counts(rng, _DUSTY_GALAXY_DENSITY_PER_DEG2, scale)
    patch = np.repeat(np.arange(len(_PATCHES)), counts)
    xyz = _sample_caps(rng, patch)
    n = len(patch)
    av = _extragalactic_av(xyz)
    m46 = _power_law_mags(rng, n, 16.3, 13.8, 0.5)
    c_34_46 = 0.4 + 0.65 * rng.beta(2.0, 2.0, n)
    m34 = m46 + c_34_46
    m120 = m46 - (3.6 + 0.4 * rng.standard_normal(n))
    m220 = m120 - (2.6 + 0.3 * rng.standard_normal(n))
    z = np.clip(0.3 + 0.25 * (m46 - 13.8) + 0.1 * rng.standard_normal(n), 0.05, 1.5)
    broad0 = m34 + 3.3 + 0.5 * rng.standard_normal(n)
    colour = 0.9 + 0.5 * rng.random(n)
    fit_excess = 10 ** (0.18 + 0.12 * rng.standard_normal(n))
    return _galaxy_objects(patch, xyz, av, z, broad0, colour, (m34, m46, m120, m220), fit_excess,
                           _DUSTY_GALAXY_OPTICAL_FRACTION)


def _galaxy_objects(patch, xyz, av, z, broad0, colour, ir_mags, fit_excess, optical_prob):
    """Galaxies at rest from their unreddened magnitudes: extinction applied, optical colours set."""
    broad = broad0 + _EXT_PER_AV["broad"] * av
    ir = np.stack(ir_mags, axis=1) + av[:, None] * np.array([_EXT_PER_AV[b] for b in _IR_BANDS])
    return _objects(
        pop=np.full(len(patch), _GALAXY), patch=patch, xyz=xyz, parallax=0.0, pmra=0.0, pmdec=0.0,
        redshift=z, broad=broad,
        blue=broad + 0.45 * colour + (_EXT_PER_AV["blue"] - _EXT_PER_AV["broad"]) * av,
        red=broad - 0.55 * colour + (_EXT_PER_AV["red"] - _EXT_PER_AV["broad"]) * av,
        ir=ir, fit_excess=fit_excess, optical_prob=optical_prob,
        dimming=_EXT_PER_AV["broad"] * av,
    )


def _brown_dwarf_batch(rng, n):
    """Candidate brown dwarfs: parallax 20–200 mas, 3.4−4.6 colour 0.3–2.5 (invented relations)."""
    parallax_mas = np.exp(rng.uniform(np.log(20.0), np.log(200.0), n))
    c_34_46 = 0.3 + 2.2 * rng.beta(1.2, 2.5, n)
    abs_m46 = 10.3 + 1.3 * c_34_46
    m46 = abs_m46 + 5.0 * np.log10(100.0 / parallax_mas)
    broad = m46 + 6.0 + 0.9 * c_34_46 + 0.3 * rng.standard_normal(n)
    return parallax_mas, c_34_46, m46, broad


def _make_brown_dwarfs(rng, scale):
    """Nearby brown dwarfs; those too faint optically stay in the infrared catalogue only."""
    _, _, areas = _patch_geometry()
    n_optical = max(2, int(rng.poisson(_BROWN_DWARF_DENSITY_PER_DEG2 * scale * areas.sum())))
    n_ir_only_max = int(math.ceil(0.3 * n_optical))
    keep_opt, keep_ir = [], []
    n_opt = n_ir = 0
    while n_opt < n_optical:
        batch = _brown_dwarf_batch(rng, 4 * (n_optical - n_opt) + 8)
        visible = batch[3] <= _OPT_LIMIT_ABMAG - 0.1
        ir_only = ~visible & (batch[2] <= 15.5)
        keep_opt.append([b[visible] for b in batch])
        keep_ir.append([b[ir_only] for b in batch])
        n_opt += int(visible.sum())
        n_ir += int(ir_only.sum())
    opt = [np.concatenate([k[i] for k in keep_opt])[:n_optical] for i in range(4)]
    iro = [np.concatenate([k[i] for k in keep_ir])[:n_ir_only_max] for i in range(4)]
    parallax_mas, c_34_46, m46, broad = (np.concatenate([a, b]) for a, b in zip(opt, iro))
    n = len(parallax_mas)
    patch = _random_patches(rng, n)
    xyz = _sample_caps(rng, patch)
    # Tangential velocities of tens of km/s; total motion kept within 100–2000 mas/yr.
    v_tan_kms = np.exp(np.log(30.0) + 0.5 * rng.standard_normal(n))
    pm_total = np.clip(v_tan_kms * parallax_mas / _KMS_PER_AU_YR, 100.0, 2000.0)
    angle = rng.random(n) * 2.0 * np.pi
    m120 = m46 - (0.5 + 0.6 * c_34_46)
    blue = broad + 2.3 + 0.3 * c_34_46
    return _objects(
        pop=np.full(n, _BROWN_DWARF), patch=patch, xyz=xyz, parallax=parallax_mas,
        pmra=pm_total * np.sin(angle), pmdec=pm_total * np.cos(angle),
        redshift=np.full(n, np.nan), broad=broad, blue=blue, red=broad - 1.3 - 0.1 * c_34_46,
        ir=np.stack([m46 + c_34_46, m46, m120, m120 - 0.3], axis=1),
        fit_excess=1.0, optical_prob=1.0,
    )


# --------------------------------------------------------------------------------------------
# Observation models
# --------------------------------------------------------------------------------------------


def _parallax_error_mas(broad):
    """Parallax error (mas) against broad-band magnitude.

    ``sqrt(c0 + c1 x + c2 x^2)`` µas with ``x = 10**(0.4 (max(m, 13) - 15))``, coefficients
    fitted to 0.02, 0.1, 0.5 and 1.3 mas at 15, 18, 20 and 21 mag (the brief's targets, at the
    level of modern space astrometry; common practice).
    """
    x = 10 ** (0.4 * (np.maximum(broad, 13.0) - 15.0))
    return 1e-3 * np.sqrt(145.3 + 230.6 * x + 24.25 * x**2)


def _ir_snr(mags):
    """True signal-to-noise ratio of infrared magnitudes (n, 4)."""
    return _IR_SNR_SOURCE * 10 ** (-0.4 * (mags - _IR_LIMIT5_VEGAMAG))


def _combine_mags(a, b):
    """Magnitude of the summed flux of two sources."""
    return -2.5 * np.log10(10 ** (-0.4 * a) + 10 ** (-0.4 * b))


def _make_blend_companions(rng, objs):
    """Pick blend primaries and create a companion optical star 0.8–2 arcsec from each."""
    in_optical = objs["optical"]
    well_detected = np.max(_ir_snr(objs["ir"])[:, :2], axis=1) >= 2.0 * _IR_SNR_SOURCE
    primary = np.flatnonzero(in_optical & well_detected & (rng.random(len(in_optical))
                                                           < _BLEND_FRACTION))
    n = len(primary)
    sep_rad = rng.uniform(*_BLEND_SEPARATION_ARCSEC, n) * _ARCSEC_TO_RAD
    angle = rng.random(n) * 2.0 * np.pi
    xyz = _offset(objs["xyz"][primary], sep_rad * np.sin(angle), sep_rad * np.cos(angle))
    companions = _star_properties(rng, xyz, objs["patch"][primary])
    return primary, companions


# --------------------------------------------------------------------------------------------
# Identifiers
# --------------------------------------------------------------------------------------------


#: Infrared identifiers: ``IRX-<cell>-<serial>``; the cell is a 2 deg x 2 deg box of our own
#: (declination zone x 180 + right-ascension step) and the serial counts sources by right
#: ascension inside it (an invented scheme, deliberately not sexagesimal).
_IR_ID_PREFIX = "IRX"
_IR_CELL_DEG = 2.0


def _ir_identifiers(ra_deg, dec_deg):
    """Unique identifiers ``IRX-CCCCC-SSSS`` from positions (cell number, serial in the cell).

    Sources share a cell when they fall in the same 2 deg box; inside it they are numbered from 1
    in order of right ascension (then declination), so identifiers are unique by construction and
    sort like the cells.  Serials get more digits only if a cell ever holds 10 000 sources.
    """
    n = len(ra_deg)
    n_ra = int(round(360.0 / _IR_CELL_DEG))
    zone = np.clip(np.floor((np.asarray(dec_deg) + 90.0) / _IR_CELL_DEG), 0, 180.0 / _IR_CELL_DEG - 1)
    step = np.clip(np.floor(np.asarray(ra_deg) / _IR_CELL_DEG), 0, n_ra - 1)
    cell = (zone * n_ra + step).astype(np.int64)
    order = np.lexsort((dec_deg, ra_deg, cell))
    sorted_cell = cell[order]
    starts = np.r_[True, sorted_cell[1:] != sorted_cell[:-1]] if n else np.zeros(0, bool)
    group_start = np.maximum.accumulate(np.where(starts, np.arange(n), 0)) if n else starts
    serial = np.empty(n, dtype=np.int64)
    serial[order] = np.arange(n) - group_start + 1
    width = max(4, len(str(int(serial.max())))) if n else 4
    head = np.char.add(_IR_ID_PREFIX + "-", np.char.zfill(cell.astype(str), 5))
    return np.char.add(np.char.add(head, "-"), np.char.zfill(serial.astype(str), width)).astype(str)


def _serial_labels(prefix, n):
    return np.char.add(prefix, np.char.zfill(np.arange(1, n + 1).astype(str), 5))


# --------------------------------------------------------------------------------------------
# Public API
# --------------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class MockSky:
    """The four tables of one invented sky.

    Attributes
    ----------
    astrometric : pyarrow.Table
        Raw astrometric catalogue: ``srcid`` (int64, patch number x 10^7 + serial), ``alpha``,
        ``delta`` (deg, ICRS, epoch :data:`ASTROMETRIC_EPOCH_JYEAR`), ``alpha_unc``, ``delta_unc``
        (mas; ``alpha_unc`` includes cos δ), ``plx``, ``plx_unc`` (mas), ``mu_a`` (mas/yr, includes
        cos δ), ``mu_d``, ``mu_a_unc``, ``mu_d_unc`` (mas/yr), ``mu_corr`` (pmra–pmdec
        correlation), ``plx_mu_a_corr``, ``plx_mu_d_corr`` (parallax–pmra and parallax–pmdec
        correlations), ``mag_broad``, ``mag_blue``, ``mag_red`` and their ``*_unc`` (AB mag;
        ``mag_blue`` is NaN for sources too faint in the blue band), ``fit_excess`` (about 1 for
        good point sources) and ``ext_excess``, ``ext_excess_unc`` (mag: point-source-fit minus
        aperture magnitude and its error; about 0 for point sources, positive for galaxies).
    infrared : pyarrow.Table
        Raw infrared catalogue: ``ir_name`` (unique identifier ``IRX-<cell>-<serial>``),
        ``ra_ir``, ``dec_ir`` (deg, epoch :data:`INFRARED_EPOCH_JYEAR`), ``pos_unc`` (arcsec, per
        axis; the observed position scatters around the true one with exactly this σ), ``m34``,
        ``m46``, ``m120``, ``m220`` and their ``*_unc`` (Vega mag at 3.4, 4.6, 12 and 22 µm; NaN
        where the band has S/N < 3), ``qual_bits`` (int, bitmask of :data:`QUAL_BITS`; 0 clean)
        and ``ext_flag`` (int, 1 when resolved in the infrared beam).
    known : pyarrow.Table
        Known objects: ``label``, ``ra_k``, ``dec_k`` (deg, true positions at the astrometric
        epoch), ``kind`` (``quasar``, ``star`` or ``galaxy``) and ``z`` (spectroscopic redshift,
        four decimals; NaN for stars), usable as labels for a photometric-redshift model.
    truth : pyarrow.Table
        One row per row of ``astrometric`` and of ``infrared`` (in that order): ``catalogue``,
        ``id``, ``population``, ``redshift``, ``counterpart_id`` (empty when none), ``blend``, plus
        ``patch``, ``true_ra``, ``true_dec`` (deg, astrometric epoch), ``true_parallax`` (mas),
        ``true_pmra``, ``true_pmdec`` (mas/yr), ``true_mag_broad`` (AB), ``true_m46`` (Vega),
        ``above_completeness`` (quasars brighter than both :data:`COMPLETENESS` limits),
        ``true_ra_ir_epoch``, ``true_dec_ir_epoch`` (deg: the true centre at the infrared epoch;
        for an infrared row the, possibly blended, centre its position was drawn around),
        ``true_ext_excess`` (mag, noiseless extent), and for quasars (NaN otherwise)
        ``true_dimming_broad`` (mag of Galactic extinction plus nuclear obscuration in the broad
        band), ``true_absmag_broad`` (AB mag of the unobscured nucleus, K-corrected to z = 0:
        ``true_mag_broad - true_dimming_broad - DM(z) + 1.25 log10(1 + z)``, DM from Planck18) and
        ``true_lbol_erg_s`` (erg/s, 5.15 λL_λ at 3000 Å along f_ν ∝ ν^−0.5 from the band's
        effective wavelength of 6200 Å).
    """

    astrometric: pa.Table
    infrared: pa.Table
    known: pa.Table
    truth: pa.Table


def make_mock_sky(seed: int = 1, scale: float = 1.0) -> MockSky:
    """Generate the invented sky.

    Parameters
    ----------
    seed : int, default 1
        Seed of :func:`numpy.random.default_rng`; the same seed and scale give identical tables.
    scale : float, default 1.0
        Multiplies every surface density (the sky patches stay the same).  ``scale=1`` gives about
        175 000 astrometric and 130 000 infrared rows in about three seconds; tests use 0.02–0.05.
        A few rare populations keep a minimum count so that every population is present.

    Returns
    -------
    MockSky
        The astrometric, infrared, known-objects and truth tables.

    Raises
    ------
    ValueError
        If ``seed`` is not a non-negative integer or ``scale`` is not a positive finite number.
    """
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed!r}")
    if (isinstance(scale, bool) or not isinstance(scale, (int, float, np.floating, np.integer))
            or not math.isfinite(scale) or scale <= 0):
        raise ValueError(f"scale must be a positive finite number, got {scale!r}")
    scale = float(scale)
    rng = np.random.default_rng(seed)

    # A second stream for what was added later, so the first keeps drawing what it always drew.
    aux = np.random.default_rng([seed, 1])

    objs, partner = _true_sky(rng, aux, scale)
    objs["ext_true"] = _true_extents(aux, objs)
    ir = _observe_infrared(rng, aux, objs, partner)
    astro = _observe_astrometric(rng, aux, objs)
    truth = _truth_columns(objs, partner, ir, astro)
    known = _known_columns(rng, objs, astro, scale)
    return MockSky(
        astrometric=_to_table(astro["columns"], _ASTRO_UNITS, "astrometric"),
        infrared=_to_table(ir["columns"], _IR_UNITS, "infrared"),
        known=_to_table(known, _KNOWN_UNITS, "known"),
        truth=_to_table(truth, _TRUTH_UNITS, "truth"),
    )


def _true_sky(rng, aux, scale):
    """All objects with their true properties, including blend companions.

    Returns
    -------
    objs : dict of ndarray
        One entry per object (see ``_OBJECT_FIELDS``) plus ``optical`` (bool, in the astrometric
        catalogue) and ``xyz_ir`` (true unit vector at the infrared epoch).
    partner : ndarray of int
        Index of the other object of a blend pair, -1 for unblended objects.
    """
    star_parts = []
    for patch_id in range(len(_PATCHES)):
        xyz = _sample_star_positions(rng, patch_id, scale)
        star_parts.append(_star_properties(rng, xyz, np.full(len(xyz), patch_id)))
    objs = _concat(star_parts + [
        _make_brown_dwarfs(rng, scale),
        _make_galaxies(rng, scale),
        _make_dusty_galaxies(rng, scale),
        _make_quasars(rng, aux, scale),
        _make_obscured_quasars(rng, aux, scale),
        _make_bright_quasars(rng, scale),
    ])
    n_single = len(objs["pop"])
    objs["optical"] = ((objs["broad"] <= _OPT_LIMIT_ABMAG)
                       & (rng.random(n_single) < objs["optical_prob"]))

    primary, companions = _make_blend_companions(rng, objs)
    companions["optical"] = np.ones(len(primary), dtype=bool)
    objs = {k: np.concatenate([objs[k], companions[k]]) for k in objs}
    companion = n_single + np.arange(len(primary))
    partner = np.full(len(objs["pop"]), -1)
    partner[primary] = companion
    partner[companion] = primary
    dt_yr = INFRARED_EPOCH_JYEAR - ASTROMETRIC_EPOCH_JYEAR
    objs["xyz_ir"] = _propagate(objs["xyz"], objs["pmra"], objs["pmdec"], dt_yr)
    return objs, partner


def _true_extents(aux, objs):
    """Intrinsic extent (mag, the ``ext_excess`` a noiseless measurement would give) per object.

    Stars, brown dwarfs and blend companions are points (0).  Galaxies follow a log-normal law,
    median about 0.2 mag and 0.35 dex wide, larger for a poorer astrometric fit and smaller at
    higher redshift (a smaller angle), so a tail of compact or distant galaxies is nearly
    point-like; dusty starbursts, with their better fits, are more compact.  Quasars show their
    host only at the lowest redshifts: a few hundredths of a magnitude (invented relations,
    realistic in spirit).
    """
    n = len(objs["pop"])
    z = np.nan_to_num(objs["redshift"], nan=0.0)
    log_fit = np.log10(np.maximum(objs["fit_excess"], 1.0))
    gal = objs["pop"] == _GALAXY
    log_ext = (np.log10(0.2) + 0.8 * (log_fit - 0.4) - 0.5 * np.log10((z + 0.05) / 0.25)
               + 0.35 * aux.standard_normal(n))
    qso = np.isin(objs["pop"], [_QUASAR, _BRIGHT_QUASAR])
    return np.where(gal, 10 ** log_ext, np.where(qso, 0.4 * (objs["fit_excess"] - 1.0), 0.0))


def _observe_infrared(rng, aux, objs, partner):
    """The infrared catalogue: flux-limited detection, photometric and positional noise.

    Every object except a blend companion owns an infrared source; a blend's source holds the
    summed flux and the 3.4 µm light-weighted centroid of both objects at the infrared epoch.
    The observed position is that true centre moved by a circular Gaussian of exactly the
    catalogued ``pos_unc`` per axis, so a probabilistic cross-match can be checked against truth.
    ``aux`` draws what was added later (the extendedness flag), leaving ``rng``'s sequence as it was.

    Returns
    -------
    dict
        ``columns`` (raw catalogue columns, sorted by identifier), ``obj`` (index of the owning
        object per row), ``m46_true`` (true, blended 4.6 µm magnitude per row) and ``xyz_true``
        (true centre at the infrared epoch per row).
    """
    n_obj = len(objs["pop"])
    is_companion = (partner >= 0) & (partner < np.arange(n_obj))
    owner = np.flatnonzero(~is_companion)
    ir_true = objs["ir"][owner].copy()
    ir_xyz = objs["xyz_ir"][owner].copy()
    rows = np.flatnonzero(partner[owner] >= 0)
    comp = partner[owner[rows]]
    ir_true[rows] = _combine_mags(ir_true[rows], objs["ir"][comp])
    w_own = 10 ** (-0.4 * objs["ir"][owner[rows], 0])
    w_comp = 10 ** (-0.4 * objs["ir"][comp, 0])
    centroid = ir_xyz[rows] * w_own[:, None] + objs["xyz_ir"][comp] * w_comp[:, None]
    ir_xyz[rows] = centroid / np.linalg.norm(centroid, axis=1)[:, None]
    # Confusion: an unrelated red source below the detection limit adds its flux (not its
    # position: it is faint and sits well inside the beam).  Faint blue stars become red this way.
    confused = np.flatnonzero(rng.random(len(owner)) < _IR_CONFUSION_FRACTION)
    bg46 = rng.uniform(*_IR_CONFUSION_M46, len(confused))
    bg34 = bg46 + _IR_CONFUSION_COLOUR[0] + _IR_CONFUSION_COLOUR[1] * rng.standard_normal(len(confused))
    background = np.stack([bg34, bg46, bg46 - 2.5, bg46 - 4.5], axis=1)
    ir_true[confused] = _combine_mags(ir_true[confused], background)

    # Noise in flux units of the 1-sigma background: observed S/N = true S/N + N(0, 1).
    n_own = len(owner)
    snr = _ir_snr(ir_true) + rng.standard_normal((n_own, 4))
    detected = (snr[:, 0] >= _IR_SNR_SOURCE) | (snr[:, 1] >= _IR_SNR_SOURCE)
    band_ok = snr >= _IR_SNR_BAND
    safe_snr = np.where(band_ok, snr, 1.0)
    ir_mag = (_IR_LIMIT5_VEGAMAG - 2.5 * np.log10(safe_snr / _IR_SNR_SOURCE)
              + _IR_FLOOR_MAG * rng.standard_normal((n_own, 4)))
    ir_mag = np.where(band_ok, ir_mag, np.nan)
    ir_unc = np.where(band_ok, np.hypot(_IR_FLOOR_MAG, 1.0857 / safe_snr), np.nan)
    best_snr = np.maximum(np.maximum(snr[:, 0], snr[:, 1]), 1.0)
    pos_unc_arcsec = np.hypot(_IR_POS_FLOOR_ARCSEC, _IR_POS_BEAM_ARCSEC / best_snr)
    noise_rad = rng.standard_normal((n_own, 2)) * pos_unc_arcsec[:, None] * _ARCSEC_TO_RAD
    obs_xyz = _offset(ir_xyz, noise_rad[:, 0], noise_rad[:, 1])
    # Quality bits: rare random artefacts in each band, frequent around bright sources; a band's
    # artefact sets the bit of its kind (halo, spike, ghost; see QUAL_BITS).
    flag_prob = 0.01 + 0.3 * (ir_true[:, :1] < 9.0)
    flagged = rng.random((n_own, 4)) < flag_prob
    flag_kind = rng.integers(0, 3, (n_own, 4))
    kind_bits = np.array([QUAL_BITS["halo"], QUAL_BITS["spike"], QUAL_BITS["ghost"]])
    qual_bits = np.bitwise_or.reduce(np.where(flagged, kind_bits[flag_kind], 0), axis=1)
    qual_bits = qual_bits | np.where(ir_true[:, 0] < _IR_SATURATION_VEGAMAG,
                                     QUAL_BITS["saturated"], 0)
    # Extendedness: a galaxy is resolved in the 6-arcsec beam only if large on the sky and well
    # detected; two optical sources in one beam sometimes look extended; point sources rarely do.
    ext_true = objs["ext_true"][owner]
    big = 1.0 / (1.0 + np.exp(-(np.log10(np.maximum(ext_true, 1e-6))
                                - np.log10(_IR_EXT_HALF_MAG)) / _IR_EXT_WIDTH_DEX))
    well = np.clip((best_snr - _IR_SNR_SOURCE) / 10.0, 0.0, 1.0)
    p_ext = np.where(objs["pop"][owner] == _GALAXY, big * well, _IR_EXT_FALSE_RATE)
    p_ext = np.where(partner[owner] >= 0, np.maximum(p_ext, _IR_EXT_BLEND_RATE), p_ext)
    ext_flag = (aux.random(n_own) < p_ext).astype(np.int64)

    keep = np.flatnonzero(detected)
    ra_ir, dec_ir = _xyz_to_lonlat(obs_xyz[keep])
    ir_name = _ir_identifiers(ra_ir, dec_ir)
    order = np.argsort(ir_name, kind="stable")
    keep, ra_ir, dec_ir, ir_name = keep[order], ra_ir[order], dec_ir[order], ir_name[order]
    columns = {"ir_name": ir_name, "ra_ir": ra_ir, "dec_ir": dec_ir,
               "pos_unc": pos_unc_arcsec[keep]}
    for j, band in enumerate(_IR_BANDS):
        columns[band] = ir_mag[keep, j]
        columns[band + "_unc"] = ir_unc[keep, j]
    columns["qual_bits"] = qual_bits[keep].astype(np.int64)
    columns["ext_flag"] = ext_flag[keep]
    return {"columns": columns, "obj": owner[keep], "m46_true": ir_true[keep, 1],
            "xyz_true": ir_xyz[keep]}


def _observe_astrometric(rng, aux, objs):
    """The astrometric catalogue: magnitude-dependent astrometric and photometric noise.

    Parallax and proper-motion noise is drawn with the full 3 x 3 correlation matrix the catalogue
    states (``plx_mu_a_corr``, ``plx_mu_d_corr``, ``mu_corr``), positions with independent
    per-axis errors.  ``aux`` draws what was added later (the parallax–motion correlations and the
    extent noise), leaving ``rng``'s sequence as it was.

    Returns
    -------
    dict
        ``columns`` (raw catalogue columns, ordered by patch, declination zone and RA, which is
        also the order of ``srcid``) and ``obj`` (index of the object per row).
    """
    obj = np.flatnonzero(objs["optical"])
    n = len(obj)
    broad_true = objs["broad"][obj]
    # Faint sources scatter more in the fit-quality indicator.
    fit_excess = objs["fit_excess"][obj] * np.exp(
        (0.04 + 0.02 * np.clip((broad_true - 17.0) / 4.0, 0.0, 1.0))
        * np.abs(rng.standard_normal(n)))
    # A poor fit inflates the formal errors, as a real solution would.
    plx_unc = (_parallax_error_mas(broad_true) * fit_excess
               * 10 ** (0.08 * rng.standard_normal(n)))
    mu_a_unc = 1.10 * plx_unc * 10 ** (0.03 * rng.standard_normal(n))
    mu_d_unc = 0.95 * plx_unc * 10 ** (0.03 * rng.standard_normal(n))
    alpha_unc = 0.85 * plx_unc
    delta_unc = 0.75 * plx_unc
    corr_mean = np.array([p.mu_corr_mean for p in _PATCHES])[objs["patch"][obj]]
    mu_corr = np.clip(corr_mean + 0.12 * rng.standard_normal(n), -0.9, 0.9)
    # Small parallax–motion correlations of the invented scanning law (|r| <= 0.2); with
    # |mu_corr| <= 0.9 the 3 x 3 matrix stays positive definite (determinant >= 0.038).
    plx_mu_a_corr = np.clip(0.08 * aux.standard_normal(n), -0.2, 0.2)
    plx_mu_d_corr = np.clip(0.08 * aux.standard_normal(n), -0.2, 0.2)
    e = rng.standard_normal((n, 5))
    # Cholesky factor of [[1, a, b], [a, 1, c], [b, c, 1]] (plx, mu_a, mu_d) applied row by row;
    # with a = b = 0 this is the plain two-component pmra–pmdec draw.
    a, b, c = plx_mu_a_corr, plx_mu_d_corr, mu_corr
    l22 = np.sqrt(1.0 - a**2)
    l32 = (c - a * b) / l22
    l33 = np.sqrt(1.0 - b**2 - l32**2)
    plx = objs["parallax"][obj] + plx_unc * e[:, 0]
    mu_a = objs["pmra"][obj] + mu_a_unc * (a * e[:, 0] + l22 * e[:, 1])
    mu_d = objs["pmdec"][obj] + mu_d_unc * (b * e[:, 0] + l32 * e[:, 1] + l33 * e[:, 2])
    obs_xyz = _offset(objs["xyz"][obj], alpha_unc * e[:, 3] * _MAS_TO_RAD,
                      delta_unc * e[:, 4] * _MAS_TO_RAD)
    alpha, delta = _xyz_to_lonlat(obs_xyz)
    columns = {
        "srcid": None, "alpha": alpha, "delta": delta, "alpha_unc": alpha_unc,
        "delta_unc": delta_unc, "plx": plx, "plx_unc": plx_unc, "mu_a": mu_a, "mu_d": mu_d,
        "mu_a_unc": mu_a_unc, "mu_d_unc": mu_d_unc, "mu_corr": mu_corr,
        "plx_mu_a_corr": plx_mu_a_corr, "plx_mu_d_corr": plx_mu_d_corr,
    }
    # Photometric errors: about 1 mmag at 19 in the broad band and ten times more in the narrower
    # blue and red bands (common practice for space photometry).
    for band, floor, coeff in (("broad", 0.0003, 0.0004), ("blue", 0.001, 0.003),
                               ("red", 0.001, 0.003)):
        true = objs[band][obj]
        unc = np.hypot(floor, coeff * 10 ** (0.4 * (true - 17.0)))
        obs = true + unc * rng.standard_normal(n)
        if band == "blue":
            missing = ~(true <= _BLUE_LIMIT_ABMAG)
            obs, unc = np.where(missing, np.nan, obs), np.where(missing, np.nan, unc)
        columns["mag_" + band], columns["mag_" + band + "_unc"] = obs, unc
    columns["fit_excess"] = fit_excess
    # Extent: the point-source-fit magnitude is fainter than the aperture magnitude by the light
    # a point-source profile misses; measurement noise grows with faintness.
    ext_unc = np.hypot(_EXT_FLOOR_MAG, _EXT_COEFF_MAG * 10 ** (0.4 * (broad_true - 20.0)))
    columns["ext_excess"] = objs["ext_true"][obj] + ext_unc * aux.standard_normal(n)
    columns["ext_excess_unc"] = ext_unc
    # Identifiers of our own: patch number (1–6) times 10^7 plus a running number along
    # declination zones and RA inside the patch.
    patch = objs["patch"][obj]
    order = np.lexsort((alpha, np.floor(delta), patch))
    first_in_patch = np.searchsorted(patch[order], patch[order], side="left")
    columns["srcid"] = ((patch[order].astype(np.int64) + 1) * _SRCID_PATCH_STRIDE
                        + np.arange(n) - first_in_patch + 1)
    columns = {k: (v if k == "srcid" else v[order]) for k, v in columns.items()}
    return {"columns": columns, "obj": obj[order]}


#: Astrometric identifiers are ``(patch number) * 10**7 + serial`` (an invented scheme).
_SRCID_PATCH_STRIDE = 10_000_000


def _truth_columns(objs, partner, ir, astro):
    """Truth labels: one row per astrometric row, then one per infrared row."""
    n_obj = len(objs["pop"])
    opt_obj, ir_obj = astro["obj"], ir["obj"]
    ir_name = ir["columns"]["ir_name"]
    srcid_of_obj = np.full(n_obj, "", dtype=object)
    srcid_of_obj[opt_obj] = astro["columns"]["srcid"].astype(str)
    # For a blend, the infrared source is the counterpart of whichever object gives more 4.6 µm
    # flux; the other optical source has no counterpart of its own.
    other = partner[ir_obj]
    blended_ir = other >= 0
    other_brighter = objs["ir"][np.maximum(other, 0), 1] < objs["ir"][ir_obj, 1]
    dominant = np.where(blended_ir & other_brighter, other, ir_obj)
    irname_of_obj = np.full(n_obj, "", dtype=object)
    irname_of_obj[dominant] = ir_name
    blend_obj = np.zeros(n_obj, dtype=bool)
    blend_obj[ir_obj[blended_ir]] = True
    blend_obj[other[blended_ir]] = True

    is_qso = np.isin(objs["pop"], [_QUASAR, _BRIGHT_QUASAR])
    above = (is_qso
             & (objs["broad"] <= COMPLETENESS["opt_broad_abmag_max"])
             & (objs["ir"][:, 1] <= COMPLETENESS["ir_4p6_vegamag_max"]))
    true_ra, true_dec = _xyz_to_lonlat(objs["xyz"])
    obj = np.concatenate([opt_obj, dominant])
    # Luminosities of quasars only; others get NaN (their magnitudes are not a nucleus').
    dimming = np.where(is_qso, objs["dimming"], np.nan)
    absmag, lbol = _quasar_luminosity(objs["broad"] - np.nan_to_num(dimming),
                                      np.where(is_qso, objs["redshift"], 1.0))
    absmag, lbol = np.where(is_qso, absmag, np.nan), np.where(is_qso, lbol, np.nan)
    # True centre at the infrared epoch: the object's own for astrometric rows, the (blended)
    # centre the observed infrared position scatters around for infrared rows.
    ra_ir_epoch, dec_ir_epoch = _xyz_to_lonlat(np.concatenate([objs["xyz_ir"][opt_obj],
                                                               ir["xyz_true"]]))
    return {
        "catalogue": np.repeat(np.array(["astrometric", "infrared"]),
                               [len(opt_obj), len(ir_obj)]),
        "id": np.concatenate([srcid_of_obj[opt_obj], ir_name]).astype(str),
        "population": np.array(_POPULATIONS)[objs["pop"][obj]],
        "redshift": objs["redshift"][obj],
        "counterpart_id": np.concatenate([irname_of_obj[opt_obj],
                                          srcid_of_obj[dominant]]).astype(str),
        "blend": np.concatenate([blend_obj[opt_obj], blended_ir]),
        "patch": np.array([p.name for p in _PATCHES])[objs["patch"][obj]],
        "true_ra": true_ra[obj],
        "true_dec": true_dec[obj],
        "true_parallax": objs["parallax"][obj].astype(float),
        "true_pmra": objs["pmra"][obj].astype(float),
        "true_pmdec": objs["pmdec"][obj].astype(float),
        "true_mag_broad": objs["broad"][obj],
        "true_m46": np.concatenate([objs["ir"][opt_obj, 1], ir["m46_true"]]),
        "above_completeness": above[obj],
        "true_ra_ir_epoch": ra_ir_epoch,
        "true_dec_ir_epoch": dec_ir_epoch,
        "true_ext_excess": objs["ext_true"][obj],
        "true_dimming_broad": dimming[obj],
        "true_absmag_broad": absmag[obj],
        "true_lbol_erg_s": lbol[obj],
    }


def _known_columns(rng, objs, astro, scale):
    """Known objects: a random 30 % of the catalogued quasars, some stars and some galaxies."""
    opt_obj = astro["obj"]
    opt_pop = objs["pop"][opt_obj]
    is_qso = np.isin(opt_pop, [_QUASAR, _BRIGHT_QUASAR])
    known_q = opt_obj[is_qso & (rng.random(len(opt_obj)) < _KNOWN_QUASAR_FRACTION)]
    star_pool = opt_obj[(opt_pop == _STAR) & (objs["broad"][opt_obj] < 19.0)]
    n_star = min(len(star_pool), max(3, int(round(_KNOWN_STARS_AT_SCALE_1 * scale))))
    known_s = np.sort(rng.choice(star_pool, n_star, replace=False))
    gal_pool = opt_obj[opt_pop == _GALAXY]
    n_gal = min(len(gal_pool), max(1, int(round(_KNOWN_GALAXIES_AT_SCALE_1 * scale))))
    known_g = np.sort(rng.choice(gal_pool, n_gal, replace=False))
    obj = np.concatenate([known_q, known_s, known_g])
    kind = np.repeat(np.array(["quasar", "star", "galaxy"]), [len(known_q), n_star, n_gal])
    label = np.concatenate([_serial_labels("KNOWN-Q", len(known_q)),
                            _serial_labels("KNOWN-S", n_star), _serial_labels("KNOWN-G", n_gal)])
    ra_deg, dec_deg = _xyz_to_lonlat(objs["xyz"][obj])
    order = np.lexsort((label, ra_deg))
    return {"label": label[order], "ra_k": ra_deg[order], "dec_k": dec_deg[order],
            "kind": kind[order], "z": np.round(objs["redshift"][obj], 4)[order]}


_ASTRO_UNITS = {
    "alpha": "deg", "delta": "deg", "alpha_unc": "mas", "delta_unc": "mas", "plx": "mas",
    "plx_unc": "mas", "mu_a": "mas/yr", "mu_d": "mas/yr", "mu_a_unc": "mas/yr",
    "mu_d_unc": "mas/yr", "mag_broad": "mag", "mag_broad_unc": "mag", "mag_blue": "mag",
    "mag_blue_unc": "mag", "mag_red": "mag", "mag_red_unc": "mag", "ext_excess": "mag",
    "ext_excess_unc": "mag",
}
_IR_UNITS = {"ra_ir": "deg", "dec_ir": "deg", "pos_unc": "arcsec",
             **{b: "mag" for b in _IR_BANDS}, **{b + "_unc": "mag" for b in _IR_BANDS}}
_KNOWN_UNITS = {"ra_k": "deg", "dec_k": "deg"}
_TRUTH_UNITS = {"true_ra": "deg", "true_dec": "deg", "true_parallax": "mas",
                "true_pmra": "mas/yr", "true_pmdec": "mas/yr", "true_mag_broad": "mag",
                "true_m46": "mag", "true_ra_ir_epoch": "deg", "true_dec_ir_epoch": "deg",
                "true_ext_excess": "mag", "true_dimming_broad": "mag",
                "true_absmag_broad": "mag", "true_lbol_erg_s": "erg/s"}
_TABLE_META = {
    "astrometric": {"epoch_jyear": str(ASTROMETRIC_EPOCH_JYEAR), "magnitude_system": "AB",
                    "description": "invented mock astrometric catalogue"},
    "infrared": {"epoch_jyear": str(INFRARED_EPOCH_JYEAR), "magnitude_system": "Vega",
                 "description": "invented mock infrared catalogue",
                 "qual_bits": ", ".join(f"{v}={k}" for k, v in QUAL_BITS.items()),
                 "ext_flag": "1 = resolved (extended) in the infrared beam, 0 = point-like"},
    "known": {"description": "invented mock known-objects catalogue"},
    "truth": {"description": "truth labels of the invented mock sky"},
}


def _to_table(columns, units, role):
    """A pyarrow Table with a unit in each field's metadata and a description of the role."""
    fields, arrays = [], []
    for name, values in columns.items():
        values = np.asarray(values)
        if values.dtype.kind in "US":
            array = pa.array(values.astype(str).tolist(), type=pa.string())
        elif values.dtype.kind == "b":
            array = pa.array(values, type=pa.bool_())
        elif values.dtype.kind in "iu":
            array = pa.array(values.astype(np.int64), type=pa.int64())
        else:
            array = pa.array(values.astype(np.float64), type=pa.float64())
        meta = {"unit": units[name]} if name in units else None
        fields.append(pa.field(name, array.type, metadata=meta))
        arrays.append(array)
    return pa.Table.from_arrays(arrays, schema=pa.schema(fields, metadata=_TABLE_META[role]))


def write_mock_sky(sky: MockSky, out_dir) -> dict[str, pathlib.Path]:
    """Write the four tables in four different formats.

    Parameters
    ----------
    sky : MockSky
        Output of :func:`make_mock_sky`.
    out_dir : str or os.PathLike
        Directory to write into (created if missing; existing files of the same names are
        replaced).

    Returns
    -------
    dict of str to pathlib.Path
        ``"astrometric"``: a folder holding ``part-0.parquet`` and ``part-1.parquet`` (the rows
        split in two halves); ``"infrared"``: ``infrared.fits``, a FITS binary table with units;
        ``"known"``: ``known.csv``; ``"truth"``: ``truth.parquet``.

    Notes
    -----
    The Parquet files are byte-identical for identical tables.
    """
    from astropy.table import Table

    out = pathlib.Path(out_dir)
    astro_dir = out / "astrometric"
    astro_dir.mkdir(parents=True, exist_ok=True)
    half = sky.astrometric.num_rows // 2
    pq.write_table(sky.astrometric.slice(0, half), astro_dir / "part-0.parquet")
    pq.write_table(sky.astrometric.slice(half), astro_dir / "part-1.parquet")

    ir = Table()
    for field in sky.infrared.schema:
        values = sky.infrared.column(field.name).to_numpy(zero_copy_only=False)
        if pa.types.is_string(field.type):
            values = values.astype(str)
        unit = (field.metadata or {}).get(b"unit")
        ir[field.name] = values
        if unit is not None:
            ir[field.name].unit = unit.decode()
    ir.meta["EPOCH"] = INFRARED_EPOCH_JYEAR
    ir.meta["MAGSYS"] = "VEGA"
    ir_path = out / "infrared.fits"
    ir.write(ir_path, format="fits", overwrite=True)

    known_path = out / "known.csv"
    pacsv.write_csv(sky.known, known_path,
                    write_options=pacsv.WriteOptions(quoting_style="needed"))
    truth_path = out / "truth.parquet"
    pq.write_table(sky.truth, truth_path)
    return {"astrometric": astro_dir, "infrared": ir_path, "known": known_path,
            "truth": truth_path}


#: Seed and scale of the small catalogues shipped in the repository's ``demo_catalogues/`` folder.
DEMO_CATALOGUES_SEED = 2
DEMO_CATALOGUES_SCALE = 0.02

#: Files of the shipped demo catalogues, one format each, and what the config reads them as.
_DEMO_CATALOGUE_FILES = {"astrometric": "astrometric.parquet", "infrared": "infrared.csv",
                         "known": "known.ecsv", "truth": "truth.parquet"}


def _demo_catalogues_config() -> str:
    """The shipped demo configuration with file names of ``demo_catalogues/`` (paths relative)."""
    from importlib.resources import files

    text = files("selector").joinpath("configs/demo.toml").read_text(encoding="utf-8")
    replacements = [
        ('files = ["catalogues/astrometric"]', 'files = ["astrometric.parquet"]'),
        ('files = ["catalogues/infrared.fits"]', 'files = ["infrared.csv"]'),
        ('files = ["catalogues/known.csv"]', 'files = ["known.ecsv"]'),
        ('file = "catalogues/truth.parquet"', 'file = "truth.parquet"'),
    ]
    for old, new in replacements:
        # Fail loudly if demo.toml changes shape, rather than ship a config pointing nowhere.
        if text.count(old) != 1:
            raise RuntimeError(f"configs/demo.toml no longer contains {old!r} exactly once")
        text = text.replace(old, new)
    head = ("# Configuration for the small invented catalogues in this folder, written by\n"
            "# selector.demo.mocksky.write_demo_catalogues (do not edit by hand: regenerate).\n"
            "# Use it from this folder: `selector ingest --config config.toml`, then `selector run`.\n")
    return head + text


def write_demo_catalogues(folder, seed: int = DEMO_CATALOGUES_SEED,
                          scale: float = DEMO_CATALOGUES_SCALE) -> dict[str, pathlib.Path]:
    """Write small invented catalogues in three formats, their truth, and a config beside them.

    Parameters
    ----------
    folder : str or os.PathLike
        Directory to write into (created if missing; files of the same names are replaced).
    seed, scale : int, float
        Passed to :func:`make_mock_sky`; the defaults give the repository's ``demo_catalogues/``
        (a few thousand rows per catalogue).

    Returns
    -------
    dict of str to pathlib.Path
        ``"astrometric"``: ``astrometric.parquet`` (units in the field metadata);
        ``"infrared"``: ``infrared.csv`` (units in ``config.toml`` and the folder's README);
        ``"known"``: ``known.ecsv`` (units in the header); ``"truth"``: ``truth.parquet``;
        ``"config"``: ``config.toml`` (``output_dir = "output"``, relative to the folder).
    """
    from astropy.table import Table

    sky = make_mock_sky(seed=seed, scale=scale)
    out = pathlib.Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    paths = {name: out / file for name, file in _DEMO_CATALOGUE_FILES.items()}
    pq.write_table(sky.astrometric, paths["astrometric"])
    pacsv.write_csv(sky.infrared, paths["infrared"],
                    write_options=pacsv.WriteOptions(quoting_style="needed"))
    known = Table()
    for field in sky.known.schema:
        values = sky.known.column(field.name).to_numpy(zero_copy_only=False)
        known[field.name] = values.astype(str) if pa.types.is_string(field.type) else values
        unit = (field.metadata or {}).get(b"unit")
        if unit is not None:
            known[field.name].unit = unit.decode()
    known.meta["description"] = _TABLE_META["known"]["description"]
    known.write(paths["known"], format="ascii.ecsv", overwrite=True)
    pq.write_table(sky.truth, paths["truth"])
    paths["config"] = out / "config.toml"
    paths["config"].write_text(_demo_catalogues_config(), encoding="utf-8")
    return paths


# ----------------------------------------------------------------------------------------------
# the `selector demo` command: mock sky → ingest → run → comparison with the truth
# ----------------------------------------------------------------------------------------------

#: Edges of the optical broad-band magnitude bins in which the demo reports quasar recovery (from
#: the catalogue's bright limit, so the nearby very luminous quasars at 13–14.5 are counted too).
RECOVERY_BINS_ABMAG = (12.0, 16.0, 17.0, 18.0, 19.0, 20.0, 21.0)


def write_demo_config(out_dir) -> pathlib.Path:
    """Copy the shipped demo configuration beside the mock catalogues (``<out_dir>/demo.toml``)."""
    from importlib.resources import files

    text = files("selector").joinpath("configs/demo.toml").read_text(encoding="utf-8")
    path = pathlib.Path(out_dir) / "demo.toml"
    path.write_text(text, encoding="utf-8")
    return path


def evaluate_run(cfg, truth_path) -> "object":
    """Completeness and contamination of a finished run against the mock truth."""

    def whole(kind):
        lay = layout_of(cfg)
        parts = [read_parquet(lay.tile_file(kind, cfg.tiling.order, t))
                 for t in lay.list_tiles(kind, cfg.tiling.order)]
        return pa.concat_tables(parts)

    candidates = read_parquet(layout_of(cfg).candidates, columns=["astro_id"])
    return compare(candidates.column("astro_id"), pq.read_table(truth_path), whole("astrometric"),
                   whole("infrared"), COMPLETENESS, magnitude_column="opt_broad_abmag", bins=RECOVERY_BINS_ABMAG)


#: Share of the ranked list the planted very bright quasars should reach (the acceptance line of the
#: luminosity ranking on the mock sky).
LUMINOUS_TOP_FRACTION = 0.01


def luminous_ranking(cfg, truth_path) -> list[str]:
    """Where the planted very bright quasars land in the ranked list, and the photometric redshifts'
    figures on the candidates that are true quasars (figures of the invented sky only)."""
    cands = read_parquet(layout_of(cfg).candidates)
    truth = pq.read_table(truth_path).to_pandas()
    truth = truth[truth["catalogue"] == "astrometric"].set_index("id")
    ids = np.asarray(cands.column("astro_id").to_pylist()).astype(str)
    pop = truth["population"].reindex(ids).to_numpy(dtype=object)
    z_true = truth["redshift"].reindex(ids).to_numpy(dtype=float)
    n = cands.num_rows
    top = max(1, int(math.ceil(LUMINOUS_TOP_FRACTION * n)))
    lines = []
    if "z_phot" in cands.column_names:
        qso = np.isin(pop, ["quasar", "bright_quasar"])
        f = redshift_figures(z_true[qso], cands.column("z_phot").to_numpy(zero_copy_only=False)[qso])
        lines.append(f"photometric redshifts of the {f['rows']:,d} candidates that are mock quasars: sigma_NMAD = "
                     f"{f['sigma_nmad']:.3f}, outliers (|dz|/(1+z) > 0.15) {f['outlier_fraction']:.1%} (not held "
                     "out: the demo's labels are the mock's truth, which includes them; `selector train` printed "
                     "the held-out figures above)")
    bright = truth.index[truth["population"] == "bright_quasar"]
    rank = dict(zip(ids, cands.column("rank").to_pylist()))
    lbol = dict(zip(ids, cands.column("lbol_erg_s").to_pylist())) if "lbol_erg_s" in cands.column_names else {}
    in_list = [b for b in bright if b in rank]
    in_top = [b for b in in_list if rank[b] <= top]
    lines.append(f"very bright mock quasars: {len(bright)} in the astrometric catalogue, {len(in_list)} in the list of "
                 f"{n:,d} candidates, {len(in_top)} of those in its top {LUMINOUS_TOP_FRACTION:.0%} (rank <= {top})")
    for b in sorted(in_list, key=lambda b: rank[b]):
        lines.append(f"  {b}: rank {rank[b]:,d}, true z {truth.at[b, 'redshift']:.2f}, true L_bol "
                     f"{truth.at[b, 'true_lbol_erg_s']:.2e} erg/s, estimated {lbol.get(b, float('nan')):.2e} erg/s")
    return lines


def run_demo(out_dir, seed: int = 1, scale: float = 1.0, workers=None, log=print):
    """Write the mock sky and its config into ``out_dir``, ingest, run, score against the truth, train
    the classifier and the photometric-redshift model and run again ranked by expected luminosity,
    then make the follow-up list for the demo site and the HTML report."""

    out = pathlib.Path(out_dir)
    log(f"writing an invented mock sky (seed {seed}, scale {scale}) to {out / 'catalogues'}")
    paths = write_mock_sky(make_mock_sky(seed=seed, scale=scale), out / "catalogues")
    cfg = load_config(write_demo_config(out))
    log(f"configuration: {out / 'demo.toml'}")
    ingest(cfg, log=log)
    result = run(cfg, workers=workers, log=log)
    report = evaluate_run(cfg, paths["truth"])
    log("")
    log("against the mock truth (figures for this invented sky only):")
    log(report.as_text("optical broad-band AB magnitude"))
    log("")
    log("training the classifier and the photometric-redshift model on the mock's labels (`selector train`):")
    try:
        trained = train(cfg, log=log)
        trained.outputs.plots = write_training_plots(trained.evaluation, classifier_dir(cfg))
    except SelectorError as exc:
        log(f"no model ({exc}); the list stays ranked by the criteria score")
        trained = None
    if trained is not None and trained.redshift is not None:
        data = plain(cfg)
        data["classifier"]["model"] = str(trained.outputs.model)
        data["ranking"]["order"] = "expected_luminosity"
        cfg = from_dict(data, base_dir=cfg.base_dir)
        log("")
        log("running again with the model, ranked by expected luminosity P(quasar) x L_bol:")
        result = run(cfg, workers=workers, log=log)
        report = evaluate_run(cfg, paths["truth"])
        log("")
        log("against the mock truth (figures for this invented sky only):")
        log(report.as_text("optical broad-band AB magnitude"))
        for line in luminous_ranking(cfg, paths["truth"]):
            log(line)
        log(f"(to do the same: set classifier.model = \"{trained.outputs.model}\" and ranking.order = "
            "\"expected_luminosity\" in the configuration)")
    log("")
    targets = make_targets(cfg, log=log)
    page = write_report(cfg)
    log("")
    log(f"ranked candidates: {result.outputs['ecsv']} (also .csv and .parquet)")
    log(f"per-tile feature cache and cut-flow: {layout_of(cfg).run_tiles_dir}")
    log(f"follow-up list for the demo site: {targets.outputs.get('ecsv', targets_dir(cfg))}")
    log(f"report: {page}")
    log("next: `selector tune --config {0} --set motion.parallax_snr_max=4`, or `selector train --config {0}` "
        "and set classifier.model (and ranking.order) yourself".format(out / "demo.toml"))
    return result, report
