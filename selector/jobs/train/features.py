"""The classifier's inputs, computed from feature-cache columns only.

Features (:func:`feature_specs`): magnitudes, infrared and optical−infrared colours, infrared
magnitude errors, the signed excess over the boundary of every published colour criterion the bands
allow (so that the model decides, with the criteria as inputs rather than as a gate), the
zero-motion statistics under the current ``[motion]`` settings, the match separation, the blend count and, where mapped, the astrometric fit quality. A band that was not
measured stays NaN; the model (histogram gradient boosting) learns where missing values go at
every split instead of seeing invented values.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
import pyarrow as pa

from selector.core import schema
from selector.core.candidate_physics import dereddened
from selector.core.photometry import CRITERIA, vega_to_ab
from selector.core.selection import MATCH_PROBABILITY_COLUMN, infrared_mags, match_method, select
from selector.settings.config import Config

__all__ = ["FeatureSpec", "feature_matrix", "feature_settings", "feature_specs", "zero_motion"]


class FeatureSpec(NamedTuple):
    """One model input: its name (units in the suffix), unit and meaning."""

    name: str
    unit: str
    description: str


def _ir_suffix(band: str) -> str:
    return schema.band_suffix(band)


def feature_specs(cfg: Config) -> list[FeatureSpec]:
    """The model inputs for this configuration's bands and mapped roles, in a fixed order.

    Infrared colours are formed from bands adjacent in wavelength, optical colours from bands
    adjacent in the order of ``[[astrometric.magnitudes]]``, and optical−infrared colours (both in
    AB) against the two shortest infrared bands, where the hot-dust excess of quasars over stars
    is largest relative to the photometric errors.

    Parameters
    ----------
    cfg : Config
        Bands and mapped column roles.

    Returns
    -------
    list of FeatureSpec
    """
    opt = cfg.optical_bands()
    ir = sorted(cfg.infrared_bands(), key=float)
    with_error = {m.band for m in cfg.infrared.magnitudes if m.error_column}
    out = [FeatureSpec(schema.optical_mag_column(b), "mag", f"optical {b} magnitude (AB)") for b in opt]
    out += [FeatureSpec(schema.infrared_mag_column(b), "mag", f"{b} micron magnitude (Vega)") for b in ir]
    out += [FeatureSpec(schema.infrared_error_column(b), "mag", f"{b} micron magnitude uncertainty")
            for b in ir if b in with_error]
    out += [FeatureSpec(f"ir_{_ir_suffix(a)}_minus_{_ir_suffix(b)}_mag", "mag", f"{a} − {b} micron colour (Vega)")
            for a, b in zip(ir, ir[1:])]
    out += [FeatureSpec(f"opt_{a}_minus_{b}_mag", "mag", f"optical {a} − {b} colour (AB)") for a, b in zip(opt, opt[1:])]
    out += [FeatureSpec(f"opt_{o}_minus_ir_{_ir_suffix(b)}_abmag", "mag", f"optical {o} − {b} micron colour (both AB)")
            for o in opt for b in ir[:2]]
    out += [FeatureSpec(_excess_name(name), _excess_unit(name), f"signed excess over the boundary of {name} "
                        f"({c.reference}); positive inside the selection") for name, c in _criteria(cfg).items()]
    out += [
        FeatureSpec("parallax_snr", "", "(parallax − zero point) / error, under the [motion] settings"),
        FeatureSpec("pm_chi2", "", "chi^2 of zero proper motion (2 degrees of freedom), under the [motion] settings"),
        FeatureSpec("sep_arcsec", "arcsec", "separation from the infrared counterpart at its epoch"),
        FeatureSpec("ir_blend_count", "", "astrometric sources within the match radius of the counterpart"),
    ]
    if "fit_quality" in cfg.astrometric.columns:
        out.append(FeatureSpec("fit_quality", "", "astrometric fit-quality indicator (larger = worse)"))
    out += match_and_shape_features(cfg)
    return out


def match_and_shape_features(cfg: Config) -> list[FeatureSpec]:
    """The match quality (probabilistic match only) and the point-source roles that are mapped."""
    out = []
    if match_method(cfg) != "nearest":
        out += [FeatureSpec(MATCH_PROBABILITY_COLUMN, "", "probability that the infrared counterpart is the same source"),
                FeatureSpec("n_competitors", "", "other astrometric sources competing for the counterpart")]
    astro = cfg.astrometric.columns
    for role, spec in (("extent", FeatureSpec(schema.EXTENT_COLUMN, "mag", "astrometric extent (0 for a point source)")),
                       ("extent_error", FeatureSpec(schema.EXTENT_ERROR_COLUMN, "mag", "uncertainty of the extent")),
                       ("extended_flag", FeatureSpec(schema.ASTRO_EXTENDED_FLAG_COLUMN, "",
                                                     "astrometric extendedness flag (1 = extended)"))):
        if role in astro:
            out.append(spec)
    if "extended_flag" in cfg.infrared.columns:
        out.append(FeatureSpec(schema.IR_EXTENDED_FLAG_COLUMN, "", "infrared extendedness flag (1 = resolved)"))
    return out


def _criteria(cfg: Config) -> dict:
    """Published criteria whose bands this configuration measures, in registry order."""
    have = set(cfg.infrared_bands())
    return {name: c for name, c in CRITERIA.items() if set(c.bands) <= have}


def _excess_unit(name: str) -> str:
    # the three-band wedge measures its margin in dex of flux ratio, the others in magnitudes
    return "dex" if "wedge" in name else "mag"


def _excess_name(name: str) -> str:
    return f"excess_{name}_{_excess_unit(name)}"


def _column(table: pa.Table, name: str) -> np.ndarray:
    if name not in table.column_names:
        return np.full(table.num_rows, np.nan)
    return table.column(name).to_numpy(zero_copy_only=False).astype(np.float64)


def zero_motion(table: pa.Table, cfg: Config) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rows that pass the zero-motion test of ``cfg`` and the statistics behind it.

    Parameters
    ----------
    table : pyarrow.Table
        Feature-cache rows.
    cfg : Config
        The ``[motion]`` settings.

    Returns
    -------
    passed : numpy.ndarray of bool
    parallax_snr, pm_chi2 : numpy.ndarray of float64
    """
    sel = select(table, cfg)
    passed = sel.zero_motion_passed
    return passed, sel.derived["parallax_snr"], sel.derived["pm_chi2"]


def feature_matrix(table: pa.Table, cfg: Config, names=None, statistics=None) -> np.ndarray:
    """Model inputs of feature-cache rows, shape (rows, features), float64 with NaN where missing.

    Parameters
    ----------
    table : pyarrow.Table
        Feature-cache rows.
    cfg : Config
        Bands and the ``[motion]`` settings of the zero-motion statistics.
    names : sequence of str, optional
        Features and their order (default: :func:`feature_specs` of ``cfg``).
    statistics : tuple of (parallax_snr, pm_chi2), optional
        Zero-motion statistics already computed for these rows.

    Returns
    -------
    numpy.ndarray of float64
    """
    if names is None:
        names = [f.name for f in feature_specs(cfg)]
    if statistics is None:
        _, plx_snr, chi2 = zero_motion(table, cfg)
    else:
        plx_snr, chi2 = statistics
    # optical − infrared colours are intrinsic: dereddened with the source's E(B-V) where known
    extinction = cfg.physics.extinction
    ir_ab = {}
    for b in cfg.infrared_bands():
        ir_ab[_ir_suffix(b)] = dereddened(vega_to_ab(_column(table, schema.infrared_mag_column(b)), b), table, b,
                                          extinction)
    excess = {}
    wanted = {_excess_name(n): c for n, c in _criteria(cfg).items()}
    if any(name in wanted for name in names):
        mags = infrared_mags(table, cfg.infrared_bands())
        with np.errstate(invalid="ignore"):
            excess = {name: np.asarray(c.select(mags).excess_mag, np.float64) for name, c in wanted.items()
                      if name in names}
    out = np.empty((table.num_rows, len(names)), np.float64)
    with np.errstate(invalid="ignore"):
        for j, name in enumerate(names):
            if name in excess:
                values = excess[name]
            elif name == "parallax_snr":
                values = plx_snr
            elif name == "pm_chi2":
                values = chi2
            elif name.startswith("ir_") and name.endswith("_mag") and "_minus_" in name:
                a, b = name[3:-4].split("_minus_")
                values = _column(table, f"ir_{a}_vegamag") - _column(table, f"ir_{b}_vegamag")
            elif name.startswith("opt_") and name.endswith("_abmag") and "_minus_ir_" in name:
                o, b = name[4:-6].split("_minus_ir_")
                values = dereddened(_column(table, schema.optical_mag_column(o)), table, o, extinction) - ir_ab.get(
                    b, np.nan)
            elif name.startswith("opt_") and name.endswith("_mag") and "_minus_" in name:
                a, b = name[4:-4].split("_minus_")
                values = _column(table, schema.optical_mag_column(a)) - _column(table, schema.optical_mag_column(b))
            else:
                values = _column(table, name)
            out[:, j] = values
    # an infinite value (a zero error upstream) carries no information a split could use
    out[~np.isfinite(out)] = np.nan
    return out


def feature_settings(cfg: Config) -> dict:
    """Settings that change what the features mean, recorded in the card and checked on loading.

    Parameters
    ----------
    cfg : Config

    Returns
    -------
    dict
        ``parallax_zero_point_mas`` and ``error_inflation`` of ``[motion]`` (the card's JSON content).
    """
    out = {"parallax_zero_point_mas": cfg.motion.parallax_zero_point_mas,
           "error_inflation": cfg.motion.error_inflation}
    if "ebv" in cfg.astrometric.columns and cfg.physics.extinction:
        # the optical − infrared colours are dereddened with these coefficients
        out["extinction"] = dict(sorted(cfg.physics.extinction.items()))
    return out
