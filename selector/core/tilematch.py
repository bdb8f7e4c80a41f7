"""The cross-match of one tile: propagate, pair, weigh, assign one-to-one, count blends and chance matches.

Pure functions over columnar tables (no files): the tile reader supplies the tables, the run job writes the
result. Ownership: an astrometric source belongs to the tile its catalogue position falls in, so every source
is processed in exactly one tile; its counterparts and competitors come from every tile within the margin.

Two methods (``MatchSettings.method``):

``probabilistic``
    Every pair within ``n_sigma`` combined standard deviations (never beyond ``radius_arcsec``) gets the
    Bayes factor of Budavári & Szalay (2008, ApJ 679, 301) from both positions' error ellipses at the
    infrared epoch and a prior from the local infrared source density (:func:`tile_density_per_sr`, the
    density of the infrared source's tile); each infrared source then becomes the counterpart of at most
    one astrometric source, the most probable pairs first (:func:`selector.core.counterparts.assign_one_to_one`).
    The greedy assignment decides each connected component of the pair graph on its own, so a tile gives
    the same answer as the whole sky when every component holding an owned source lies inside the loaded
    area; :func:`match_tile` checks that and asks for a larger margin when it does not.
``nearest``
    The nearest infrared source within ``radius_arcsec``, whatever the errors (kept for comparison).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import pyarrow as pa
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.special import expit

from selector.core import tiles
from selector.core.astrometry import propagate
from selector.core.counterparts import (Assignment, PositionCovariance, assign_one_to_one, astrometric_covariance,
                                        bayes_factor, chance_counterparts, combine_covariances, infrared_covariance,
                                        major_sigma_arcsec, posterior_log_odds, prior_from_density, rotate_covariance,
                                        search_radius_arcsec, shift_positions, tangent_offset)
from selector.core.crossmatch import nearest_within, pairs_within
from selector.core.frames import galactic, radec_to_xyz

_ARCSEC_PER_RAD = 180.0 / np.pi * 3600.0

#: Columns the match adds to each astrometric source in the feature cache.
MATCH_COLUMNS = ("tile", "ra_match_deg", "dec_match_deg", "ir_id", "ir_ra_deg", "ir_dec_deg", "sep_arcsec",
                 "n_ir_within", "ir_blend_count", "match_probability", "match_ln_bayes_factor", "n_competitors",
                 "match_ambiguous", "pair_sigma_arcsec", "gal_l_deg", "gal_b_deg")

#: Column the tile reader adds to every infrared row: the density of its tile (:func:`tile_density_per_sr`).
DENSITY_COLUMN = "ir_density_per_sr"

#: Column of the chance-match table naming the shifted copy a row comes from.
CHANCE_SHIFT_COLUMN = "chance_shift"

#: Astrometric columns that shape the positional error at the infrared epoch (those present are used).
ASTROMETRIC_ERROR_COLUMNS = ("ra_error_mas", "dec_error_mas", "pmra_error_mas_yr", "pmdec_error_mas_yr",
                             "ra_dec_corr", "pmra_pmdec_corr", "ra_pmra_corr", "dec_pmdec_corr", "ra_pmdec_corr",
                             "dec_pmra_corr")

# rows per density cell on average when choosing the cells that measure the covered area
_ROWS_PER_CELL = 8
_MAX_CELL_DEPTH = 6


@dataclass(frozen=True)
class MatchSettings:
    """Everything the match of a tile depends on (built from the configuration by the run job).

    Attributes
    ----------
    radius_arcsec : float
        Largest search radius (arcsec); the radius of the nearest method.
    dt_yr : float
        Infrared epoch minus astrometric epoch (Julian years).
    order : int or None
        Tiling order; needed for the infrared blend table and the chance matches.
    method : {"probabilistic", "nearest"}
    n_sigma : float
        Search radius of a pair in combined standard deviations (major axis).
    completeness : float
        Fraction of astrometric sources with an infrared counterpart, for the prior.
    ambiguity_ratio : float
        ``match_ambiguous`` when the runner-up has more than this fraction of the chosen probability.
    astrometric_floor_arcsec, infrared_floor_arcsec : float
        Systematic floors added in quadrature on each axis (arcsec).
    astrometric_inflation, infrared_inflation : float
        Factors on the catalogues' positional errors.
    max_proper_motion_mas_yr : float
        Largest proper motion a competitor may have (bounds the astrometric margin).
    chance_shift_arcsec : float
        Shift of the owned positions for the chance-match estimate.
    chance_shifts : int
        Shifted copies n (position angles 360° k / n + 45°), copy k moving every n-th owned source from the
        k-th; 0 skips the estimate.
    """

    radius_arcsec: float
    dt_yr: float
    order: int | None = None
    method: str = "probabilistic"
    n_sigma: float = 5.0
    completeness: float = 0.5
    ambiguity_ratio: float = 0.5
    astrometric_floor_arcsec: float = 0.0
    astrometric_inflation: float = 1.0
    infrared_floor_arcsec: float = 0.0
    infrared_inflation: float = 1.0
    max_proper_motion_mas_yr: float = 10_000.0
    chance_shift_arcsec: float = 180.0
    chance_shifts: int = 0


class LoadedArea(NamedTuple):
    """The caps around a tile inside which its infrared and astrometric rows were loaded.

    Attributes
    ----------
    centre_xyz : numpy.ndarray
        Unit vector of the tile centre.
    reach_rad : float
        Largest centre-to-corner distance of the tile (rad).
    ir_margin_arcsec, astro_margin_arcsec : float
        Infrared rows lie within ``reach + ir_margin`` of the centre, astrometric rows (at their catalogue
        epoch) within ``reach + astro_margin``; every row of either catalogue inside those caps is loaded.
    """

    centre_xyz: np.ndarray
    reach_rad: float
    ir_margin_arcsec: float
    astro_margin_arcsec: float


@dataclass
class TileMatch:
    """The cross-match of one tile.

    Attributes
    ----------
    features : pyarrow.Table
        One row per owned astrometric source with a counterpart: its columns, the counterpart's columns and
        :data:`MATCH_COLUMNS`.
    pairs : pyarrow.Table
        Every candidate (astro_id, ir_id, sep_arcsec) pair of owned sources.
    n_input : int
        Owned astrometric sources.
    infrared : pyarrow.Table or None
        One row per infrared source owned by the tile: ``ir_id`` and ``n_astro_within``, how many astrometric
        sources have it as a candidate (the blend count of every infrared source, matched or not). None unless
        the tiling order was given.
    chance : pyarrow.Table or None
        The chance matches of the shifted owned sources, in the form of ``features`` plus
        :data:`CHANCE_SHIFT_COLUMN`; None when no estimate was asked for.
    n_chance_sources : int
        Shifted sources that took part (those whose shifted position stays inside the tile).
    needs_ir_margin_arcsec : float or None
        Set (and nothing else computed) when a component of competing pairs holding an owned source reaches
        the edge of the loaded area: reload with at least this infrared margin.
    """

    features: pa.Table
    pairs: pa.Table
    n_input: int
    infrared: pa.Table | None = None
    chance: pa.Table | None = None
    n_chance_sources: int = 0
    needs_ir_margin_arcsec: float | None = None


class MatchSide(NamedTuple):
    """One side of a match: positions at the common epoch (deg) and their error ellipses (arcsec²)."""

    ra_deg: np.ndarray
    dec_deg: np.ndarray
    cov: PositionCovariance


class PairCandidates(NamedTuple):
    """Candidate pairs: indices into both sides, separation (arcsec), ln B, prior P0 and combined major-axis
    standard deviation (arcsec)."""

    ia: np.ndarray
    ib: np.ndarray
    separation_arcsec: np.ndarray
    ln_b: np.ndarray
    prior: np.ndarray
    sigma_arcsec: np.ndarray


# ---------------------------------------------------------------------------------------------------
# Local density
# ---------------------------------------------------------------------------------------------------

def tile_density_per_sr(ra_deg, dec_deg, order: int) -> float:
    """Surface density of one tile's own rows over the part of the tile they cover (per steradian).

    Parameters
    ----------
    ra_deg, dec_deg : array_like of float
        Every row of the tile (ICRS degrees).
    order : int
        Tiling order.

    Returns
    -------
    float
        ``N / (n_cells Ω_cell)``: the rows over the area of the HEALPix sub-cells holding at least one row
        (equal-area cells, Górski et al. 2005, ApJ 622, 759), at the finest sub-order with at least eight rows
        per cell on average (at most six orders below the tile). A tile the catalogue covers entirely gives
        N / Ω_tile; a tile at the edge of a survey gives the density inside the survey, not a diluted one.
        0 for an empty tile.

    Notes
    -----
    With eight rows per cell on average an uncovered-looking cell inside the footprint occurs with
    probability e⁻⁸ = 3e-4 (Poisson), so the area is not underestimated by chance holes. The tile's own
    rows alone decide the value, so every tile that loads this tile's rows computes the same number.
    """
    ra = np.asarray(ra_deg, np.float64)
    n = ra.size
    if n == 0:
        return 0.0
    depth = 0
    while depth < _MAX_CELL_DEPTH and n / 4.0 ** (depth + 1) >= _ROWS_PER_CELL:
        depth += 1
    cells = tiles.parent(tiles.fine_index(ra, np.asarray(dec_deg, np.float64)), order + depth)
    occupied = np.unique(cells).size
    return float(n / (occupied * 4.0 * np.pi / tiles.n_tiles(order + depth)))


# ---------------------------------------------------------------------------------------------------
# Positional covariances from the tables
# ---------------------------------------------------------------------------------------------------

def _float(table: pa.Table, name: str):
    if name not in table.column_names:
        return None
    return table.column(name).to_numpy(zero_copy_only=False).astype(np.float64, copy=False)


def astrometric_position_covariance(table: pa.Table, s: MatchSettings) -> PositionCovariance:
    """Error ellipse of each astrometric position carried to the infrared epoch.

    The catalogue-epoch errors and the proper-motion errors times the epoch difference, with the
    correlations given (:func:`selector.core.counterparts.astrometric_covariance`); missing columns count
    as zero. A source without a proper-motion error (no motion solution) keeps its position error alone:
    it stays where it was measured, as :func:`_propagated` leaves it.
    """
    n = table.num_rows
    zero = np.zeros(n)
    ra_e, dec_e = _float(table, "ra_error_mas"), _float(table, "dec_error_mas")
    pm_a, pm_d = _float(table, "pmra_error_mas_yr"), _float(table, "pmdec_error_mas_yr")
    corr = {name: _float(table, name) for name in ASTROMETRIC_ERROR_COLUMNS if name.endswith("_corr")}
    return astrometric_covariance(
        zero if ra_e is None else ra_e, zero if dec_e is None else dec_e, s.dt_yr,
        zero if pm_a is None else np.nan_to_num(pm_a, nan=0.0), zero if pm_d is None else np.nan_to_num(pm_d, nan=0.0),
        ra_dec_corr=corr["ra_dec_corr"], pmra_pmdec_corr=corr["pmra_pmdec_corr"],
        ra_pmra_corr=corr["ra_pmra_corr"], dec_pmdec_corr=corr["dec_pmdec_corr"],
        ra_pmdec_corr=corr["ra_pmdec_corr"], dec_pmra_corr=corr["dec_pmra_corr"],
        systematic_arcsec=s.astrometric_floor_arcsec, inflation=s.astrometric_inflation)


def infrared_position_covariance(table: pa.Table, s: MatchSettings) -> PositionCovariance:
    """Error ellipse of each infrared position: per-axis errors when mapped, else the one error, else zero."""
    ra_e, dec_e = _float(table, "ir_ra_error_arcsec"), _float(table, "ir_dec_error_arcsec")
    if ra_e is None or dec_e is None:
        one = _float(table, "pos_error_arcsec")
        ra_e = dec_e = np.zeros(table.num_rows) if one is None else one
    return infrared_covariance(ra_e, dec_e, _float(table, "ir_ra_dec_corr"),
                               systematic_arcsec=s.infrared_floor_arcsec, inflation=s.infrared_inflation)


def _take_cov(cov: PositionCovariance, index) -> PositionCovariance:
    return PositionCovariance(*(np.broadcast_to(c, (len(cov.var_east_arcsec2),))[index] if np.ndim(c) == 0
                                else np.asarray(c)[index] for c in cov))


def _concat_cov(a: PositionCovariance, b: PositionCovariance) -> PositionCovariance:
    return PositionCovariance(*(np.concatenate([np.asarray(x, np.float64), np.asarray(y, np.float64)])
                                for x, y in zip(a, b)))


# ---------------------------------------------------------------------------------------------------
# Pairs and their probabilities
# ---------------------------------------------------------------------------------------------------

def candidate_pairs(a: MatchSide, b: MatchSide, density_b, s: MatchSettings, *, workers: int = 1) -> PairCandidates:
    """Every pair within its search radius, with separation, ln B, prior and combined sigma.

    A pair is a candidate when its separation is at most ``min(n_sigma σ, radius_arcsec)``, σ the major-axis
    standard deviation of the summed error ellipse (:func:`selector.core.counterparts.search_radius_arcsec`),
    and its Bayes factor is defined. The offset of b is measured on a's tangent-plane axes (azimuthal
    equidistant, exact in separation) and b's ellipse is turned onto those axes, so the poles are ordinary
    places. The prior is ``P0 = c / (4π ρ)`` with ρ the density of b's tile (Budavári & Szalay 2008,
    ApJ 679, 301; :func:`selector.core.counterparts.prior_from_density`).
    """
    found = pairs_within(a.ra_deg, a.dec_deg, b.ra_deg, b.dec_deg, s.radius_arcsec, workers=workers)
    ia, ib = found.index_a, found.index_b
    cov_b = _take_cov(b.cov, ib)
    if _circular(cov_b):
        # a circular ellipse looks the same on any axes: the offset alone is needed, not the turn of b's axes
        east, north = _offset_east_north(a.ra_deg[ia], a.dec_deg[ia], b.ra_deg[ib], b.dec_deg[ib])
    else:
        off = tangent_offset(a.ra_deg[ia], a.dec_deg[ia], b.ra_deg[ib], b.dec_deg[ib])
        east, north = off.east_arcsec, off.north_arcsec
        cov_b = rotate_covariance(cov_b, off.rotation_rad)
    cov = combine_covariances(_take_cov(a.cov, ia), cov_b)
    sigma = major_sigma_arcsec(cov)
    ln_b = bayes_factor(east, north, cov).ln_b
    with np.errstate(invalid="ignore"):
        reach = search_radius_arcsec(np.nan_to_num(sigma, nan=np.inf), s.n_sigma, s.radius_arcsec)
        keep = (found.separation_arcsec <= reach) & np.isfinite(ln_b)
    prior = prior_from_density(np.asarray(density_b, np.float64)[ib[keep]], s.completeness)
    return PairCandidates(ia[keep], ib[keep], found.separation_arcsec[keep], ln_b[keep], prior, sigma[keep])


def assign_pairs(c: PairCandidates, n_astrometric: int, *, ambiguity_ratio: float = 0.5) -> Assignment:
    """:func:`selector.core.counterparts.assign_one_to_one` of candidate pairs, with isolated pairs set aside.

    A pair whose astrometric and infrared source have no other candidate is a component of its own: the
    greedy assignment accepts it, with no competitor and no runner-up. Most pairs of a real field are such,
    so only the pairs that share a source go through the general assignment; the result is identical.
    """
    n_a = int(n_astrometric)
    odds = posterior_log_odds(c.ln_b, c.prior)
    usable = ~np.isnan(odds)
    count_a = np.bincount(c.ia[usable], minlength=n_a)
    count_b = np.bincount(c.ib[usable], minlength=int(c.ib.max(initial=-1)) + 1)
    alone = usable & (count_a[c.ia] == 1) & (count_b[c.ib] == 1)
    shared = np.flatnonzero(usable & ~alone)
    # the general assignment on the shared pairs alone, over the astrometric sources they involve
    a_ids, a_local = np.unique(c.ia[shared], return_inverse=True)
    sub = assign_one_to_one(a_local.reshape(-1), c.ib[shared], c.ln_b[shared], c.prior[shared],
                            c.separation_arcsec[shared], n_astrometric=a_ids.size, ambiguity_ratio=ambiguity_ratio)
    out = {"pair_index": np.full(n_a, -1, np.int64), "ib": np.full(n_a, -1, np.int64), "probability": np.zeros(n_a),
           "ln_b": np.full(n_a, np.nan), "ln_odds": np.full(n_a, np.nan), "separation_arcsec": np.full(n_a, np.nan),
           "n_candidates": np.zeros(n_a, np.int64), "n_rivals": np.zeros(n_a, np.int64),
           "n_competitors": np.zeros(n_a, np.int64), "runner_up_ratio": np.full(n_a, np.nan),
           "ambiguous": np.zeros(n_a, bool)}
    for name, value in sub._asdict().items():
        out[name][a_ids] = value
    chosen = a_ids[sub.pair_index >= 0]
    out["pair_index"][chosen] = shared[sub.pair_index[sub.pair_index >= 0]]
    k = np.flatnonzero(alone)
    a = c.ia[k]
    out["pair_index"][a] = k
    out["ib"][a] = c.ib[k]
    out["probability"][a] = expit(odds[k])
    out["ln_b"][a] = c.ln_b[k]
    out["ln_odds"][a] = odds[k]
    out["separation_arcsec"][a] = c.separation_arcsec[k]
    out["n_candidates"][a] = 1
    return Assignment(**out)


def _circular(cov: PositionCovariance) -> bool:
    v_e, v_n, c_en = (np.asarray(x) for x in cov)
    return bool(np.array_equal(v_e, v_n) and not np.any(c_en))


def _offset_east_north(ra_a_deg, dec_a_deg, ra_b_deg, dec_b_deg):
    """b seen from a on a's east and north axes (arcsec), azimuthal equidistant: as
    :func:`selector.core.counterparts.tangent_offset`, without the turn of b's axes.

    With Δα = α_b − α_a the direction cosines of b on a's (east, north, radial) axes are
    (cos δ_b sin Δα, sin δ_b cos δ_a − cos δ_b sin δ_a cos Δα, sin δ_b sin δ_a + cos δ_b cos δ_a cos Δα)
    (spherical trigonometry, common practice); six sines and cosines per pair instead of eight.
    """
    d_ra = np.radians(ra_b_deg - ra_a_deg)
    dec_a, dec_b = np.radians(dec_a_deg), np.radians(dec_b_deg)
    sin_da, cos_da = np.sin(dec_a), np.cos(dec_a)
    sin_db, cos_db = np.sin(dec_b), np.cos(dec_b)
    cos_dra = np.cos(d_ra)
    e = cos_db * np.sin(d_ra)
    n = sin_db * cos_da - cos_db * sin_da * cos_dra
    w = sin_db * sin_da + cos_db * cos_da * cos_dra
    chord_perp = np.hypot(e, n)
    psi = np.arctan2(chord_perp, w)
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = np.where(chord_perp > 0.0, psi / chord_perp, 1.0) * _ARCSEC_PER_RAD
    return e * scale, n * scale


def _propagated(table: pa.Table, dt_yr: float):
    """Positions at the infrared epoch; sources without a proper motion stay where they are."""
    ra = table.column("ra_deg").to_numpy()
    dec = table.column("dec_deg").to_numpy()
    if dt_yr == 0.0 or table.num_rows == 0:
        return ra, dec
    pmra = np.nan_to_num(table.column("pmra_mas_yr").to_numpy(zero_copy_only=False), nan=0.0)
    pmdec = np.nan_to_num(table.column("pmdec_mas_yr").to_numpy(zero_copy_only=False), nan=0.0)
    p = propagate(ra, dec, pmra, pmdec, dt_yr)
    return p.ra_deg, p.dec_deg


def _angle_from_arcsec(centre_xyz, ra_deg, dec_deg) -> np.ndarray:
    if len(ra_deg) == 0:
        return np.zeros(0)
    xyz = radec_to_xyz(ra_deg, dec_deg, workers=1)
    # atan2 of |cross| and dot stays accurate at every distance
    cross = np.linalg.norm(np.cross(xyz, centre_xyz), axis=1)
    return np.arctan2(cross, xyz @ centre_xyz) * _ARCSEC_PER_RAD


def _margin_needed(c: PairCandidates, *, n_own: int, n_a: int, a_pos, b_pos, area: LoadedArea,
                   s: MatchSettings) -> float | None:
    """None when every pair component holding an owned source lies inside the loaded area, else the margin.

    An astrometric node has all its candidates when its search disc (radius_arcsec around its position at
    the infrared epoch) lies inside the infrared cap; an infrared node has all its competitors when every
    astrometric source that could reach it (radius_arcsec plus the largest allowed proper motion times the
    epoch difference) lies inside the astrometric cap. Greedy one-to-one decisions depend only on the
    component, so complete components decide exactly as on the untiled sky.
    """
    n_b = len(b_pos[0])
    if c.ia.size == 0:
        return None
    graph = coo_matrix((np.ones(c.ia.size, np.int8), (c.ia, n_a + c.ib)), shape=(n_a + n_b, n_a + n_b))
    _, label = connected_components(graph, directed=False)
    owned = np.zeros(label.max() + 1, bool)
    owned[label[:n_own]] = True
    in_owned = owned[label]
    reach_arcsec = area.reach_rad * _ARCSEC_PER_RAD
    shift = s.max_proper_motion_mas_yr * abs(s.dt_yr) / 1000.0
    # a node closer than a milliarcsecond to the edge counts as open: rounding of the distances (here and in
    # the reader's cap filter) must never make an open node look complete
    eps = 1e-3
    a_check = np.flatnonzero(in_owned[:n_a])
    a_check = a_check[a_check >= n_own]  # owned sources are complete by construction of the margins
    b_check = np.flatnonzero(in_owned[n_a:])
    need = []
    if a_check.size:
        d = _angle_from_arcsec(area.centre_xyz, a_pos[0][a_check], a_pos[1][a_check]) + s.radius_arcsec
        over = d - (reach_arcsec + area.ir_margin_arcsec)
        if np.any(over > -eps):
            need.append(float(np.max(d)) - reach_arcsec)
    if b_check.size:
        d = _angle_from_arcsec(area.centre_xyz, b_pos[0][b_check], b_pos[1][b_check]) + s.radius_arcsec + shift
        over = d - (reach_arcsec + area.astro_margin_arcsec)
        if np.any(over > -eps):
            # the reader keeps astro_margin = ir_margin + radius + shift
            need.append(float(np.max(d)) - reach_arcsec - s.radius_arcsec - shift)
    if not need:
        return None
    # grow generously: a chain that reached the edge once is likely to reach a little further
    return max(max(need), 1.5 * area.ir_margin_arcsec) + 2.0 * s.radius_arcsec


# ---------------------------------------------------------------------------------------------------
# The tile
# ---------------------------------------------------------------------------------------------------

def _features(own: pa.Table, infrared: pa.Table, rows, ir_for, columns: dict) -> pa.Table:
    """Owned rows with their counterparts' columns and the match columns, in :data:`MATCH_COLUMNS` order."""
    feats = own.take(pa.array(rows, pa.int64()))
    ir_sel = infrared.take(pa.array(ir_for, pa.int64()))
    l_deg, b_deg = galactic(feats.column("ra_deg").to_numpy(), feats.column("dec_deg").to_numpy())
    add = {**columns, "ir_id": ir_sel.column("ir_id"), "ir_ra_deg": ir_sel.column("ra_deg"),
           "ir_dec_deg": ir_sel.column("dec_deg"), "gal_l_deg": pa.array(l_deg), "gal_b_deg": pa.array(b_deg)}
    for name in MATCH_COLUMNS:
        feats = feats.append_column(name, add[name])
    for name in ir_sel.column_names:
        if name not in ("ir_id", "ra_deg", "dec_deg"):
            feats = feats.append_column(name, ir_sel.column(name))
    return feats


def _density(infrared: pa.Table) -> np.ndarray:
    d = _float(infrared, DENSITY_COLUMN)
    if d is None:
        raise ValueError(f"the infrared rows lack {DENSITY_COLUMN}; the tile reader adds it")
    return d


def match_tile(own: pa.Table, neighbours: pa.Table, infrared: pa.Table, tile: int, *, settings: MatchSettings,
               area: LoadedArea | None = None) -> TileMatch:
    """Cross-match the owned sources of a tile against the infrared sources around it.

    Parameters
    ----------
    own : pyarrow.Table
        Astrometric sources owned by the tile (canonical columns).
    neighbours : pyarrow.Table
        Astrometric sources of other tiles within the astrometric margin (positions, motions and their errors):
        the competitors.
    infrared : pyarrow.Table
        Infrared sources within the infrared margin, with :data:`DENSITY_COLUMN` (probabilistic method).
    tile : int
        The tile id, written into the features.
    settings : MatchSettings
    area : LoadedArea, optional
        Where the rows were loaded. When given (probabilistic method), components of competing pairs that reach
        the edge are detected and ``TileMatch.needs_ir_margin_arcsec`` is returned instead of a result.
    """
    s = settings
    if s.method == "nearest":
        return _match_nearest(own, neighbours, infrared, tile, s)
    n_own = own.num_rows
    ra_own, dec_own = _propagated(own, s.dt_yr)
    ra_nb, dec_nb = _propagated(neighbours, s.dt_yr)
    ra_a, dec_a = np.concatenate([ra_own, ra_nb]), np.concatenate([dec_own, dec_nb])
    n_a = len(ra_a)
    cov_own = astrometric_position_covariance(own, s)
    cov_a = _concat_cov(cov_own, astrometric_position_covariance(neighbours, s))
    ir_ra = infrared.column("ra_deg").to_numpy()
    ir_dec = infrared.column("dec_deg").to_numpy()
    ir_side = MatchSide(ir_ra, ir_dec, infrared_position_covariance(infrared, s))
    density = _density(infrared)
    c = candidate_pairs(MatchSide(ra_a, dec_a, cov_a), ir_side, density, s)
    if area is not None:
        need = _margin_needed(c, n_own=n_own, n_a=n_a, a_pos=(ra_a, dec_a), b_pos=(ir_ra, ir_dec), area=area, s=s)
        if need is not None:
            return TileMatch(own.slice(0, 0), pa.table({}), n_own, needs_ir_margin_arcsec=need)
    asg = assign_pairs(c, n_a, ambiguity_ratio=s.ambiguity_ratio)
    blend = np.bincount(c.ib, minlength=len(ir_ra)).astype(np.int64)
    rows = np.flatnonzero(asg.pair_index[:n_own] >= 0)
    ir_for = asg.ib[rows]
    columns = _match_columns(tile, rows, asg, pos=(ra_a, dec_a), sigma=c.sigma_arcsec, blend=blend)
    feats = _features(own, infrared, rows, ir_for, columns)
    owned_pairs = c.ia < n_own
    pairs = pa.table({
        "astro_id": own.column("astro_id").take(pa.array(c.ia[owned_pairs], pa.int64())),
        "ir_id": infrared.column("ir_id").take(pa.array(c.ib[owned_pairs], pa.int64())),
        "sep_arcsec": pa.array(c.separation_arcsec[owned_pairs]),
    })
    chance, n_shifted = None, 0
    if s.chance_shifts > 0 and s.order is not None:
        chance, n_shifted = _chance_matches(own, infrared, tile, s, real=c, real_pos=(ra_a, dec_a), cov_own=cov_own,
                                            ir_side=ir_side, density=density)
    return TileMatch(feats, pairs, n_own, _infrared_blend(infrared, tile, s.order, blend), chance, n_shifted)


def _match_columns(tile, rows, asg, *, pos, sigma, blend) -> dict:
    ra_a, dec_a = pos
    chosen = asg.pair_index[rows]
    return {
        "tile": pa.array(np.full(len(rows), tile, np.int64)),
        "ra_match_deg": pa.array(ra_a[rows]),
        "dec_match_deg": pa.array(dec_a[rows]),
        "sep_arcsec": pa.array(asg.separation_arcsec[rows]),
        "n_ir_within": pa.array(asg.n_candidates[rows].astype(np.int64)),
        "ir_blend_count": pa.array(blend[asg.ib[rows]]),
        "match_probability": pa.array(asg.probability[rows]),
        "match_ln_bayes_factor": pa.array(asg.ln_b[rows]),
        "n_competitors": pa.array(asg.n_competitors[rows].astype(np.int64)),
        "match_ambiguous": pa.array(np.asarray(asg.ambiguous[rows], bool)),
        "pair_sigma_arcsec": pa.array(sigma[chosen]),
    }


def _infrared_blend(infrared: pa.Table, tile: int, order: int | None, blend: np.ndarray) -> pa.Table | None:
    if order is None:
        return None
    ir_ra = infrared.column("ra_deg").to_numpy()
    ir_dec = infrared.column("dec_deg").to_numpy()
    own_ir = np.flatnonzero(tiles.tile_of(ir_ra, ir_dec, order) == tile)
    return pa.table({"ir_id": infrared.column("ir_id").take(pa.array(own_ir, pa.int64())),
                     "n_astro_within": pa.array(blend[own_ir].astype(np.int64))})


def _shift_angles_deg(n: int) -> np.ndarray:
    # 45° off the axes, so that no shift runs along a tile edge of the equatorial HEALPix rows
    return 45.0 + 360.0 * np.arange(n) / n


def _chance_matches(own, infrared, tile, s: MatchSettings, *, real: PairCandidates, real_pos, cov_own, ir_side,
                    density):
    """Match the owned sources again after shifting them: every pair a shifted source gets is a chance pair.

    Only shifted positions that stay inside the tile take part, so their search discs lie inside the
    loaded infrared area (the infrared margin is at least the radius). Each shifted copy is assigned
    one-to-one together with the real pairs (``real``, positions ``real_pos``), so a shifted source wins
    an infrared source only from whoever would compete for it on the sky: an infrared source that is the
    counterpart of a nearby astrometric source is mostly taken by it, as it is for a real source without a
    counterpart. Matching against the shifted catalogue (common practice for the false-match rate) without
    that competition overestimates the chance matches where most infrared sources have a counterpart.
    """
    n_real, n_own = len(real_pos[0]), own.num_rows
    copies, ra_parts, dec_parts = [], [], []
    for k, angle in enumerate(_shift_angles_deg(s.chance_shifts)):
        # copy k moves every n-th owned source, so the shifted sources add only 1/n to the density of
        # competitors and each source is moved once
        pick = np.arange(k, n_own, s.chance_shifts)
        moved = shift_positions(real_pos[0][pick], real_pos[1][pick], s.chance_shift_arcsec, angle)
        stays = tiles.tile_of(moved.ra_deg, moved.dec_deg, s.order) == tile
        copies.append(pick[stays])
        ra_parts.append(moved.ra_deg[stays])
        dec_parts.append(moved.dec_deg[stays])
    inside_all = np.concatenate(copies)
    n_shifted = int(inside_all.size)
    if n_shifted:
        # one pair search for every copy at once (each source's pairs depend on its own position alone),
        # cut into the copies below: the search is most of the estimate's cost
        ra_all, dec_all = np.concatenate(ra_parts), np.concatenate(dec_parts)
        found = candidate_pairs(MatchSide(ra_all, dec_all, _take_cov(cov_own, inside_all)), ir_side, density, s)
        bounds = np.cumsum([0] + [c.size for c in copies])
        cut = np.searchsorted(found.ia, bounds)  # the pairs come sorted by their astrometric index
    n_ir = len(ir_side.ra_deg)
    blend_real = np.bincount(real.ib, minlength=n_ir)
    picked, ir_for, columns, shift_of = [], [], [], []
    for k, inside in enumerate(copies):
        if inside.size == 0:
            continue
        lo, hi, first = cut[k], cut[k + 1], bounds[k]
        shifted = PairCandidates(*(x[lo:hi] for x in found))._replace(ia=found.ia[lo:hi] - first)
        ra, dec = ra_all[first:first + inside.size], dec_all[first:first + inside.size]
        # the shifted sources compete only with the real pairs of their own components of the pair graph, and
        # the greedy assignment decides each component alone: assign those, not every real pair again
        sub, a_ids = _components_touching(real, shifted.ib, n_real=n_real, n_ir=n_ir)
        m = a_ids.size
        both = PairCandidates(*(np.concatenate([a, b]) for a, b in zip(sub, shifted)))
        both = both._replace(ia=np.concatenate([sub.ia, shifted.ia + m]))
        asg = assign_pairs(both, m + inside.size, ambiguity_ratio=s.ambiguity_ratio)
        blend = blend_real + np.bincount(shifted.ib, minlength=n_ir)
        local = np.flatnonzero(asg.pair_index[m:] >= 0)
        pos = (np.concatenate([real_pos[0][a_ids], ra]), np.concatenate([real_pos[1][a_ids], dec]))
        columns.append(_match_columns(tile, m + local, asg, pos=pos, sigma=both.sigma_arcsec, blend=blend))
        picked.append(inside[local])
        ir_for.append(asg.ib[m + local])
        shift_of.append(np.full(local.size, k, np.int64))
    if picked:
        joined = {name: pa.concat_arrays([c[name] for c in columns]) for name in columns[0]}
        part = _features(own, infrared, np.concatenate(picked), np.concatenate(ir_for), joined)
        return part.append_column(CHANCE_SHIFT_COLUMN, pa.array(np.concatenate(shift_of))), n_shifted
    none = np.zeros(0, np.int64)
    asg = assign_one_to_one(none, none, np.zeros(0), np.zeros(0), np.zeros(0), n_astrometric=0)
    columns = _match_columns(tile, none, asg, pos=(np.zeros(0), np.zeros(0)), sigma=np.zeros(0), blend=none)
    empty = _features(own, infrared, none, none, columns)
    return empty.append_column(CHANCE_SHIFT_COLUMN, pa.array(none)), n_shifted


def _components_touching(real: PairCandidates, ir_hit: np.ndarray, *, n_real: int, n_ir: int):
    """The real pairs in the components of the pair graph that hold any of the infrared sources ``ir_hit``.

    Returns the pairs, their astrometric indices renumbered 0..m-1 in ascending order of the original ones
    (so every order among them is kept), and the original indices (length m). The closure alternates:
    astrometric sources with a pair to a marked infrared source, then every infrared source of theirs,
    until nothing new is marked.
    """
    ir_mark = np.zeros(n_ir, bool)
    ir_mark[ir_hit] = True
    marked = int(ir_mark.sum())
    while True:
        a_mark = np.zeros(n_real, bool)
        a_mark[real.ia[ir_mark[real.ib]]] = True
        take = a_mark[real.ia]
        ir_mark[real.ib[take]] = True
        now = int(ir_mark.sum())
        if now == marked:
            break
        marked = now
    rows = np.flatnonzero(take)
    a_ids = np.flatnonzero(a_mark)
    renumber = np.cumsum(a_mark) - 1
    sub = PairCandidates(*(x[rows] for x in real))
    return sub._replace(ia=renumber[sub.ia]), a_ids


def _match_nearest(own, neighbours, infrared, tile, s: MatchSettings) -> TileMatch:
    """The nearest infrared source within the radius (the method before match probabilities)."""
    ra_own, dec_own = _propagated(own, s.dt_yr)
    ra_nb, dec_nb = _propagated(neighbours, s.dt_yr)
    ra_m, dec_m = np.concatenate([ra_own, ra_nb]), np.concatenate([dec_own, dec_nb])
    ir_ra = infrared.column("ra_deg").to_numpy()
    ir_dec = infrared.column("dec_deg").to_numpy()
    own_pairs = pairs_within(ra_own, dec_own, ir_ra, ir_dec, s.radius_arcsec, workers=1)
    nearest = nearest_within(own_pairs, own.num_rows)
    rows = np.flatnonzero(nearest.index_b >= 0)
    ir_for = nearest.index_b[rows]
    # blend count: every astrometric source (own or neighbour) within the radius of an infrared source, for
    # the counterparts of owned sources and for the tile's own infrared sources
    ir_own = (tiles.tile_of(ir_ra, ir_dec, s.order) == tile) if s.order is not None else np.zeros(len(ir_ra), bool)
    counted = np.union1d(np.unique(ir_for), np.flatnonzero(ir_own))
    blend_pairs = pairs_within(ir_ra[counted], ir_dec[counted], ra_m, dec_m, s.radius_arcsec, workers=1)
    blend_counted = np.bincount(blend_pairs.index_a, minlength=len(counted))
    blend = np.zeros(len(ir_ra), np.int64)
    blend[counted] = blend_counted
    n_within = nearest.n_within[rows].astype(np.int64)
    columns = {
        "tile": pa.array(np.full(len(rows), tile, np.int64)),
        "ra_match_deg": pa.array(ra_m[rows]),
        "dec_match_deg": pa.array(dec_m[rows]),
        "sep_arcsec": pa.array(nearest.separation_arcsec[rows]),
        "n_ir_within": pa.array(n_within),
        "ir_blend_count": pa.array(blend[ir_for]),
        # no probabilities without errors; competitors are the other sources within the radius on both sides
        "match_probability": pa.array(np.full(len(rows), np.nan)),
        "match_ln_bayes_factor": pa.array(np.full(len(rows), np.nan)),
        "n_competitors": pa.array(n_within - 1 + blend[ir_for] - 1),
        "match_ambiguous": pa.array(np.zeros(len(rows), bool)),
        "pair_sigma_arcsec": pa.array(np.full(len(rows), np.nan)),
    }
    feats = _features(own, infrared, rows, ir_for, columns)
    pairs = pa.table({
        "astro_id": own.column("astro_id").take(pa.array(own_pairs.index_a, pa.int64())),
        "ir_id": infrared.column("ir_id").take(pa.array(own_pairs.index_b, pa.int64())),
        "sep_arcsec": pa.array(own_pairs.separation_arcsec),
    })
    return TileMatch(feats, pairs, own.num_rows, _infrared_blend(infrared, tile, s.order, blend))


# ---------------------------------------------------------------------------------------------------
# Chance counterparts of a tile
# ---------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class ChanceEstimate:
    """Expected chance counterparts of one tile (or a sum of tiles), from the shifted-position matches.

    Attributes
    ----------
    shifted_sources : int
        Shifted sources that took part (n).
    shifted_matches : int
        Of those, how many were given a (chance) counterpart (k).
    shifted_candidates : int
        Of those chance pairs, how many pass the whole selection (k_c).
    unmatched_sources : int
        Owned sources without a counterpart in the real match (N − A).
    open_sources : float
        Sources open to a chance counterpart, those without a true one: ``N − A + F``.
    expected_matches, expected_matches_error : float
        Expected chance counterparts F among the matched sources, and its binomial standard error.
    expected_candidates, expected_candidates_error : float
        Expected chance counterparts among the candidates, and its binomial standard error.
    """

    shifted_sources: int
    shifted_matches: int
    shifted_candidates: int
    unmatched_sources: int
    open_sources: float
    expected_matches: float
    expected_matches_error: float
    expected_candidates: float
    expected_candidates_error: float

    def as_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}

    @classmethod
    def total(cls, parts) -> "ChanceEstimate":
        """The sum over tiles (they are independent): expectations add, binomial variances add.

        A tile without any shifted chance pair has no variance of its own; when no tile has one, the
        error is that of one count at the pooled rate (the one-count floor of each tile, applied once
        rather than once per tile, which would grow with the number of tiles).
        """
        parts = [p for p in parts if p.shifted_sources > 0]
        if not parts:
            return cls(0, 0, 0, 0, 0.0, 0.0, 0.0, 0.0, 0.0)
        n = sum(p.shifted_sources for p in parts)
        k = sum(p.shifted_matches for p in parts)
        k_c = sum(p.shifted_candidates for p in parts)
        var_m = sum(_binomial_variance(p.shifted_matches, p.shifted_sources)
                    * (p.unmatched_sources / (1.0 - p.shifted_matches / p.shifted_sources) ** 2) ** 2 for p in parts)
        var_c = sum(_binomial_variance(p.shifted_candidates, p.shifted_sources) * p.open_sources ** 2 for p in parts)
        unmatched = sum(p.unmatched_sources for p in parts)
        open_sources = sum(p.open_sources for p in parts)
        err_m = float(np.sqrt(var_m)) if k else unmatched / n
        err_c = float(np.sqrt(var_c)) if k_c else open_sources / n
        return cls(n, k, k_c, unmatched, float(open_sources), float(sum(p.expected_matches for p in parts)), err_m,
                   float(sum(p.expected_candidates for p in parts)), err_c)


def _binomial_variance(k: int, n: int) -> float:
    """Variance of the rate k/n of a binomial count (common practice)."""
    f = k / n
    return k * (1.0 - f) / (n * n)


def chance_estimate(n_sources: int, n_matched: int, n_shifted: int, shifted_matches: int,
                    shifted_candidates: int) -> ChanceEstimate:
    """Expected chance counterparts among a tile's matched sources and among its candidates.

    Parameters
    ----------
    n_sources : int
        Owned astrometric sources N.
    n_matched : int
        Of those, how many were given a counterpart (A).
    n_shifted : int
        Shifted sources n that took part in the chance matches.
    shifted_matches, shifted_candidates : int
        Shifted sources given a chance counterpart (k), and how many of those pairs pass the selection (k_c).

    Returns
    -------
    ChanceEstimate
        With f = k/n, the expected chance matches ``F = f (N − A)/(1 − f)``
        (:func:`selector.core.counterparts.chance_counterparts`); the sources open to a chance match are those
        without a true counterpart, ``N − A + F``, and a fraction ``f_c = k_c/n`` of them gets a chance
        counterpart that passes the selection: ``F_c = f_c (N − A + F)``, with the binomial error of f_c
        (at least that of one count). All zero when nothing was shifted.
    """
    unmatched = max(int(n_sources) - int(n_matched), 0)
    if n_shifted <= 0:
        return ChanceEstimate(0, 0, 0, unmatched, float(unmatched), 0.0, 0.0, 0.0, 0.0)
    m = chance_counterparts(np.ones(shifted_matches), n_shifted, n_sources, n_matched, threshold=0.5)
    open_sources = unmatched + m.expected
    f_c = shifted_candidates / n_shifted
    f_c_error = np.sqrt(max(shifted_candidates, 1) * (1.0 - f_c)) / n_shifted
    return ChanceEstimate(int(n_shifted), int(shifted_matches), int(shifted_candidates), unmatched,
                          float(open_sources), float(m.expected), float(m.error), float(f_c * open_sources),
                          float(f_c_error * open_sources))
