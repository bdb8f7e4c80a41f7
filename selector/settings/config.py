"""Typed, validated configuration read from TOML.

Every key is declared here once, with its type, allowed values and a one-line description;
``configs/default.toml`` documents the same keys for users (a test keeps the two in step). The whole
file is validated before any work starts: an unknown key is refused with the nearest valid key, a
wrong type or out-of-range value names the key, the value and what is allowed.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import posixpath
import re
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Optional

import astropy.units as u

from selector.core import blackhole, luminosity, schema
from selector.core.photometry import CRITERIA
from selector.core.tiles import max_margin_arcsec
from selector.settings.validate import build, convert, setting, suggest, to_plain
from selector.errors import ConfigError

_BAND_NAME = re.compile(r"^[a-z][a-z0-9]{0,15}$")
FORMATS = ("auto", "parquet", "fits", "csv", "ecsv", "votable")
#: Zero-motion tests of ``[motion] test``.
MOTION_TESTS = ("joint", "separate")
# Flux-density inputs are accepted for magnitudes and turned into AB magnitudes.
_FLUX = u.Jy


@dataclass(frozen=True)
class ColumnSpec:
    """Where a role lives in the user's file, and in what unit."""

    column: str = setting(doc="the column name in the input file")
    unit: Optional[str] = setting(None, doc="astropy unit string; default: the file's own unit, else the role's canonical unit")
    null_values: list[float] = setting(default_factory=tuple, doc="values that mean 'missing' in this column, e.g. [-999.0]")

    @classmethod
    def _from_config(cls, value, where):
        if isinstance(value, str):
            value = {"column": value}
        if not isinstance(value, dict):
            raise ConfigError(f"{where} must be a column name or a table {{column = \"...\", unit = \"...\"}}, got {value!r}")
        return build(cls, value, where)


@dataclass(frozen=True)
class MagnitudeSpec:
    """One photometric band of a catalogue."""

    band: str = setting(doc="band label: 3.4, 4.6, 12 or 22 (micron) for infrared; a short lower-case name for optical bands")
    column: str = setting(doc="column of the magnitude (or flux density)")
    error_column: Optional[str] = setting(None, doc="column of its uncertainty")
    unit: str = setting("mag", doc="'mag' or a flux-density unit such as 'mJy' (converted to AB magnitudes)")
    system: str = setting("vega", choices=("vega", "ab"), doc="magnitude system of the column")
    vega_to_ab_mag: Optional[float] = setting(None, doc="AB − Vega offset of an optical band given in Vega (required then)")
    null_values: list[float] = setting(default_factory=tuple, doc="values meaning 'not measured' in the magnitude and error columns, e.g. [99.0]")
    wavelength_angstrom: Optional[float] = setting(None, min=100.0, max=1.0e7,
                                                   doc="effective wavelength of an optical band (Å), so luminosities "
                                                       "can use it; infrared bands know theirs from the label")

    @classmethod
    def _from_config(cls, value, where):
        # "AB", "Vega", "ab": a magnitude system is a name, not a spelling
        if isinstance(value, dict) and isinstance(value.get("system"), str):
            value = {**value, "system": value["system"].strip().lower()}
        if not isinstance(value, dict):
            raise ConfigError(f"{where} has the wrong type; expected a table, got {value!r}")
        return build(cls, value, where)

    def _check(self, where):
        _parse_unit(self.unit, f"{where}.unit")
        unit = u.Unit(self.unit)
        if unit != u.mag and not unit.is_equivalent(_FLUX):
            raise ConfigError(f"{where}.unit = {self.unit!r} is neither 'mag' nor a flux density (e.g. 'Jy', 'mJy', 'uJy')")


@dataclass(frozen=True)
class CatalogueConfig:
    """An input catalogue: files, format, epoch and the mapping of roles onto columns."""

    files: list[str] = setting(doc="files, folders or glob patterns, relative to the config file")
    columns: dict[str, ColumnSpec] = setting(doc="role = column name, or role = {column, unit}")
    format: str = setting("auto", choices=FORMATS, doc="input format; auto guesses from the file ending")
    epoch_jyear: Optional[float] = setting(None, min=1900.0, max=2200.0, doc="reference epoch of the positions, Julian years")
    magnitudes: list[MagnitudeSpec] = setting(default_factory=tuple, doc="photometric bands")
    chunk_rows: int = setting(1_000_000, min=1_000, max=100_000_000, doc="rows read at a time from chunkable formats")
    position_floor_arcsec: Optional[float] = setting(None, min=0.0, max=60.0,
                                                     doc="systematic positional error added in quadrature on each axis")
    position_error_inflation: float = setting(1.0, min=0.0, min_exclusive=True, max=100.0,
                                              doc="factor applied to the catalogue's positional errors")

    @classmethod
    def _from_config(cls, value, where):
        if isinstance(value, dict) and isinstance(value.get("files"), str):
            value = {**value, "files": [value["files"]]}
        if not isinstance(value, dict):
            raise ConfigError(f"[{where}] must be a table")
        return build(cls, value, where)


def inside_output(value: str, where: str) -> None:
    """Refuse a path meant to lie below ``project.output_dir`` that is absolute or climbs out of it."""
    norm = posixpath.normpath(str(value).replace("\\", "/"))
    if not str(value).strip() or norm in (".", "") or norm.startswith("../") or norm == ".." or posixpath.isabs(norm) \
            or Path(str(value)).expanduser().is_absolute():
        raise ConfigError(f"{where} = {value!r} must name a place inside project.output_dir (a relative path without "
                          "'..' that leaves it); write e.g. \"targets\"")


def _parse_unit(text, where):
    try:
        return u.Unit(text)
    except (ValueError, TypeError) as exc:
        raise ConfigError(f"{where} = {text!r} is not a unit astropy understands ({exc})") from None


def check_catalogue(cat: CatalogueConfig, kind: str) -> None:
    """Check a catalogue's mapping against the roles of its kind (astrometric, infrared, known)."""
    roles = {r.role: r for r in schema.ROLES[kind]}
    for name, spec in cat.columns.items():
        if name not in roles:
            raise ConfigError(f"unknown role '{kind}.columns.{name}'{suggest(name, roles)}")
        r = roles[name]
        if spec.unit is not None:
            unit = _parse_unit(spec.unit, f"{kind}.columns.{name}.unit")
            target = u.Unit(r.unit) if r.unit else u.dimensionless_unscaled
            if r.kind in ("id", "text", "flag"):
                raise ConfigError(f"{kind}.columns.{name} is {r.doc}; it takes no unit (got {spec.unit!r})")
            if not unit.is_equivalent(target):
                raise ConfigError(
                    f"{kind}.columns.{name}.unit = {spec.unit!r} cannot be converted to {r.unit or 'a plain number'}"
                )
    missing = [r.role for r in schema.ROLES[kind] if r.required and r.role not in cat.columns]
    if missing:
        raise ConfigError(f"[{kind}.columns] is missing the required role '{missing[0]}' ({roles[missing[0]].doc})")
    if kind in ("astrometric", "infrared") and cat.epoch_jyear is None:
        raise ConfigError(f"[{kind}] needs epoch_jyear, the reference epoch of its positions in Julian years")
    seen = set()
    for i, m in enumerate(cat.magnitudes):
        where = f"{kind}.magnitudes[{i}]"
        if m.band in seen:
            raise ConfigError(f"{where}.band = {m.band!r} is given twice")
        seen.add(m.band)
        if kind == "infrared":
            if m.band not in schema.INFRARED_BANDS:
                raise ConfigError(f"{where}.band = {m.band!r} is not an infrared band; choose one of "
                                  f"{', '.join(schema.INFRARED_BANDS)}{suggest(m.band, schema.INFRARED_BANDS)}")
        elif kind == "astrometric":
            if not _BAND_NAME.match(m.band):
                raise ConfigError(f"{where}.band = {m.band!r} must be a short lower-case name (letters and digits)")
            if m.system == "vega" and m.vega_to_ab_mag is None and u.Unit(m.unit) == u.mag:
                raise ConfigError(f"{where} is in the Vega system: give vega_to_ab_mag, the band's AB − Vega offset")
        else:
            raise ConfigError(f"[{kind}] takes no magnitudes")
    if kind == "infrared" and not cat.magnitudes:
        raise ConfigError("[infrared] needs at least one entry in [[infrared.magnitudes]]")


@dataclass(frozen=True)
class ProjectConfig:
    output_dir: str = setting("selector-output", doc="where tiles, runs and lists are written, relative to the config file")
    seed: int = setting(20261201, min=0, doc="seed for everything random (training folds, sampling)")


@dataclass(frozen=True)
class TilingConfig:
    order: int = setting(5, min=0, max=12, doc="HEALPix order of the tiles (Nside = 2**order), nested scheme")


#: Cross-match methods: the probabilistic match of Budavári & Szalay (2008), or the plain nearest
#: infrared source within the radius (kept for comparison).
MATCH_METHODS = ("probabilistic", "nearest")


@dataclass(frozen=True)
class MatchConfig:
    radius_arcsec: float = setting(4.0, min=0.0, min_exclusive=True, max=600.0,
                                   doc="largest search radius (the probabilistic match searches n_sigma combined "
                                       "sigmas, never more than this; the nearest match uses it as its radius)")
    max_proper_motion_mas_yr: float = setting(
        10_000.0, min=0.0, doc="largest proper motion the tile margins must allow for")
    method: str = setting("probabilistic", choices=MATCH_METHODS, doc="probabilistic (Bayes factor, local prior, "
                                                                      "one-to-one) or nearest")
    n_sigma: float = setting(5.0, min=1.0, max=20.0, doc="search radius of a pair in its combined standard deviations")
    expected_completeness: float = setting(0.5, min=0.0, min_exclusive=True, max=1.0,
                                           doc="fraction of astrometric sources expected to have an infrared "
                                               "counterpart (sets the prior)")
    ambiguity_ratio: float = setting(0.5, min=0.0, max=1.0,
                                     doc="flag a match ambiguous when its runner-up has more than this fraction of "
                                         "its probability")
    chance_shift_arcsec: float = setting(180.0, min=10.0, max=1800.0,
                                         doc="shift of the astrometric positions for the chance-match estimate")
    chance_shifts: int = setting(4, min=0, max=16, doc="shifted copies (position angles spread evenly), each moving "
                                                       "every n-th source; 0 = no chance-match estimate")


@dataclass(frozen=True)
class MotionConfig:
    parallax_zero_point_mas: float = setting(-0.017, min=-1.0, max=1.0, doc="parallax zero-point subtracted before testing")
    test: str = setting("joint", choices=MOTION_TESTS,
                        doc="'joint': parallax and proper motion as one χ² (3 dof, full covariance, one-sided in "
                            "parallax); 'separate': a parallax cut and a proper-motion cut")
    joint_pvalue_min: float = setting(0.0027, min=0.0, max=1.0,
                                      doc="with test = 'joint': keep sources whose zero-motion p-value ≥ this")
    parallax_snr_max: float = setting(3.0, min=0.0, min_exclusive=True,
                                      doc="with test = 'separate': keep (parallax − zero-point) / error ≤ this (one-sided)")
    pm_pvalue_min: float = setting(0.001, min=0.0, max=1.0,
                                   doc="with test = 'separate': keep sources whose zero-proper-motion chi² p-value ≥ this")
    error_inflation: float = setting(1.0, min=0.0, min_exclusive=True, max=100.0, doc="factor applied to all astrometric errors")
    require_solution: bool = setting(True, doc="remove sources without a parallax and proper motion (true) or let them pass (false)")
    fit_quality_max: Optional[float] = setting(None, min=0.0, doc="keep fit_quality ≤ this (needs the fit_quality role)")


@dataclass(frozen=True)
class QualityConfig:
    """Cuts on how trustworthy a source's measurements are: its match, its shape, its parallax."""

    match_probability_min: float = setting(0.8, min=0.0, max=1.0,
                                           doc="keep pairs whose match probability ≥ this (a no-op when the "
                                               "match gives none, e.g. match.method = 'nearest')")
    extent_max_mag: Optional[float] = setting(0.145, doc="keep sources whose astrometric extent ≤ this, in mag "
                                                       "(needs the extent role; a no-op without it)")
    extent_snr_max: Optional[float] = setting(None, min=0.0, min_exclusive=True,
                                              doc="also keep only extent / extent_error ≤ this (needs extent_error)")
    reject_extended_flags: bool = setting(True, doc="remove sources flagged extended in either catalogue "
                                                    "(the extended_flag roles; a no-op without them)")
    negative_parallax_snr_max: Optional[float] = setting(5.0, min=0.0, min_exclusive=True,
                                                         doc="remove (parallax − zero-point) / error < −this: a "
                                                             "sign of a bad astrometric solution")


@dataclass(frozen=True)
class LinearCutSpec:
    name: str = setting(doc="a label for the cut-flow")
    y: list[str] = setting(doc="[band] for a magnitude or [band_a, band_b] for the colour a − b")
    x: list[str] = setting(doc="the same, for the horizontal axis")
    slope: float = setting(doc="slope of the boundary line y = slope·x + intercept")
    intercept: float = setting(doc="intercept of the boundary line")
    side: str = setting("above", choices=("above", "below"), doc="keep points above (y ≥ line) or below it")


@dataclass(frozen=True)
class OpticalInfraredCut:
    optical_band: str = setting(doc="an optical band label from [[astrometric.magnitudes]]")
    infrared_band: str = setting(doc="an infrared band label, e.g. 3.4")
    min_mag: Optional[float] = setting(None, doc="keep optical − infrared (both AB) ≥ this")
    max_mag: Optional[float] = setting(None, doc="keep optical − infrared (both AB) ≤ this")


@dataclass(frozen=True)
class ColourConfig:
    criteria: list[str] = setting(default_factory=lambda: ("stern2012",), doc="published infrared criteria by name")
    combine: str = setting("any", choices=("any", "all"), doc="a source passes when any (or all) criteria pass")
    linear_cuts: list[LinearCutSpec] = setting(default_factory=tuple, doc="user cuts, all of which must pass")
    optical_infrared: Optional[OpticalInfraredCut] = setting(None, doc="optional optical − infrared colour cut")
    galactic_latitude_min_deg: Optional[float] = setting(None, min=0.0, max=90.0, doc="keep |b| ≥ this")


#: Orders of the ranked list (``ranking.order``); the luminosity orders need a model with a redshift part.
RANKING_ORDERS = ("probability", "luminosity", "expected_luminosity")


@dataclass(frozen=True)
class RankingConfig:
    brightness_band: str = setting("4.6", doc="infrared band whose brightness raises the score")
    brightness_pivot_mag: float = setting(15.0, doc="magnitude at which the brightness term is zero")
    brightness_weight: float = setting(0.1, min=0.0, doc="score per magnitude brighter than the pivot")
    order: str = setting("probability", choices=RANKING_ORDERS,
                         doc="order of the ranked list: probability (P(quasar), else the criteria score), "
                             "luminosity (L_bol) or expected_luminosity (P(quasar) × L_bol)")


#: Classes a label can name (brown dwarfs are counted as stars); "other" is everything that is not a
#: quasar when the labels say no more. A model learns the ones its labels hold in enough numbers.
CLASSIFIER_CLASSES = ("quasar", "star", "galaxy", "other")


def _default_class_map() -> dict[str, str]:
    return {"agn": "quasar", "brown_dwarf": "star", "galaxy": "galaxy", "qso": "quasar", "quasar": "quasar",
            "star": "star"}


@dataclass(frozen=True)
class LabelsFileConfig:
    """A labelled file for training, matched to the feature cache by identifier or by position."""

    file: str = setting(doc="labelled file (Parquet, FITS, CSV, ECSV or VOTable), relative to the config file")
    class_column: str = setting(doc="column holding the class as text (mapped through classifier.class_map)")
    format: str = setting("auto", choices=FORMATS, doc="input format; auto guesses from the file ending")
    id_column: Optional[str] = setting(None, doc="column matched against the astrometric identifier (as text)")
    ra_column: Optional[str] = setting(None, doc="right ascension column (deg, ICRS), to match by position instead")
    dec_column: Optional[str] = setting(None, doc="declination column (deg, ICRS), to match by position instead")
    redshift_column: Optional[str] = setting(None, doc="spectroscopic redshift column, for the photometric-redshift "
                                                      "model (quasars only; empty or non-positive values are skipped)")

    def _check(self, where):
        if self.id_column is None and (self.ra_column is None or self.dec_column is None):
            raise ConfigError(f"{where} needs id_column, or ra_column and dec_column, to match its rows to sources")
        if self.id_column is not None and (self.ra_column is not None or self.dec_column is not None):
            raise ConfigError(f"{where}: give id_column or ra_column/dec_column, not both")


@dataclass(frozen=True)
class SkyPriorBinsConfig:
    """Magnitude bins in which the sky's class proportions are estimated separately."""

    band: str = setting("4.6", doc="binning band: an infrared label (Vega mag) or opt_<band> (AB mag)")
    edges_mag: list[float] = setting(default_factory=lambda: (13.0, 14.0, 15.0, 16.0),
                                     doc="increasing bin edges (mag); open bins below the first and above the last")
    min_rows: int = setting(500, min=1, doc="a bin with fewer scored rows uses the estimate over all rows")

    def _check(self, where):
        edges = list(self.edges_mag)
        if not edges or any(b <= a for a, b in zip(edges, edges[1:])):
            raise ConfigError(f"{where}.edges_mag = {edges} must be a non-empty, strictly increasing list of magnitudes")


@dataclass(frozen=True)
class ClassifierConfig:
    model: Optional[str] = setting(None, doc="model file written by `selector train`, relative to the config file")
    threshold: float = setting(0.5, min=0.0, max=1.0, doc="keep candidates with P(quasar) on the sky ≥ this when a "
                                                          "model is set")
    require_colour_criteria: bool = setting(False, doc="with a model, still require [colours] criteria (true) or let "
                                                       "P(quasar) decide, the criteria kept as reference columns (false)")
    labels: Optional[LabelsFileConfig] = setting(None, doc="a labelled file for training")
    use_known: bool = setting(True, doc="also label training sources from the ingested [known] catalogue")
    known_radius_arcsec: float = setting(1.0, min=0.0, min_exclusive=True, max=60.0,
                                         doc="match radius of known objects and positional labels")
    class_map: dict[str, str] = setting(default_factory=_default_class_map, choices=CLASSIFIER_CLASSES,
                                        doc="label text (case-insensitive) → quasar, star, galaxy or other; others "
                                            "dropped")
    min_class_labels: int = setting(50, min=2, doc="a class with fewer usable labels is merged into 'other' or "
                                                   "dropped (quasar: an error)")
    sky_priors: Optional[dict[str, float]] = setting(None, min=0.0, doc="class → proportion on the sky among the "
                                                     "scored sources; default: estimated by EM at training")
    sky_prior_bins: Optional[SkyPriorBinsConfig] = setting(None, doc="estimate the sky proportions per magnitude bin")
    novelty_neighbours: int = setting(5, min=1, max=100, doc="neighbour rank of the distance from the labelled set")
    novelty_quantile: float = setting(0.99, min=0.5, max=0.9999,
                                      doc="beyond_training: distance above this quantile of the labelled rows' own")
    folds: int = setting(5, min=2, max=20, doc="cross-validation folds, grouped by sky region")
    group_order: int = setting(3, min=0, max=12, doc="HEALPix order of the sky regions grouping the folds "
                                                     "(the coarser of this and tiling.order is used)")
    class_weight: str = setting("balanced", choices=("balanced", "none"), doc="weight classes inversely to their size")
    calibration: str = setting("logistic", choices=("logistic", "beta"),
                               doc="strictly increasing probability calibration, cross-fitted")
    max_iter: int = setting(200, min=1, max=5000, doc="boosting iterations")
    learning_rate: float = setting(0.1, min=0.0, min_exclusive=True, max=1.0, doc="boosting learning rate")
    max_leaf_nodes: int = setting(31, min=2, max=1024, doc="leaves per tree")
    min_samples_leaf: int = setting(20, min=1, doc="smallest number of training rows in a leaf")
    l2_regularization: float = setting(0.0, min=0.0, doc="L2 penalty on leaf values")
    permutation_repeats: int = setting(3, min=1, max=100, doc="shuffles per feature for permutation importances")
    threads: int = setting(1, min=0, max=1024, doc="threads for training; 0 means one per core")
    redshift_labels_min: int = setting(100, min=10, doc="fewest labelled quasars with a redshift for `selector train` "
                                                        "to fit the photometric-redshift model (fewer: no model, "
                                                        "no luminosities)")
    output_folder: str = setting("model", doc="folder below project.output_dir for the model, card and evaluation")

    def _check(self, where):
        inside_output(self.output_folder, f"{where}.output_folder")
        for key in self.class_map:
            if not key.strip():
                raise ConfigError(f"{where}.class_map has an empty label; give the class text as it appears in the data")
        if self.sky_priors is not None:
            bad = [k for k in self.sky_priors if k not in CLASSIFIER_CLASSES]
            if bad:
                raise ConfigError(f"{where}.sky_priors names the class {bad[0]!r}; classes are "
                                  f"{', '.join(CLASSIFIER_CLASSES)}{suggest(bad[0], CLASSIFIER_CLASSES)}")
            if not self.sky_priors.get("quasar", 0.0) > 0:
                raise ConfigError(f"{where}.sky_priors needs a positive quasar proportion, got "
                                  f"{self.sky_priors.get('quasar')!r}")
            if self.sky_prior_bins is not None:
                raise ConfigError(f"{where}: give sky_priors (fixed proportions) or sky_prior_bins (estimated per "
                                  "magnitude bin), not both")


@dataclass(frozen=True)
class RunConfig:
    workers: int = setting(0, min=0, max=1024, doc="worker processes; 0 means one per core")
    executor: str = setting("local", choices=("local", "dask"), doc="local processes or a Dask cluster")
    scheduler: Optional[str] = setting(None, doc="Dask scheduler address; a local cluster when absent")
    progress_interval_s: float = setting(30.0, min=0.1, max=86400.0,
                                         doc="seconds between progress lines when the output is not a terminal")
    merge_incomplete: bool = setting(True, doc="when tiles fail, merge the finished ones (marked incomplete) "
                                               "instead of leaving the previous merged outputs")


@dataclass(frozen=True)
class SiteConfig:
    """The observing site, as geodetic coordinates on the WGS84 ellipsoid."""

    latitude_deg: float = setting(min=-90.0, max=90.0, doc="geodetic latitude, north positive")
    longitude_deg: float = setting(min=-180.0, max=180.0, doc="longitude, east positive")
    height_m: float = setting(0.0, min=-500.0, max=9000.0, doc="height above the ellipsoid")
    name: str = setting("site", doc="a label for the site, printed in the summary")


@dataclass(frozen=True)
class PriorityConfig:
    """Limits of priority classes 1 and 2; every other observable target is class 3."""

    band: str = setting("4.6", doc="brightness band: an infrared label (Vega mag) or opt_<band> (AB mag)")
    class1_score_top_fraction: float = setting(0.2, min=0.0, min_exclusive=True, max=1.0,
                                               doc="class 1 needs a score among this top fraction of the listed targets")
    class1_mag_max: float = setting(14.5, doc="class 1 needs the band's magnitude ≤ this")
    class1_hours_min: float = setting(3.0, min=0.0, doc="class 1 needs at least this many observable dark hours")
    class2_score_top_fraction: float = setting(0.6, min=0.0, min_exclusive=True, max=1.0,
                                               doc="class 2 needs a score among this top fraction")
    class2_mag_max: float = setting(15.5, doc="class 2 needs the band's magnitude ≤ this")
    class2_hours_min: float = setting(1.0, min=0.0, doc="class 2 needs at least this many observable dark hours")
    class1_lbol_min_erg_s: Optional[float] = setting(None, min=0.0, doc="class 1 also needs L_bol ≥ this (erg/s; "
                                                                        "needs luminosities)")
    class2_lbol_min_erg_s: Optional[float] = setting(None, min=0.0, doc="class 2 also needs L_bol ≥ this (erg/s)")
    class1_redshift_min: Optional[float] = setting(None, min=0.0, doc="class 1 also needs a redshift ≥ this")
    class2_redshift_min: Optional[float] = setting(None, min=0.0, doc="class 2 also needs a redshift ≥ this")


#: Output formats of the target list.
TARGET_FORMATS = ("ecsv", "csv", "votable", "fits")


@dataclass(frozen=True)
class TargetsConfig:
    """Follow-up target lists: known-object removal, observability from a site, priorities."""

    site: SiteConfig = setting(doc="the observing site")
    start_date: str = setting(doc="local date (YYYY-MM-DD) of the evening of the first night")
    end_date: str = setting(doc="local date (YYYY-MM-DD) after the evening of the last night (exclusive)")
    sun_altitude_max_deg: float = setting(-18.0, min=-30.0, max=0.0, doc="dark time: the Sun is below this altitude")
    altitude_min_deg: Optional[float] = setting(None, min=0.0, max=89.0,
                                                doc="lowest target altitude (30 when neither this nor airmass_max is set)")
    airmass_max: Optional[float] = setting(None, min=1.0, min_exclusive=True, max=10.0,
                                           doc="highest airmass sec(z), instead of altitude_min_deg")
    moon_separation_min_deg: Optional[float] = setting(None, min=0.0, max=180.0,
                                                       doc="smallest distance from the Moon; no Moon test when absent")
    time_step_min: int = setting(10, min=1, max=30, doc="sampling step of each night, minutes (a divisor of 1440)")
    known_radius_arcsec: float = setting(2.0, min=0.0, min_exclusive=True, max=600.0,
                                         doc="match radius against the known-objects catalogue")
    known_action: str = setting("remove", choices=("remove", "flag"),
                                doc="remove candidates matching a known object, or keep and flag them")
    known: Optional[CatalogueConfig] = setting(None, doc="a known-objects file for targets only (default: the ingested [known])")
    priority: PriorityConfig = setting(default_factory=PriorityConfig, doc="priority-class limits")
    formats: list[str] = setting(default_factory=lambda: ("ecsv",), choices=TARGET_FORMATS, doc="output formats")
    output_folder: str = setting("targets", doc="folder below project.output_dir for the lists")
    history_file: str = setting("history.sqlite", doc="candidate history database, below project.output_dir")
    score_tolerance: float = setting(1e-9, min=0.0, doc="score changes up to this count as unchanged")
    name_prefix: str = setting("cand", doc="first part of each target's short name: 1 to 8 letters or digits, "
                                           "starting with a letter")
    exposure_min: float = setting(30.0, min=0.0, min_exclusive=True, max=1440.0,
                                  doc="exposure time per target, minutes (for the nights needed in the summary)")
    overhead_min: float = setting(10.0, min=0.0, max=1440.0,
                                  doc="overhead per target (slew, acquisition, readout), minutes")

    def _check(self, where):
        import datetime

        inside_output(self.output_folder, f"{where}.output_folder")
        inside_output(self.history_file, f"{where}.history_file")
        if not re.fullmatch(r"[A-Za-z][A-Za-z0-9]{0,7}", self.name_prefix):
            raise ConfigError(f"{where}.name_prefix = {self.name_prefix!r} is not 1 to 8 letters or digits starting "
                              "with a letter (e.g. \"cand\")")

        dates = {}
        for key in ("start_date", "end_date"):
            text = getattr(self, key)
            try:
                dates[key] = datetime.date.fromisoformat(text)
            except ValueError:
                raise ConfigError(f"{where}.{key} = {text!r} is not a date written YYYY-MM-DD") from None
            if not 1980 <= dates[key].year <= 2100:
                raise ConfigError(f"{where}.{key} = {text!r} is outside the years 1980 to 2100")
        nights = (dates["end_date"] - dates["start_date"]).days
        if nights < 0:
            raise ConfigError(f"{where}.end_date = {self.end_date!r} is before {where}.start_date = "
                              f"{self.start_date!r}: the date range is reversed")
        if nights == 0:
            raise ConfigError(f"{where}.end_date = {self.end_date!r} equals {where}.start_date: the date range is "
                              "empty (end_date is the morning after the last night, so give a later date)")
        if nights > 1096:
            raise ConfigError(f"{where}: {nights} nights from start_date to end_date; at most 1096 (three years) "
                              "are allowed, split the range")
        if 1440 % self.time_step_min:
            # every night then has the same grid of steps, local noon to local noon
            raise ConfigError(f"{where}.time_step_min = {self.time_step_min} does not divide a day (1440 minutes); "
                              "choose e.g. 5, 10, 15 or 20")
        if self.altitude_min_deg is not None and self.airmass_max is not None:
            raise ConfigError(f"{where}: give altitude_min_deg or airmass_max, not both")
        if len(set(self.formats)) != len(self.formats):
            raise ConfigError(f"{where}.formats = {list(self.formats)} names a format twice")
        if not self.formats:
            raise ConfigError(f"{where}.formats is empty; give at least one of {', '.join(TARGET_FORMATS)}")
        if self.known is not None:
            try:
                check_catalogue(self.known, "known")
            except ConfigError as exc:
                raise ConfigError(f"{where}.known: {exc}") from None

    @property
    def altitude_limit_deg(self) -> float:
        """The altitude limit in force: from airmass_max (plane-parallel sec z), else altitude_min_deg, else 30."""
        import math

        if self.airmass_max is not None:
            return 90.0 - math.degrees(math.acos(1.0 / self.airmass_max))
        return 30.0 if self.altitude_min_deg is None else self.altitude_min_deg


def _default_bolometric_corrections() -> dict[str, float]:
    # keys are text because TOML table keys are; rest wavelengths in Å
    return {f"{k:d}": v for k, v in luminosity.BOLOMETRIC_CORRECTIONS.items()}


#: Value of ``physics.cosmology`` that selects a flat ΛCDM model from ``h0_km_s_mpc`` and ``omega_m``.
FLAT_COSMOLOGY = "flat"


@dataclass(frozen=True)
class PhysicsConfig:
    """Physics of the candidates' luminosities (`selector run` with a redshift model) and after
    spectroscopy (`selector weigh`): cosmology, continuum, bolometric corrections, radiative
    efficiencies, virial calibrations and extinction coefficients."""

    cosmology: str = setting(luminosity.DEFAULT_COSMOLOGY,
                             doc="a parameter set shipped with astropy (e.g. Planck18), or 'flat' with "
                                 "h0_km_s_mpc and omega_m")
    h0_km_s_mpc: Optional[float] = setting(None, min=0.0, min_exclusive=True, max=200.0,
                                           doc="expansion rate today (H0) of the 'flat' cosmology, km/s/Mpc")
    omega_m: Optional[float] = setting(None, min=0.0, max=1.0, doc="matter density of the 'flat' cosmology")
    alpha_nu: float = setting(luminosity.DEFAULT_ALPHA_NU, min=-5.0, max=5.0,
                              doc="power-law index of the continuum f_nu ∝ nu^alpha_nu, for K-corrections")
    bolometric_corrections: dict[str, float] = setting(
        default_factory=_default_bolometric_corrections, min=0.0, min_exclusive=True,
        doc="rest wavelength in Å → BC in L_bol = BC · λL_λ; needs 1350, 3000 and 5100")
    efficiency_range: list[float] = setting(default_factory=lambda: (0.057, 0.32), min=0.0, min_exclusive=True,
                                            max=1.0, doc="[low, high] radiative efficiency for the accretion-rate range")
    virial_calibrations: str = setting(blackhole.DEFAULT_CALIBRATION_SET, choices=tuple(blackhole.CALIBRATION_SETS),
                                       doc="set of single-epoch virial-mass calibrations")
    extinction: Optional[dict[str, float]] = setting(None, min=0.0,
                                                     doc="band label → R in A_band = R · E(B−V), applied with the "
                                                         "astrometric ebv role before candidate luminosities")

    def _check(self, where):
        flat = self.cosmology == FLAT_COSMOLOGY
        if not flat and (self.h0_km_s_mpc is not None or self.omega_m is not None):
            raise ConfigError(f"{where}: h0_km_s_mpc and omega_m are used only with cosmology = \"flat\"; "
                              f"remove them or set cosmology = \"flat\" (now {self.cosmology!r})")
        try:
            self.astropy_cosmology()
        except ConfigError as exc:
            hint = " (with cosmology = \"flat\")" if not flat else ""
            raise ConfigError(f"{where}.{exc}{hint}") from None
        wavelengths = {}
        for key in self.bolometric_corrections:
            try:
                value = float(key)
            except ValueError:
                value = math.nan
            if not (math.isfinite(value) and value > 0.0):
                raise ConfigError(f"{where}.bolometric_corrections: key {key!r} is not a rest wavelength in Å "
                                  "(write e.g. 1350 = 3.81)")
            if value in wavelengths:
                raise ConfigError(f"{where}.bolometric_corrections: {key!r} and {wavelengths[value]!r} are the "
                                  "same wavelength")
            wavelengths[value] = key
        needed = [w for w in luminosity.REST_WAVELENGTHS_ANGSTROM if w not in wavelengths]
        if needed:
            raise ConfigError(f"{where}.bolometric_corrections has no value for {needed[0]:g} Å; give all of "
                              f"{', '.join(f'{w:g}' for w in luminosity.REST_WAVELENGTHS_ANGSTROM)} "
                              "(a table given here replaces the whole default)")
        if len(self.efficiency_range) != 2:
            raise ConfigError(f"{where}.efficiency_range = {list(self.efficiency_range)} must be two numbers "
                              "[low, high]")
        low, high = self.efficiency_range
        if not low <= high < 1.0:
            raise ConfigError(f"{where}.efficiency_range = {list(self.efficiency_range)} must be [low, high] with "
                              "0 < low <= high < 1")
        for band in self.extinction or {}:
            if not str(band).strip():
                raise ConfigError(f"{where}.extinction has an empty band name")

    def astropy_cosmology(self):
        """The configured cosmology as an astropy object (raises ConfigError as validation does)."""
        if self.cosmology == FLAT_COSMOLOGY:
            return luminosity.cosmology_from_settings(None, self.h0_km_s_mpc, self.omega_m)
        return luminosity.cosmology_from_settings(self.cosmology)

    def bolometric_correction_table(self) -> dict[float, float]:
        """The bolometric corrections keyed by rest wavelength in Å, as numbers."""
        return {float(k): float(v) for k, v in self.bolometric_corrections.items()}


@dataclass(frozen=True)
class Config:
    """The whole validated configuration. Build it with :func:`load_config` or :func:`from_dict`."""

    astrometric: CatalogueConfig = setting(doc="the astrometric catalogue")
    infrared: CatalogueConfig = setting(doc="the infrared catalogue")
    known: Optional[CatalogueConfig] = setting(None, doc="the known-objects catalogue")
    project: ProjectConfig = setting(default_factory=ProjectConfig)
    tiling: TilingConfig = setting(default_factory=TilingConfig)
    match: MatchConfig = setting(default_factory=MatchConfig)
    motion: MotionConfig = setting(default_factory=MotionConfig)
    quality: QualityConfig = setting(default_factory=QualityConfig)
    colours: ColourConfig = setting(default_factory=ColourConfig)
    ranking: RankingConfig = setting(default_factory=RankingConfig)
    classifier: ClassifierConfig = setting(default_factory=ClassifierConfig)
    run: RunConfig = setting(default_factory=RunConfig)
    targets: Optional[TargetsConfig] = setting(None, doc="follow-up target lists (`selector targets`)")
    physics: PhysicsConfig = setting(default_factory=PhysicsConfig,
                                     doc="luminosities of candidates and physics after spectroscopy")
    base_dir: str = setting(".", doc="folder relative paths are taken from (set by load_config)")

    def _check(self, where):
        check_catalogue(self.astrometric, "astrometric")
        check_catalogue(self.infrared, "infrared")
        if self.known is not None:
            check_catalogue(self.known, "known")
        _check_selection(self)
        _check_margin(self)
        _check_position_errors(self)
        _check_extinction(self)
        if self.targets is not None:
            _check_targets(self)

    # --- paths -------------------------------------------------------------------------------
    def path(self, relative: str) -> Path:
        """Resolve a path written in the config relative to the config file's folder."""
        p = Path(relative).expanduser()
        return p if p.is_absolute() else Path(self.base_dir) / p

    @property
    def output_dir(self) -> Path:
        return self.path(self.project.output_dir)

    # transitional: store.layout owns these paths; kept only until the train, targets, tune, report
    # and demo modules ask layout_of(cfg) instead, then removed
    @property
    def epoch_difference_yr(self) -> float:
        """Infrared epoch minus astrometric epoch, in Julian years."""
        return float(self.infrared.epoch_jyear - self.astrometric.epoch_jyear)

    def optical_bands(self) -> list[str]:
        return [m.band for m in self.astrometric.magnitudes]

    def infrared_bands(self) -> list[str]:
        return [m.band for m in self.infrared.magnitudes]


def _quantity_names(cfg: Config) -> set[str]:
    return set(cfg.infrared_bands()) | {f"opt_{b}" for b in cfg.optical_bands()}


def _check_selection(cfg: Config) -> None:
    for i, name in enumerate(cfg.colours.criteria):
        if name not in CRITERIA:
            raise ConfigError(f"colours.criteria[{i}] = {name!r} is not a known criterion; choose from "
                              f"{', '.join(sorted(CRITERIA))}{suggest(name, CRITERIA)}")
    known = _quantity_names(cfg)
    for i, cut in enumerate(cfg.colours.linear_cuts):
        for axis in ("x", "y"):
            names = getattr(cut, axis)
            where = f"colours.linear_cuts[{i}].{axis}"
            if len(names) not in (1, 2):
                raise ConfigError(f"{where} must name one band (a magnitude) or two (a colour), got {list(names)}")
            for n in names:
                if n not in known:
                    raise ConfigError(f"{where} names {n!r}, which is not a band of this configuration; "
                                      f"choose from {', '.join(sorted(known))}{suggest(n, known)}")
    oi = cfg.colours.optical_infrared
    if oi is not None:
        if oi.optical_band not in cfg.optical_bands():
            raise ConfigError(f"colours.optical_infrared.optical_band = {oi.optical_band!r} is not in "
                              f"[[astrometric.magnitudes]]{suggest(oi.optical_band, cfg.optical_bands())}")
        if oi.infrared_band not in cfg.infrared_bands():
            raise ConfigError(f"colours.optical_infrared.infrared_band = {oi.infrared_band!r} is not in "
                              f"[[infrared.magnitudes]]{suggest(oi.infrared_band, cfg.infrared_bands())}")
        if oi.min_mag is None and oi.max_mag is None:
            raise ConfigError("colours.optical_infrared needs min_mag, max_mag or both")
    if cfg.ranking.brightness_band not in cfg.infrared_bands():
        raise ConfigError(f"ranking.brightness_band = {cfg.ranking.brightness_band!r} is not in "
                          f"[[infrared.magnitudes]]{suggest(cfg.ranking.brightness_band, cfg.infrared_bands())}")
    if cfg.ranking.order != "probability" and not cfg.classifier.model:
        raise ConfigError(f"ranking.order = {cfg.ranking.order!r} needs luminosities, which need a model with a "
                          "redshift part: set classifier.model (train one with `selector train`) or use "
                          "ranking.order = \"probability\"")
    if cfg.motion.fit_quality_max is not None and "fit_quality" not in cfg.astrometric.columns:
        raise ConfigError("motion.fit_quality_max is set but astrometric.columns has no fit_quality role")
    if cfg.quality.extent_snr_max is not None and not {"extent", "extent_error"} <= set(cfg.astrometric.columns):
        raise ConfigError(f"quality.extent_snr_max = {cfg.quality.extent_snr_max} needs the extent and extent_error "
                          "roles in [astrometric.columns]; map them or remove the key")
    bins = cfg.classifier.sky_prior_bins
    if bins is not None and bins.band not in known:
        raise ConfigError(f"classifier.sky_prior_bins.band = {bins.band!r} is not a band of this configuration; choose "
                          f"from {', '.join(sorted(known))}{suggest(bins.band, known)}")


def _check_extinction(cfg: Config) -> None:
    bands = set(cfg.optical_bands()) | set(cfg.infrared_bands())
    for band in cfg.physics.extinction or {}:
        if band not in bands:
            raise ConfigError(f"physics.extinction names band {band!r}, which is not a band of this configuration; "
                              f"choose from {', '.join(sorted(bands))}{suggest(band, bands)}")


def _check_targets(cfg: Config) -> None:
    p = cfg.targets.priority
    physical = [k for k in ("class1_lbol_min_erg_s", "class2_lbol_min_erg_s", "class1_redshift_min",
                            "class2_redshift_min") if getattr(p, k) is not None]
    if physical and not cfg.classifier.model:
        raise ConfigError(f"targets.priority.{physical[0]} needs luminosities and redshifts, which need a model with "
                          "a redshift part: set classifier.model (train one with `selector train`) or remove the key")
    band = cfg.targets.priority.band
    known = _quantity_names(cfg)
    if band not in known:
        raise ConfigError(f"targets.priority.band = {band!r} is not a band of this configuration; choose from "
                          f"{', '.join(sorted(known))}{suggest(band, known)}")


def _check_margin(cfg: Config) -> None:
    shift = cfg.match.max_proper_motion_mas_yr * abs(cfg.epoch_difference_yr) / 1000.0
    need = cfg.match.radius_arcsec + shift
    allowed = max_margin_arcsec(cfg.tiling.order)
    if need > allowed:
        raise ConfigError(
            f"match.radius_arcsec = {cfg.match.radius_arcsec} plus the largest epoch shift ({shift:.1f} arcsec for "
            f"match.max_proper_motion_mas_yr over {abs(cfg.epoch_difference_yr):.2f} yr) needs a tile margin of "
            f"{need:.1f} arcsec, more than tiling.order = {cfg.tiling.order} allows ({allowed:.1f} arcsec); "
            "lower tiling.order or the radius"
        )


def _check_position_errors(cfg: Config) -> None:
    """The probabilistic match needs every position's error: mapped columns, or a configured floor."""
    if cfg.match.method != "probabilistic":
        return
    for kind in ("astrometric", "infrared"):
        cat = getattr(cfg, kind)
        sets = schema.POSITION_ERROR_ROLES[kind]
        mapped = [s for s in sets if all(r in cat.columns for r in s)]
        half = [r for s in sets for r in s if r in cat.columns and len(s) > 1 and s not in mapped]
        if half:
            other = next(r for s in sets if half[0] in s for r in s if r != half[0])
            raise ConfigError(f"{kind}.columns maps {half[0]} but not {other}; map both (errors per axis), "
                              f"as match.method = \"probabilistic\" needs both")
        if not mapped and cat.position_floor_arcsec is None:
            roles = " or ".join(" and ".join(f"{kind}.columns.{r}" for r in s) for s in sets)
            raise ConfigError(f"[{kind}] has no positional error: map {roles}, or set {kind}.position_floor_arcsec "
                              f"(arcsec) to the error of its positions; match.method = \"probabilistic\" needs one "
                              f"(or set match.method = \"nearest\")")


def from_dict(data: dict, base_dir: str | Path = ".") -> Config:
    """Validate a configuration given as plain data (as read from TOML)."""
    data = dict(data)
    data.pop("base_dir", None)
    data["base_dir"] = str(base_dir)
    return convert(data, Config, "")


def load_config(path: str | Path) -> Config:
    """Read and validate a TOML configuration file."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{path}: no such configuration file") from None
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read ({exc.strerror})") from None
    except UnicodeDecodeError as exc:
        raw = path.read_bytes()
        line = raw.count(b"\n", 0, exc.start) + 1
        raise ConfigError(f"{path}: line {line} is not UTF-8 text (byte 0x{raw[exc.start]:02x}); save the file as "
                          "UTF-8") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc})") from None
    try:
        return from_dict(data, base_dir=path.resolve().parent)
    except ConfigError as exc:
        raise ConfigError(f"{path}: {exc}") from None


def _relative(path: str, base: Path) -> str:
    """An absolute path written in a config, relative to the config's folder (others as written)."""
    p = Path(str(path)).expanduser()
    if not p.is_absolute() or not base.is_absolute():
        return path
    return Path(os.path.relpath(p, base)).as_posix()


def plain(cfg: Config) -> dict:
    """The configuration as plain data, without the machine-dependent base folder.

    Absolute paths (output folder, input files, model, labels) are written relative to the config's
    folder, so the same job set up in another folder gives the same record and hashes.
    """
    data = to_plain(cfg)
    base = Path(data.pop("base_dir"))
    data["project"]["output_dir"] = _relative(data["project"]["output_dir"], base)
    catalogues = [data.get(k) for k in ("astrometric", "infrared", "known")]
    catalogues.append((data.get("targets") or {}).get("known"))
    for cat in catalogues:
        if cat:
            cat["files"] = [_relative(f, base) for f in cat["files"]]
    classifier = data["classifier"]
    if classifier.get("model"):
        classifier["model"] = _relative(classifier["model"], base)
    if classifier.get("labels"):
        classifier["labels"]["file"] = _relative(classifier["labels"]["file"], base)
    return data


def config_hash(cfg: Config, sections: tuple[str, ...] | None = None) -> str:
    """SHA-256 of the canonical JSON form of the configuration (or of some of its sections).

    Paths are hashed relative to the config's folder (:func:`plain`), and the output folder not at
    all: where results go never changes what they are, so the same job run from another folder,
    or into another output folder, gives the same hash and the same result bytes.
    """
    data = plain(cfg)
    data["project"].pop("output_dir", None)
    if sections is not None:
        data = {k: data[k] for k in sections}
    text = json.dumps(data, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    return hashlib.sha256(text.encode()).hexdigest()


#: Sections whose change alters the cross-match and so the feature cache.
MATCH_SECTIONS = ("astrometric", "infrared", "tiling", "match")
#: Sections that only select and rank from the feature cache.
SELECTION_SECTIONS = ("motion", "quality", "colours", "ranking", "classifier")
