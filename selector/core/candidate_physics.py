"""Redshifts, luminosities, Eddington limits and accretion rates of candidates, as table columns.

Given a redshift (median and 68 % interval) per candidate and its photometry, this module computes
every luminosity column of the ranked list with the science of :mod:`selector.core.luminosity`:

* the distance modulus in the configured cosmology;
* the absolute magnitude normalised at ``z = 2``, ``M(z=2)`` (Richards et al. 2006, AJ 131, 2766),
  in the reference band (the band nearest 7500 Å, like the red magnitudes of that paper);
* the rest-frame ``λL_λ`` at 1350, 3000 and 5100 Å, each from the observed band nearest to
  ``(1+z)·λ_rest`` (power-law continuum ``f_ν ∝ ν^α_ν``);
* the bolometric luminosity ``L_bol = BC·λL_λ`` at the rest wavelength whose nearest band needs the
  shortest extrapolation (so the luminosity rests on the best-sampled part of the spectrum);
* the smallest black-hole mass that keeps the source at or below its Eddington limit, and the
  accretion-rate range over the configured radiative efficiencies.

Intervals (``*_low``/``*_high``) follow from the redshift interval
(:func:`selector.core.luminosity.interval_over_redshift`). Magnitudes are dereddened first when the
table has the ``ebv_mag`` column and ``[physics].extinction`` a coefficient for the band.

Nothing here reads files or settings: the configuration is passed in duck-typed (its
``astrometric``/``infrared`` magnitudes and its ``physics`` section).
"""

from __future__ import annotations

from typing import NamedTuple

import astropy.units as u
import numpy as np
import pyarrow as pa

from selector.core import luminosity, schema
from selector.core.photometry import VEGA_TO_AB_MAG

__all__ = ["CANDIDATE_COLUMNS", "COLUMNS", "REFERENCE_WAVELENGTH_ANGSTROM", "Band", "GridCosmology", "Redshifts",
           "add_columns", "adopt_spectroscopic", "beyond_labelled", "candidate_columns", "dereddened",
           "expected_luminosity",
           "grid_cosmology", "luminosity_columns", "photometric_bands"]

#: The band nearest this observed wavelength (Å) carries ``M(z=2)``; Richards et al. 2006 (AJ 131,
#: 2766) quote it in a red band near 7500 Å, which at z = 2 samples about 2500 Å in the rest frame.
REFERENCE_WAVELENGTH_ANGSTROM = 7500.0

#: Redshift grid of :class:`GridCosmology`: from 1e-4 to 20 in ln z.
_GRID_Z = (1.0e-4, 20.0)
_GRID_POINTS = 4001

_WAVELENGTHS = tuple(int(w) for w in luminosity.REST_WAVELENGTHS_ANGSTROM)


class Band(NamedTuple):
    """A band that luminosities can use.

    Attributes
    ----------
    label : str
        The band label (``"broad"``, ``"3.4"``, ...).
    column : str
        Canonical magnitude column in the feature cache.
    wavelength_angstrom : float
        Effective wavelength (Å).
    to_ab_mag : float
        Added to the stored magnitude to reach AB (the Vega→AB offset of an infrared band, 0 for
        optical bands, which are stored in AB).
    """

    label: str
    column: str
    wavelength_angstrom: float
    to_ab_mag: float


def photometric_bands(cfg) -> tuple[Band, ...]:
    """The configuration's bands with a known effective wavelength, shortest first.

    Optical bands need ``wavelength_angstrom`` in their magnitude entry; infrared bands take theirs
    from :data:`selector.core.schema.INFRARED_WAVELENGTH_ANGSTROM`.

    Parameters
    ----------
    cfg : Config
        Read duck-typed: ``cfg.astrometric.magnitudes`` and ``cfg.infrared.magnitudes``.

    Returns
    -------
    tuple of Band
    """
    out = [Band(m.band, schema.optical_mag_column(m.band), float(m.wavelength_angstrom), 0.0)
           for m in cfg.astrometric.magnitudes if getattr(m, "wavelength_angstrom", None) is not None]
    out += [Band(m.band, schema.infrared_mag_column(m.band), schema.INFRARED_WAVELENGTH_ANGSTROM[m.band],
                 VEGA_TO_AB_MAG[m.band]) for m in cfg.infrared.magnitudes]
    return tuple(sorted(out, key=lambda b: (b.wavelength_angstrom, b.label)))


class GridCosmology:
    """Luminosity distances of a cosmology, interpolated on a fine grid of ln z.

    astropy integrates the distance numerically for a cosmology with radiation (one integral per
    redshift); a grid of 4001 points in ln z from 1e-4 to 20 is integrated once, and ``ln d_L``,
    smooth in ``ln z``, is interpolated to about a micro-magnitude. Redshifts outside the grid go
    to astropy itself. Only :meth:`luminosity_distance` is provided, which is all
    :mod:`selector.core.luminosity` asks of a cosmology.

    Parameters
    ----------
    cosmology : astropy.cosmology.FLRW
    """

    def __init__(self, cosmology):
        self.cosmology = cosmology
        self._ln_z = np.linspace(np.log(_GRID_Z[0]), np.log(_GRID_Z[1]), _GRID_POINTS)
        self._ln_d_mpc = np.log(cosmology.luminosity_distance(np.exp(self._ln_z)).to_value(u.Mpc))

    def luminosity_distance(self, z):
        """Luminosity distance as an astropy Quantity in Mpc."""
        z = np.asarray(z, dtype=np.float64)
        inside = (z >= _GRID_Z[0]) & (z <= _GRID_Z[1])
        with np.errstate(invalid="ignore", divide="ignore"):
            d = np.exp(np.interp(np.log(np.where(inside, z, 1.0)), self._ln_z, self._ln_d_mpc))
        if not np.all(inside):
            outside = ~inside & np.isfinite(z)
            d = np.where(inside, d, np.nan)
            if outside.any():
                d[outside] = self.cosmology.luminosity_distance(z[outside]).to_value(u.Mpc)
        return d * u.Mpc


_GRIDS: dict[str, GridCosmology] = {}


def grid_cosmology(cosmology) -> GridCosmology:
    """The :class:`GridCosmology` of ``cosmology``, built once per process and parameter set."""
    key = repr(cosmology)
    if key not in _GRIDS:
        _GRIDS[key] = GridCosmology(cosmology)
    return _GRIDS[key]


class Redshifts(NamedTuple):
    """The redshift adopted for each candidate: median and 68 % interval, and where it came from.

    Attributes
    ----------
    low, median, high : numpy.ndarray
        16th, 50th and 84th percentiles (all three equal for a spectroscopic redshift).
    source : numpy.ndarray of str
        ``spec`` (spectroscopic), ``photo`` (the photometric-redshift model) or ``""`` (none).
    """

    low: np.ndarray
    median: np.ndarray
    high: np.ndarray
    source: np.ndarray


def _column(table: pa.Table, name: str) -> np.ndarray:
    if name not in table.column_names:
        return np.full(table.num_rows, np.nan)
    return table.column(name).to_numpy(zero_copy_only=False).astype(np.float64)


def _ab_mags(table: pa.Table, bands, extinction) -> np.ndarray:
    """AB magnitudes, (rows, bands), dereddened where a reddening and a coefficient are known."""
    out = np.empty((table.num_rows, len(bands)))
    for j, band in enumerate(bands):
        out[:, j] = dereddened(_column(table, band.column) + band.to_ab_mag, table, band.label, extinction)
    return out


def dereddened(mag, table: pa.Table, band: str, extinction) -> np.ndarray:
    """``mag`` less ``R_band · E(B−V)`` where the table has ``ebv_mag`` and ``extinction`` a coefficient
    for ``band``; ``mag`` unchanged otherwise (and for rows without a reddening).

    Used for luminosities and for optical − infrared colours (features and the colour cut), so both
    see the same intrinsic colours.
    """
    mag = np.asarray(mag, np.float64)
    if not extinction or band not in extinction or "ebv_mag" not in table.column_names:
        return mag
    return luminosity.deredden_mag(mag, _column(table, "ebv_mag"), band, extinction).mag


class _Photometry:
    """Magnitudes and band wavelengths of the rows, with the nearest-band choice."""

    def __init__(self, mags: np.ndarray, bands, cosmology, alpha_nu: float):
        self.mags = mags
        self.ln_lambda = np.log([b.wavelength_angstrom for b in bands])
        self.lambda_angstrom = np.array([b.wavelength_angstrom for b in bands])
        self.cosmology = cosmology
        self.alpha_nu = alpha_nu
        self.rows = np.arange(len(mags))

    def nearest(self, z: np.ndarray, rest_angstrom: float) -> tuple[np.ndarray, np.ndarray]:
        """Index of the measured band nearest ``(1+z)·λ_rest`` in ``|ln λ|``, and that distance (inf: none)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            target = np.log(np.where(z > 0.0, 1.0 + z, np.nan) * rest_angstrom)
            dist = np.abs(target[:, None] - self.ln_lambda[None, :])
        dist = np.where(np.isfinite(self.mags) & np.isfinite(dist), dist, np.inf)
        if dist.shape[1] == 0:
            return np.zeros(len(z), np.int64), np.full(len(z), np.inf)
        j = np.argmin(dist, axis=1)
        return j, dist[self.rows, j]

    def lamL(self, z: np.ndarray, rest_angstrom: float) -> np.ndarray:
        """Rest-frame ``λL_λ`` (erg/s) at ``rest_angstrom`` from the nearest measured band."""
        z = np.asarray(z, np.float64)
        if self.mags.shape[1] == 0:
            return np.full(len(z), np.nan)
        j, dist = self.nearest(z, rest_angstrom)
        value = luminosity.monochromatic_luminosity_erg_s(
            self.mags[self.rows, j], self.lambda_angstrom[j], z, rest_angstrom, cosmology=self.cosmology,
            alpha_nu=self.alpha_nu)
        return np.where(np.isfinite(dist), value, np.nan)


#: Every column :func:`luminosity_columns` writes, in order (units in the names; descriptions, UCDs and
#: written precision in :mod:`selector.core.columns`).
COLUMNS: tuple[str, ...] = (
    "redshift", "redshift_low", "redshift_high", "z_source", "distance_modulus_mag", "absmag_z2_abmag",
    *(f"lamL{w}{part}_erg_s" for w in _WAVELENGTHS for part in ("", "_low", "_high")),
    "lbol_erg_s", "lbol_low_erg_s", "lbol_high_erg_s", "lbol_from_angstrom", "min_bh_mass_msun",
    "mdot_low_msun_yr", "mdot_high_msun_yr", "mdot_low_msun_day", "mdot_high_msun_day",
)


def luminosity_columns(table: pa.Table, redshifts: Redshifts, *, bands, physics) -> dict[str, np.ndarray]:
    """Luminosity columns of candidates from their redshifts and photometry.

    Parameters
    ----------
    table : pyarrow.Table
        Candidate rows with the canonical magnitude columns (and ``ebv_mag`` when mapped).
    redshifts : Redshifts
        One per row.
    bands : sequence of Band
        From :func:`photometric_bands`.
    physics : PhysicsConfig
        Duck-typed: ``astropy_cosmology()``, ``alpha_nu``, ``bolometric_correction_table()``,
        ``efficiency_range``, ``extinction``.

    Returns
    -------
    dict of numpy.ndarray
        Every name of :data:`COLUMNS`, in its order, one value per row (NaN where unknown).
    """
    n = table.num_rows
    cosmology = grid_cosmology(physics.astropy_cosmology())
    alpha = float(physics.alpha_nu)
    bc = physics.bolometric_correction_table()
    phot = _Photometry(_ab_mags(table, bands, physics.extinction), bands, cosmology, alpha)
    z16, z50, z84 = (np.asarray(v, np.float64) for v in redshifts[:3])
    out: dict[str, np.ndarray] = {"redshift": z50, "redshift_low": z16, "redshift_high": z84,
                                  "z_source": np.asarray(redshifts.source, dtype=str),
                                  "distance_modulus_mag": luminosity.distance_modulus_mag(z50, cosmology)}
    ref = int(np.argmin([abs(np.log(b.wavelength_angstrom / REFERENCE_WAVELENGTH_ANGSTROM)) for b in bands])) \
        if bands else None
    out["absmag_z2_abmag"] = (luminosity.absolute_mag_z2(phot.mags[:, ref], z50, cosmology, alpha)
                              if ref is not None else np.full(n, np.nan))
    distance = np.full((n, len(_WAVELENGTHS)), np.inf)
    lamL_median = {}
    for k, w in enumerate(_WAVELENGTHS):
        iv = luminosity.interval_over_redshift(lambda z, w=w: phot.lamL(z, w), z16, z50, z84)
        out[f"lamL{w}_erg_s"], out[f"lamL{w}_low_erg_s"], out[f"lamL{w}_high_erg_s"] = iv.median, iv.low, iv.high
        lamL_median[w] = iv.median
        distance[:, k] = np.where(np.isfinite(iv.median), phot.nearest(z50, w)[1], np.inf)
    best = np.argmin(distance, axis=1)
    has = np.isfinite(distance[np.arange(n), best])
    chosen = np.where(has, np.asarray(_WAVELENGTHS, np.float64)[best], np.nan)

    def lbol(z):
        total = np.full(n, np.nan)
        for w in _WAVELENGTHS:
            pick = chosen == w
            if pick.any():
                total = np.where(pick, luminosity.bolometric_luminosity_erg_s(phot.lamL(z, w), w, bc), total)
        return total

    iv = luminosity.interval_over_redshift(lbol, z16, z50, z84)
    out.update({"lbol_erg_s": iv.median, "lbol_low_erg_s": iv.low, "lbol_high_erg_s": iv.high,
                "lbol_from_angstrom": chosen, "min_bh_mass_msun": luminosity.minimum_mass_msun(iv.median)})
    rates = luminosity.accretion_rate_range(iv.median, tuple(physics.efficiency_range))
    out.update({"mdot_low_msun_yr": rates.low_msun_yr, "mdot_high_msun_yr": rates.high_msun_yr,
                "mdot_low_msun_day": rates.low_msun_day, "mdot_high_msun_day": rates.high_msun_day})
    return {name: out[name] for name in COLUMNS}


def add_columns(table: pa.Table, columns: dict[str, np.ndarray]) -> pa.Table:
    """``table`` with ``columns`` appended, replacing columns of the same names in place."""
    for name, values in columns.items():
        values = np.asarray(values)
        array = pa.array(values.astype(str).tolist(), pa.string()) if values.dtype.kind in "OU" else pa.array(values)
        if name in table.column_names:
            table = table.set_column(table.column_names.index(name), name, array)
        else:
            table = table.append_column(name, array)
    return table


def expected_luminosity(p_quasar, lbol_erg_s) -> np.ndarray:
    """Expected bolometric luminosity ``P(quasar) × L_bol`` (erg/s), NaN where either is unknown.

    The luminosity a candidate contributes on average if observed: a source ten times more
    luminous at a tenth of the probability ranks level with a sure one, which is how the rare, very
    luminous candidates reach the top of the list without letting improbable ones crowd it.
    """
    return np.asarray(p_quasar, np.float64) * np.asarray(lbol_erg_s, np.float64)


def beyond_labelled(lbol_erg_s, labelled_lbol_erg_s) -> np.ndarray:
    """True where a candidate is more luminous than every labelled quasar (False where unknown)."""
    reference = np.asarray(labelled_lbol_erg_s, np.float64)
    reference = reference[np.isfinite(reference)]
    lbol = np.asarray(lbol_erg_s, np.float64)
    if reference.size == 0:
        return np.zeros(lbol.shape, bool)
    with np.errstate(invalid="ignore"):
        return np.isfinite(lbol) & (lbol > reference.max())


#: Every column a candidate list gains from a model with a redshift part, in order.
CANDIDATE_COLUMNS: tuple[str, ...] = ("z_phot", "z_phot_low", "z_phot_high", *COLUMNS, "expected_lbol_erg_s",
                                      "beyond_labelled_luminosity")


def _p_quasar(table: pa.Table) -> np.ndarray:
    return _column(table, "p_quasar")


def candidate_columns(table: pa.Table, photo: Redshifts, cfg) -> pa.Table:
    """Candidates with their photometric redshifts and every luminosity column at those redshifts.

    Parameters
    ----------
    table : pyarrow.Table
        Candidate rows (magnitudes, ``p_quasar`` where a model scored them).
    photo : Redshifts
        The model's redshifts of the rows.
    cfg : Config
        Duck-typed: its bands (:func:`photometric_bands`) and ``physics`` section.

    Returns
    -------
    pyarrow.Table
        With every column of :data:`CANDIDATE_COLUMNS` (``beyond_labelled_luminosity`` false until
        the merged list is compared with the labelled quasars).
    """
    cols = {"z_phot": photo.median, "z_phot_low": photo.low, "z_phot_high": photo.high}
    cols.update(luminosity_columns(table, photo, bands=photometric_bands(cfg), physics=cfg.physics))
    cols["expected_lbol_erg_s"] = expected_luminosity(_p_quasar(table), cols["lbol_erg_s"])
    cols["beyond_labelled_luminosity"] = np.zeros(table.num_rows, bool)
    return add_columns(table, cols)


def adopt_spectroscopic(table: pa.Table, spec_z, cfg) -> pa.Table:
    """Replace the photometric redshift by a spectroscopic one where known, and recompute those rows.

    Parameters
    ----------
    table : pyarrow.Table
        Candidates with :func:`candidate_columns`.
    spec_z : array_like
        Spectroscopic redshift per row, NaN where none (those rows are left as they are).
    cfg : Config
        Duck-typed, as for :func:`candidate_columns`.

    Returns
    -------
    pyarrow.Table
        ``z_source`` is ``spec`` on the replaced rows; their interval collapses onto the redshift.
    """
    spec_z = np.asarray(spec_z, np.float64)
    with np.errstate(invalid="ignore"):
        idx = np.flatnonzero(np.isfinite(spec_z) & (spec_z > 0.0))
    if len(idx) == 0:
        return table
    z = spec_z[idx]
    sub = table.take(pa.array(idx, pa.int64()))
    new = luminosity_columns(sub, Redshifts(z, z, z, np.full(len(idx), "spec")), bands=photometric_bands(cfg),
                             physics=cfg.physics)
    new["expected_lbol_erg_s"] = expected_luminosity(_p_quasar(sub), new["lbol_erg_s"])
    merged = {}
    for name, values in new.items():
        full = table.column(name).to_numpy(zero_copy_only=False)
        # text as objects: a fixed-width copy could truncate "spec" where every value was empty
        full = full.astype(object) if name == "z_source" else full.astype(np.float64)
        full[idx] = values
        merged[name] = full
    return add_columns(table, merged)
