"""What every output column means: one description, one UCD and one written precision per column name.

This is the one place output columns are described. Every writer (:func:`selector.store.io.format_columns`)
reads it, so the ranked candidates, the target lists and their side tables carry the same words in
ECSV headers, VOTable ``DESCRIPTION`` elements and FITS ``TCOMMn`` cards. A new output column gets its
entry here (or matches one of the patterns of :func:`describe`); ``tests/test_tables.py`` fails for a
written column without one.

UCDs are words of the IVOA UCD1+ controlled vocabulary (checked with
``astropy.io.votable.ucd.check_ucd(..., check_controlled_vocabulary=True)`` in the tests).

Precision (``decimals``, digits after the decimal point in text formats) follows what the unit
warrants, so that text tables do not carry 17 digits of noise:

- positions in degrees to 1e-7 deg (0.36 mas; the brief is 1 mas ≈ 2.8e-7 deg), angles in arcsec to
  1 mas (3 decimals), parallaxes, proper motions and their errors to 1 µas (/yr) (3 decimals in mas);
- magnitudes and their errors to 1 mmag (3 decimals);
- probabilities, correlations and scores to 1e-4 (4 decimals); redshifts to 1e-4;
- hours to 0.01 h (36 s, below any sampling step); altitudes to 0.01 deg;
- test statistics (signal-to-noise, chi-square) to 1e-3.

Binary formats (Parquet, FITS) keep full float64 precision; only text is rounded.
"""

from __future__ import annotations

import re
from typing import NamedTuple

__all__ = ["ColumnDoc", "COLUMNS", "describe"]


class ColumnDoc(NamedTuple):
    """How one output column is described.

    Attributes
    ----------
    description : str
        What the column holds, in words (units are carried separately, by the column's name suffix).
    ucd : str
        IVOA UCD1+ word(s) for VOTable ``FIELD`` elements.
    decimals : int or None
        Digits after the decimal point written in text formats for a float column; None keeps full
        precision (integers and text are never touched).
    """

    description: str
    ucd: str
    decimals: int | None = None


class _Precision(NamedTuple):
    """Written decimals by kind of quantity (see the module docstring for why)."""

    position_deg: int = 7
    angle_arcsec: int = 3
    milliarcsec: int = 3
    magnitude: int = 3
    probability: int = 4
    hours: int = 2
    altitude_deg: int = 2
    statistic: int = 3


P = _Precision()

#: Output columns by exact name.
COLUMNS: dict[str, ColumnDoc] = {
    # --- identity and position of the astrometric source ----------------------------------------
    "rank": ColumnDoc("rank in the ranked candidate list of `selector run` (1 = highest score)", "meta.number"),
    "astro_id": ColumnDoc("identifier of the source in the astrometric catalogue", "meta.id;meta.main"),
    "ra_deg": ColumnDoc("right ascension (ICRS) at the astrometric catalogue's epoch", "pos.eq.ra;meta.main",
                        P.position_deg),
    "dec_deg": ColumnDoc("declination (ICRS) at the astrometric catalogue's epoch", "pos.eq.dec;meta.main",
                         P.position_deg),
    "ra_error_mas": ColumnDoc("uncertainty of the right ascension, times cos(dec)", "stat.error;pos.eq.ra",
                              P.milliarcsec),
    "dec_error_mas": ColumnDoc("uncertainty of the declination", "stat.error;pos.eq.dec", P.milliarcsec),
    "parallax_mas": ColumnDoc("parallax as catalogued (no zero-point correction applied here)", "pos.parallax",
                              P.milliarcsec),
    "parallax_error_mas": ColumnDoc("parallax uncertainty as catalogued", "stat.error;pos.parallax", P.milliarcsec),
    "pmra_mas_yr": ColumnDoc("proper motion in right ascension, times cos(dec)", "pos.pm;pos.eq.ra", P.milliarcsec),
    "pmdec_mas_yr": ColumnDoc("proper motion in declination", "pos.pm;pos.eq.dec", P.milliarcsec),
    "pmra_error_mas_yr": ColumnDoc("uncertainty of pmra_mas_yr", "stat.error;pos.pm;pos.eq.ra", P.milliarcsec),
    "pmdec_error_mas_yr": ColumnDoc("uncertainty of pmdec_mas_yr", "stat.error;pos.pm;pos.eq.dec", P.milliarcsec),
    "pm_corr": ColumnDoc("correlation coefficient of pmra_mas_yr and pmdec_mas_yr in the astrometric solution",
                         "stat.correlation", P.probability),
    "fit_quality": ColumnDoc("astrometric fit-quality indicator of the catalogue (larger = worse fit)",
                             "stat.fit.goodness", P.statistic),
    "extent_mag": ColumnDoc("how extended the source looks in the astrometric catalogue (0 for a point source)",
                            "src.morph.param", P.magnitude),
    "extent_error_mag": ColumnDoc("uncertainty of extent_mag", "stat.error;src.morph.param", P.magnitude),
    "astro_extended_flag": ColumnDoc("1 when the astrometric catalogue calls the source extended, else 0",
                                     "meta.code;src.morph"),
    "ir_extended_flag": ColumnDoc("1 when the infrared counterpart is resolved in the infrared beam, else 0",
                                  "meta.code;src.morph;em.IR"),
    "tile": ColumnDoc("HEALPix tile (nested scheme, the run's tiling order) that owns the source", "pos.healpix"),
    "gal_l_deg": ColumnDoc("Galactic longitude", "pos.galactic.lon", P.position_deg),
    "gal_b_deg": ColumnDoc("Galactic latitude", "pos.galactic.lat", P.position_deg),
    # --- the infrared counterpart ----------------------------------------------------------------
    "ra_match_deg": ColumnDoc("right ascension of the astrometric source moved to the infrared catalogue's epoch "
                              "(the position that was matched)", "pos.eq.ra", P.position_deg),
    "dec_match_deg": ColumnDoc("declination of the astrometric source moved to the infrared catalogue's epoch",
                               "pos.eq.dec", P.position_deg),
    "ir_id": ColumnDoc("identifier of the infrared counterpart in the infrared catalogue", "meta.id.cross"),
    "ir_ra_deg": ColumnDoc("right ascension (ICRS) of the infrared counterpart", "pos.eq.ra", P.position_deg),
    "ir_dec_deg": ColumnDoc("declination (ICRS) of the infrared counterpart", "pos.eq.dec", P.position_deg),
    "pos_error_arcsec": ColumnDoc("positional uncertainty of the infrared counterpart (1 sigma per axis)",
                                  "stat.error;pos.eq", P.angle_arcsec),
    "ir_flags": ColumnDoc("quality flags of the infrared counterpart, as text", "meta.code.qual"),
    "sep_arcsec": ColumnDoc("separation between the matched position and the infrared counterpart",
                            "pos.angDistance", P.angle_arcsec),
    "n_ir_within": ColumnDoc("infrared sources within the match radius of the astrometric source", "meta.number"),
    "ir_blend_count": ColumnDoc("astrometric sources within the match radius of the infrared counterpart "
                                "(more than 1: the infrared flux may be blended)", "meta.number"),
    "match_probability": ColumnDoc("posterior probability that the infrared counterpart is the same source "
                                   "(Budavari & Szalay 2008 Bayes factor of both positions' errors, prior from the "
                                   "infrared source density of its tile); NaN with match.method = nearest",
                                   "stat.probability", P.probability),
    "match_ln_bayes_factor": ColumnDoc("natural log of the Bayes factor of the pair (same source against two "
                                       "unrelated sources)", "stat.likelihood", P.statistic),
    "n_competitors": ColumnDoc("other sources that competed for this pair: further infrared candidates of the "
                               "source and other astrometric sources wanting the same counterpart", "meta.number"),
    "match_ambiguous": ColumnDoc("true when the runner-up pair has more than match.ambiguity_ratio of the chosen "
                                 "pair's probability", "meta.code"),
    "pair_sigma_arcsec": ColumnDoc("combined 1-sigma positional error of the pair along the major axis of its error "
                                   "ellipse (both catalogues, at the infrared epoch)", "stat.error;pos.eq",
                                   P.angle_arcsec),
    "ir_density_per_sr": ColumnDoc("surface density of infrared sources in the counterpart's tile (per steradian), "
                                   "which sets the prior of the match", "phys.density;em.IR", 1),
    "ir_ra_error_arcsec": ColumnDoc("uncertainty of the infrared counterpart's right ascension, times cos(dec)",
                                    "stat.error;pos.eq.ra", P.angle_arcsec),
    "ir_dec_error_arcsec": ColumnDoc("uncertainty of the infrared counterpart's declination", "stat.error;pos.eq.dec",
                                     P.angle_arcsec),
    "ir_ra_dec_corr": ColumnDoc("correlation of the infrared counterpart's right ascension and declination errors",
                                "stat.correlation;pos.eq", P.probability),
    # --- selection statistics ----------------------------------------------------------------------
    "parallax_snr": ColumnDoc("parallax over its error, after the configured zero point and error inflation",
                              "stat.snr;pos.parallax", P.statistic),
    "pm_chi2": ColumnDoc("chi-square of zero proper motion (2 degrees of freedom, with the pmra-pmdec correlation)",
                         "stat.fit.chi2;pos.pm", P.statistic),
    "pm_pvalue": ColumnDoc("probability of a chi-square at least pm_chi2 for a source that does not move",
                           "stat.probability;pos.pm", P.probability),
    "motion_chi2": ColumnDoc("chi-square of zero parallax (after the zero point) and zero proper motion together, "
                             "with the full 3x3 covariance (3 degrees of freedom)", "stat.fit.chi2;pos.pm",
                             P.statistic),
    "motion_pvalue": ColumnDoc("p-value of the joint zero-motion test, one-sided in parallax (mixture of chi-square "
                               "with 2 and 3 degrees of freedom)", "stat.probability;pos.pm", P.probability),
    "colour_excess_mag": ColumnDoc("largest margin by which the infrared colours pass a configured criterion "
                                   "(negative: fails all)", "phot.color.excess", P.magnitude),
    "criteria_score": ColumnDoc("ranking score from the infrared colour criteria (larger = redder than the "
                                "boundaries by more)", "stat.value", P.probability),
    "p_quasar": ColumnDoc("classifier probability that the source is a quasar on the sky: calibrated, then moved "
                          "to the sky's class proportions stored with the model", "stat.probability;src.class",
                          P.probability),
    "p_quasar_labelled_mix": ColumnDoc("classifier probability that the source is a quasar at the class mix of the "
                                       "training labels (calibrated, not moved to the sky)",
                                       "stat.probability;src.class", P.probability),
    "quasar_log_odds": ColumnDoc("natural log of p_quasar / (1 - p_quasar), computed without rounding p_quasar to 1; "
                                 "the ranking's first tie-break", "stat.value", P.statistic),
    "novelty_distance": ColumnDoc("distance from the labelled training sources in standardised features, over the "
                                  "typical such distance among them (1 = typical)", "stat.value", P.statistic),
    "beyond_training": ColumnDoc("true where novelty_distance exceeds what the labelled sources show among themselves: "
                                 "the model extrapolates (the source is kept)", "meta.code"),
    "passes_colour_criteria": ColumnDoc("true where the infrared colours pass the configured published criteria "
                                        "(a reference column when the classifier decides)", "meta.code"),
    # --- redshifts and luminosities (a model with a redshift part; core/candidate_physics.py) ---------
    "z_phot": ColumnDoc("photometric redshift: median of the model's distribution", "src.redshift.phot;stat.median",
                        P.probability),
    "z_phot_low": ColumnDoc("photometric redshift: 16th percentile", "src.redshift.phot;stat.min", P.probability),
    "z_phot_high": ColumnDoc("photometric redshift: 84th percentile", "src.redshift.phot;stat.max", P.probability),
    "redshift": ColumnDoc("adopted redshift: spectroscopic where a known object or a recorded outcome has one, else "
                          "the photometric median", "src.redshift", P.probability),
    "redshift_low": ColumnDoc("16th percentile of the adopted redshift (equal to it when spectroscopic)",
                              "src.redshift;stat.min", P.probability),
    "redshift_high": ColumnDoc("84th percentile of the adopted redshift (equal to it when spectroscopic)",
                               "src.redshift;stat.max", P.probability),
    "z_source": ColumnDoc("where the adopted redshift comes from: spec, photo, or empty when there is none",
                          "meta.code;src.redshift"),
    "distance_modulus_mag": ColumnDoc("distance modulus 5 log10(d_L / 10 pc) at the adopted redshift, in the "
                                      "[physics] cosmology", "phot.mag.distMod", P.magnitude),
    "absmag_z2_abmag": ColumnDoc("absolute magnitude normalised at z = 2 (Richards et al. 2006), power law "
                                 "K correction with [physics].alpha_nu, in the band nearest 7500 Angstrom",
                                 "phys.magAbs", P.magnitude),
    "lbol_erg_s": ColumnDoc("bolometric luminosity BC x lambda L_lambda ([physics].bolometric_corrections) at the "
                            "adopted redshift", "phys.luminosity"),
    "lbol_low_erg_s": ColumnDoc("bolometric luminosity, low end over the redshift interval",
                                "phys.luminosity;stat.min"),
    "lbol_high_erg_s": ColumnDoc("bolometric luminosity, high end over the redshift interval",
                                 "phys.luminosity;stat.max"),
    "lbol_from_angstrom": ColumnDoc("rest wavelength of the lambda L_lambda behind lbol_erg_s: the one whose "
                                    "nearest measured band needs the shortest extrapolation", "em.wl"),
    "min_bh_mass_msun": ColumnDoc("smallest black-hole mass at or below its Eddington limit, L_bol / L_Edd(1 Msun)",
                                  "phys.mass;stat.min"),
    "mdot_low_msun_yr": ColumnDoc("accretion rate L_bol / (eta c^2) at the highest efficiency of "
                                  "[physics].efficiency_range", "arith.rate;phys.mass"),
    "mdot_high_msun_yr": ColumnDoc("accretion rate L_bol / (eta c^2) at the lowest efficiency of "
                                   "[physics].efficiency_range", "arith.rate;phys.mass"),
    "mdot_low_msun_day": ColumnDoc("mdot_low_msun_yr per day", "arith.rate;phys.mass"),
    "mdot_high_msun_day": ColumnDoc("mdot_high_msun_yr per day", "arith.rate;phys.mass"),
    "expected_lbol_erg_s": ColumnDoc("expected bolometric luminosity P(quasar) x L_bol (ranking.order = "
                                     "expected_luminosity)", "phys.luminosity;stat.mean"),
    "beyond_labelled_luminosity": ColumnDoc("true where L_bol exceeds that of every labelled quasar: the model has "
                                            "seen nothing as luminous, so look at it rather than trust it",
                                            "meta.code;phys.luminosity"),
    # --- target lists --------------------------------------------------------------------------
    "name": ColumnDoc("short name of the target: targets.name_prefix, a hyphen and a base-32 hash of astro_id",
                      "meta.id"),
    "ra_hms": ColumnDoc("right ascension (ICRS), hours:minutes:seconds", "pos.eq.ra"),
    "dec_dms": ColumnDoc("declination (ICRS), degrees:arcminutes:arcseconds", "pos.eq.dec"),
    "frame": ColumnDoc("celestial reference frame of the positions", "pos.frame"),
    "epoch_jyear": ColumnDoc("epoch of the positions (the astrometric catalogue's), Julian year", "time.epoch", 3),
    "opt_brightest_abmag": ColumnDoc("brightest optical magnitude of the source among the configured optical bands "
                                     "(AB)", "phot.mag;em.opt", P.magnitude),
    "opt_brightest_band": ColumnDoc("the optical band of opt_brightest_abmag", "instr.bandpass"),
    "ir_brightest_vegamag": ColumnDoc("infrared magnitude (Vega) in the band where the source is brightest in flux "
                                      "density (bands compared in AB)", "phot.mag;em.IR", P.magnitude),
    "ir_brightest_band": ColumnDoc("the infrared band of ir_brightest_vegamag, wavelength in micron", "instr.bandpass"),
    "priority": ColumnDoc("priority class (1 highest); rule in the config's [targets.priority]", "meta.code.class"),
    "score": ColumnDoc("ranking score: p_quasar when a classifier is configured, else criteria_score",
                       "stat.value", P.probability),
    "observable_hours": ColumnDoc("dark hours above the altitude limit (and far from the Moon) summed over the "
                                  "nights of the date range", "time.duration;obs", P.hours),
    "nights_observable": ColumnDoc("nights with some observable dark time", "meta.number"),
    "best_night": ColumnDoc("local evening date of the night with the most observable hours", "time.epoch;obs"),
    "best_night_hours": ColumnDoc("observable hours in the best night", "time.duration;obs", P.hours),
    "transit_altitude_deg": ColumnDoc("geometric altitude at upper culmination (refraction ignored)", "pos.az.alt",
                                      P.altitude_deg),
    "history_status": ColumnDoc("status in the candidate history: new, unchanged, score_changed or observed",
                                "meta.code.status"),
    "known_name": ColumnDoc("nearest known object within targets.known_radius_arcsec", "meta.id.cross"),
    "known_class": ColumnDoc("class of that known object", "src.class"),
    "known_redshift": ColumnDoc("redshift of that known object", "src.redshift", P.probability),
    "known_sep_arcsec": ColumnDoc("separation from that known object", "pos.angDistance", P.angle_arcsec),
    "reason": ColumnDoc("reason code: why the candidate is not on the target list, or why a row was refused",
                        "meta.code"),
    "detail": ColumnDoc("the reason in words", "meta.note"),
    "night": ColumnDoc("local date of the evening the night starts", "time.epoch"),
    "dusk_utc": ColumnDoc("start of dark time (UTC)", "time.start"),
    "dawn_utc": ColumnDoc("end of dark time (UTC)", "time.end"),
    "dark_hours": ColumnDoc("hours of dark time in the night", "time.duration", P.hours),
    # known-objects rejects
    "input_file": ColumnDoc("file the refused row came from", "meta.id;meta.file"),
    "input_row": ColumnDoc("row number in that file (0 = first data row)", "meta.record"),
    "column": ColumnDoc("column whose value was refused", "meta.id"),
}

#: Infrared bands by their column-name form: the UCD1+ band word of each wavelength in micron.
_IR_UCD = {"3p4": "em.IR.3-4um", "4p6": "em.IR.4-8um", "12": "em.IR.8-15um", "22": "em.IR.15-30um"}
_IR_LABEL = {"3p4": "3.4", "4p6": "4.6", "12": "12", "22": "22"}
_CORR = re.compile(r"^(ra|dec|parallax|pmra|pmdec)_(ra|dec|parallax|pmra|pmdec)_corr$")
_OPT_MAG = re.compile(r"^opt_([a-z0-9]+)_abmag$")
_OPT_ERR = re.compile(r"^opt_([a-z0-9]+)_mag_error$")
_IR_MAG = re.compile(r"^ir_([0-9p]+)_vegamag$")
_IR_ERR = re.compile(r"^ir_([0-9p]+)_mag_error$")


_LAMBDA_L = re.compile(r"^lamL(\d+)(|_low|_high)_erg_s$")


def describe(column: str) -> ColumnDoc | None:
    """The description, UCD and written precision of an output column; None for an unknown name.

    Families of columns (correlations, magnitudes of each band) are described by their name's
    pattern, so a new band needs no new entry.
    """
    doc = COLUMNS.get(column)
    if doc is not None:
        return doc
    if m := _CORR.match(column):
        a, b = m.groups()
        return ColumnDoc(f"correlation coefficient of {a} and {b} in the astrometric solution", "stat.correlation",
                         P.probability)
    if m := _LAMBDA_L.match(column):
        wavelength, part = m.groups()
        band = "em.UV" if int(wavelength) < 3800 else "em.opt"
        what = {"": "", "_low": ", low end over the redshift interval", "_high": ", high end over the redshift interval"}
        stat = {"": "", "_low": ";stat.min", "_high": ";stat.max"}
        return ColumnDoc(f"rest-frame lambda L_lambda at {wavelength} Angstrom{what[part]}, from the measured band "
                         f"nearest (1+z) x {wavelength} Angstrom along a power law", f"phys.luminosity;{band}{stat[part]}")
    if m := _OPT_MAG.match(column):
        return ColumnDoc(f"optical magnitude in the band '{m.group(1)}' (AB)", "phot.mag;em.opt", P.magnitude)
    if m := _OPT_ERR.match(column):
        return ColumnDoc(f"uncertainty of the optical magnitude in the band '{m.group(1)}'", "stat.error;phot.mag;em.opt",
                         P.magnitude)
    if (m := _IR_MAG.match(column)) and m.group(1) in _IR_UCD:
        band = m.group(1)
        return ColumnDoc(f"infrared magnitude at {_IR_LABEL[band]} micron (Vega)", f"phot.mag;{_IR_UCD[band]}",
                         P.magnitude)
    if (m := _IR_ERR.match(column)) and m.group(1) in _IR_UCD:
        band = m.group(1)
        return ColumnDoc(f"uncertainty of the infrared magnitude at {_IR_LABEL[band]} micron",
                         f"stat.error;phot.mag;{_IR_UCD[band]}", P.magnitude)
    return None
