"""Column roles: what each catalogue must provide, the canonical internal names and units.

A user's catalogue may call its columns anything and give them in any unit astropy understands; the
configuration maps each *role* below onto one of the user's columns. Ingest converts every role to
the canonical column name and unit listed here, so every later stage sees one vocabulary.

Canonical units (units live in the names): positions in ICRS degrees, astrometric position errors in
mas, parallaxes in mas, proper motions in mas/yr (``pmra`` includes the cos δ factor), infrared
positional errors in arcsec, infrared magnitudes in the Vega system, optical magnitudes in the AB
system.
"""

from __future__ import annotations

from dataclasses import dataclass

#: Infrared bands by wavelength in micron: band label (the one spelling used everywhere but in column
#: names) → its column-name form. Only :func:`band_suffix` reads the values.
INFRARED_BANDS = {"3.4": "3p4", "4.6": "4p6", "12": "12", "22": "22"}

#: Effective wavelength (Å) of each infrared band, read from its label (the label is the wavelength
#: in micron). Optical bands are named by the user, who gives their wavelength in the configuration
#: (``wavelength_angstrom`` of a magnitude); luminosities use only bands with a known wavelength.
INFRARED_WAVELENGTH_ANGSTROM = {band: float(band) * 1.0e4 for band in INFRARED_BANDS}


@dataclass(frozen=True)
class Role:
    """One thing a catalogue provides.

    Attributes
    ----------
    role : str
        The key used in the configuration's ``columns`` table.
    canonical : str
        The internal column name written to tiles.
    kind : str
        ``id`` (integer or string identifier), ``lon``/``lat`` (a position, wrapped or range-checked),
        ``value`` (a finite-or-missing quantity), ``error`` (non-negative), ``position_error``
        (non-negative and present: the probabilistic cross-match needs it for every row), ``corr`` (in [−1, 1]),
        ``flag`` (a number or a boolean, nonzero meaning set; kept as 0/1 floats, NaN when missing),
        ``text`` (kept as a string), ``magnitude`` and ``magnitude_error``.
    unit : str or None
        Canonical astropy unit the input is converted to; None for dimensionless or text roles.
    required : bool
        Whether the configuration must map this role.
    doc : str
        What the role means, for error messages and the documented default configuration.
    """

    role: str
    canonical: str
    kind: str
    unit: str | None
    required: bool
    doc: str


#: Canonical columns of the point-source roles (read by the selection's point-source cut).
EXTENT_COLUMN = "extent_mag"
EXTENT_ERROR_COLUMN = "extent_error_mag"
ASTRO_EXTENDED_FLAG_COLUMN = "astro_extended_flag"
IR_EXTENDED_FLAG_COLUMN = "ir_extended_flag"

_CORRELATION_PAIRS = [
    ("ra", "dec"), ("ra", "parallax"), ("ra", "pmra"), ("ra", "pmdec"), ("dec", "parallax"),
    ("dec", "pmra"), ("dec", "pmdec"), ("parallax", "pmra"), ("parallax", "pmdec"),
]

# Both input catalogues give positions the same way.
_CATALOGUE_POSITION = (
    Role("ra", "ra_deg", "lon", "deg", True, "right ascension (ICRS) at the catalogue epoch"),
    Role("dec", "dec_deg", "lat", "deg", True, "declination (ICRS) at the catalogue epoch"),
)

ASTROMETRIC_ROLES = (
    Role("id", "astro_id", "id", None, True, "unique source identifier (integer or text)"),
    *_CATALOGUE_POSITION,
    Role("ra_error", "ra_error_mas", "position_error", "mas", False,
         "uncertainty of RA at the catalogue epoch, including cos(dec)"),
    Role("dec_error", "dec_error_mas", "position_error", "mas", False, "uncertainty of declination at the catalogue epoch"),
    Role("parallax", "parallax_mas", "value", "mas", True, "parallax"),
    Role("parallax_error", "parallax_error_mas", "error", "mas", True, "parallax uncertainty"),
    Role("pmra", "pmra_mas_yr", "value", "mas / yr", True, "proper motion in RA, including cos(dec)"),
    Role("pmdec", "pmdec_mas_yr", "value", "mas / yr", True, "proper motion in declination"),
    Role("pmra_error", "pmra_error_mas_yr", "error", "mas / yr", True, "uncertainty of pmra"),
    Role("pmdec_error", "pmdec_error_mas_yr", "error", "mas / yr", True, "uncertainty of pmdec"),
    Role("pm_corr", "pm_corr", "corr", None, False, "correlation of the two proper-motion components (pmra, pmdec)"),
    *(
        Role(f"{a}_{b}_corr", f"{a}_{b}_corr", "corr", None, False, f"correlation of {a} and {b}")
        for a, b in _CORRELATION_PAIRS
    ),
    Role("fit_quality", "fit_quality", "value", None, False,
         "astrometric fit-quality indicator (larger = worse fit, e.g. a normalised error of unit weight)"),
    Role("extent", EXTENT_COLUMN, "value", "mag", False,
         "how extended the source looks, in mag: 0 for a point source, larger when extended (e.g. "
         "point-source-fit minus aperture magnitude)"),
    Role("extent_error", EXTENT_ERROR_COLUMN, "error", "mag", False, "uncertainty of the extent"),
    Role("extended_flag", ASTRO_EXTENDED_FLAG_COLUMN, "flag", None, False,
         "nonzero (or true) when the catalogue judges the source extended"),
    Role("ebv", "ebv_mag", "value", "mag", False,
         "Galactic reddening E(B-V) toward the source, e.g. read from a dust map; with [physics.extinction] "
         "it dereddens magnitudes before luminosities and optical - infrared colours"),
)

INFRARED_ROLES = (
    Role("id", "ir_id", "id", None, True, "unique source identifier (integer or text)"),
    *_CATALOGUE_POSITION,
    Role("position_error", "pos_error_arcsec", "position_error", "arcsec", False,
         "positional uncertainty (1 sigma, per axis, the same on both axes)"),
    Role("ra_error", "ir_ra_error_arcsec", "position_error", "arcsec", False,
         "uncertainty of RA including cos(dec), when the catalogue gives one per axis"),
    Role("dec_error", "ir_dec_error_arcsec", "position_error", "arcsec", False,
         "uncertainty of declination, when the catalogue gives one per axis"),
    Role("ra_dec_corr", "ir_ra_dec_corr", "corr", None, False, "correlation of the RA and declination errors"),
    Role("flags", "ir_flags", "text", None, False, "quality flags, kept as text"),
    Role("extended_flag", IR_EXTENDED_FLAG_COLUMN, "flag", None, False,
         "nonzero (or true) when the source is resolved (extended) in the infrared beam"),
)

KNOWN_ROLES = (
    Role("name", "known_name", "text", None, True, "name of the known object"),
    Role("ra", "ra_deg", "lon", "deg", True, "right ascension (ICRS)"),
    Role("dec", "dec_deg", "lat", "deg", True, "declination (ICRS)"),
    Role("class", "known_class", "text", None, True, "class, e.g. quasar, star, galaxy"),
    Role("redshift", "redshift", "value", None, False, "redshift"),
)

#: Roles that describe a catalogue's positional errors (any one of these sets is enough for the
#: probabilistic cross-match; a configured floor replaces them).
POSITION_ERROR_ROLES = {"astrometric": (("ra_error", "dec_error"),),
                        "infrared": (("position_error",), ("ra_error", "dec_error"))}

ROLES = {"astrometric": ASTROMETRIC_ROLES, "infrared": INFRARED_ROLES, "known": KNOWN_ROLES}

#: Canonical name of the identifier column of each catalogue.
ID_COLUMN = {"astrometric": "astro_id", "infrared": "ir_id", "known": "known_name"}


def optical_mag_column(band: str) -> str:
    """Canonical column of an optical band (AB magnitudes), e.g. ``opt_broad_abmag``."""
    return f"opt_{band}_abmag"


def optical_error_column(band: str) -> str:
    """Canonical column of an optical band's magnitude uncertainty, in mag."""
    return f"opt_{band}_mag_error"


def band_suffix(band: str) -> str:
    """The column-name form of an infrared band label (``"3.4"`` → ``"3p4"``): the one translation."""
    return INFRARED_BANDS[band]


def infrared_mag_column(band: str) -> str:
    """Canonical column of an infrared band (Vega magnitudes); ``band`` is a label such as ``"3.4"``."""
    return f"ir_{band_suffix(band)}_vegamag"


def infrared_error_column(band: str) -> str:
    """Canonical column of an infrared band's magnitude uncertainty, in mag."""
    return f"ir_{band_suffix(band)}_mag_error"


def role(catalogue: str, name: str) -> Role:
    """Look a role up by catalogue and role name."""
    for r in ROLES[catalogue]:
        if r.role == name:
            return r
    raise KeyError(name)


_UNIT_SUFFIXES = (("_per_sr", "1 / sr"), ("_erg_s", "erg / s"), ("_msun_yr", "solMass / yr"),
                  ("_msun_day", "solMass / d"), ("_msun", "solMass"), ("_angstrom", "Angstrom"),
                  ("_mas_yr", "mas / yr"), ("_mas", "mas"), ("_arcsec", "arcsec"), ("_deg", "deg"),
                  ("_vegamag", "mag"), ("_abmag", "mag"), ("_mag_error", "mag"), ("_mag", "mag"), ("_jyear", "yr"))


def unit_of(column: str) -> str | None:
    """The unit a canonical column name carries in its suffix (``ra_deg`` → ``deg``), or None."""
    for suffix, unit in _UNIT_SUFFIXES:
        if column.endswith(suffix):
            return unit
    return None
