"""One tile through every stage: load with margins, propagate, cross-match, select, rank.

The stages are pure functions over columnar tables (:func:`match_tile`, :func:`select`,
:func:`rank_candidates`); :func:`process_tile` does the reading and ``batch.run_tile`` the writing, so the same
code serves a full run, the tuning loop (which re-applies :func:`select` to the cached features)
and the tests.

Ownership: an astrometric source belongs to the tile its catalogue position falls in, so every
source is processed in exactly one tile. Its infrared counterparts, and the astrometric
neighbours that compete for them (the blend count), are read from every tile within the margin.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np
import pyarrow as pa

from . import schema, tiles
from .astrometry import propagate, zero_motion
from .config import Config
from .crossmatch import nearest_within, pairs_within, radec_to_xyz
from .io import read_parquet
from .photometry import LinearCut, apply_criteria, apply_linear_cut, vega_to_ab

_ARCSEC_PER_RAD = 180.0 / np.pi * 3600.0

#: Columns the match adds to each astrometric source in the feature cache.
MATCH_COLUMNS = ("tile", "ra_match_deg", "dec_match_deg", "ir_id", "ir_ra_deg", "ir_dec_deg", "sep_arcsec",
                 "n_ir_within", "ir_blend_count", "gal_l_deg", "gal_b_deg")

#: Reason codes for rows a tile cannot use (kept out of the cut-flow, written to the tile's rejects).
TILE_REJECT_REASONS = ("zero_astrometric_error",)


# --- loading ----------------------------------------------------------------------------------

def _disc_filter(table: pa.Table, tile: int, order: int, margin_arcsec: float) -> pa.Table:
    """Keep rows within the tile's circumscribed disc grown by the margin.

    A cheap necessary condition for lying within the margin of the tile: it drops most of each
    neighbour tile with one dot product per row before any tree is built.
    """
    if table.num_rows == 0:
        return table
    centre, reach = tiles.circumscribed_disc(tile, order)
    cos_limit = np.cos(min(np.pi, reach + margin_arcsec / _ARCSEC_PER_RAD))
    xyz = radec_to_xyz(table.column("ra_deg").to_numpy(), table.column("dec_deg").to_numpy(), workers=1)
    return table.filter(pa.array(xyz @ centre >= cos_limit))


def load_tile(cfg: Config, tile: int, on_input=None):
    """Read a tile's own astrometric sources and everything within the margins around it.

    Parameters
    ----------
    on_input : callable, optional
        Called as ``on_input(catalogue, tile_id, path, part)`` for every tile file consulted, with
        the rows taken from it (``None`` when the file does not exist); the batch runner uses it
        to record exactly what a tile's result depends on.

    Returns
    -------
    own : pyarrow.Table
        Astrometric sources owned by ``tile`` (every column).
    neighbours : pyarrow.Table
        Astrometric sources of other tiles within the blend margin (positions and motions only).
    infrared : pyarrow.Table
        Infrared sources within the match margin.
    """
    order = cfg.tiling.order
    root = cfg.tiles_dir
    own_path = tiles.tile_file(root, "astrometric", order, tile)
    own = read_parquet(own_path)
    report = on_input or (lambda *args: None)
    report("astrometric", tile, own_path, own)
    dt = abs(cfg.epoch_difference_yr)
    r = cfg.match.radius_arcsec
    pm_own = _pm_total(own)
    # counterparts of owned sources lie within r + (own largest shift) of the tile: exact, whatever
    # the proper motions; competitors are allowed the configured cap on top of that
    ir_margin = r + max(np.nanmax(pm_own, initial=0.0), 0.0) * dt / 1000.0
    astro_margin = ir_margin + r + cfg.match.max_proper_motion_mas_yr * dt / 1000.0
    ir_parts = []
    for t in tiles.tiles_near(tile, order, ir_margin):
        path = tiles.tile_file(root, "infrared", order, int(t))
        part = _disc_filter(read_parquet(path), tile, order, ir_margin) if path.exists() else None
        report("infrared", int(t), path, part)
        if part is not None:
            ir_parts.append(part)
    neighbour_parts = []
    for t in tiles.tiles_near(tile, order, astro_margin):
        path = tiles.tile_file(root, "astrometric", order, int(t))
        if t != tile and path.exists():
            # neighbours only compete for counterparts: their positions and motions are all we need
            neighbour_parts.append(_disc_filter(read_parquet(path, columns=_NEIGHBOUR_COLUMNS), tile, order,
                                                astro_margin))
            report("astrometric", int(t), path, neighbour_parts[-1])
        elif t != tile:
            report("astrometric", int(t), path, None)
    infrared = _concat(ir_parts) if ir_parts else _empty_infrared(cfg)
    neighbours = _concat(neighbour_parts) if neighbour_parts else own.select(_NEIGHBOUR_COLUMNS).slice(0, 0)
    return own, neighbours, infrared


_NEIGHBOUR_COLUMNS = ["astro_id", "ra_deg", "dec_deg", "pmra_mas_yr", "pmdec_mas_yr"]


def _concat(parts):
    return pa.concat_tables(parts, promote_options="permissive")


@lru_cache(maxsize=4)
def _empty_infrared_schema(bands: tuple[str, ...], has_err: tuple[bool, ...]):
    fields = [("ir_id", pa.string()), ("ra_deg", pa.float64()), ("dec_deg", pa.float64())]
    for b, e in zip(bands, has_err):
        fields.append((schema.infrared_mag_column(b), pa.float64()))
        if e:
            fields.append((schema.infrared_error_column(b), pa.float64()))
    return pa.schema(fields)


def _empty_infrared(cfg):
    bands = tuple(m.band for m in cfg.infrared.magnitudes)
    errs = tuple(bool(m.error_column) for m in cfg.infrared.magnitudes)
    return _empty_infrared_schema(bands, errs).empty_table()


def _pm_total(table: pa.Table) -> np.ndarray:
    pmra = table.column("pmra_mas_yr").to_numpy(zero_copy_only=False)
    pmdec = table.column("pmdec_mas_yr").to_numpy(zero_copy_only=False)
    return np.hypot(pmra, pmdec)


# --- matching -----------------------------------------------------------------------------------

def _propagated(table: pa.Table, dt_yr: float):
    """Positions at the infrared epoch; sources without a proper motion stay where they are."""
    ra = table.column("ra_deg").to_numpy()
    dec = table.column("dec_deg").to_numpy()
    pmra = np.nan_to_num(table.column("pmra_mas_yr").to_numpy(zero_copy_only=False), nan=0.0)
    pmdec = np.nan_to_num(table.column("pmdec_mas_yr").to_numpy(zero_copy_only=False), nan=0.0)
    if dt_yr == 0.0:
        return ra, dec
    p = propagate(ra, dec, pmra, pmdec, dt_yr)
    return p.ra_deg, p.dec_deg


@dataclass
class TileMatch:
    """The cross-match of one tile.

    Attributes
    ----------
    features : pyarrow.Table
        One row per owned astrometric source with at least one infrared source within the radius.
    pairs : pyarrow.Table
        Every (astro_id, ir_id, sep_arcsec) pair within the radius for owned sources.
    n_input : int
        Owned astrometric sources.
    infrared : pyarrow.Table or None
        One row per infrared source owned by the tile (its position falls in it): ``ir_id`` and
        ``n_astro_within``, how many astrometric sources (at the infrared epoch) lie within the
        radius — the blend count of every infrared source, matched or not. None unless the tiling
        order was given.
    """

    features: pa.Table
    pairs: pa.Table
    n_input: int
    infrared: pa.Table | None = None


def match_tile(own: pa.Table, neighbours: pa.Table, infrared: pa.Table, tile: int, radius_arcsec: float,
               dt_yr: float, order: int | None = None) -> TileMatch:
    """Cross-match the owned sources of a tile against the infrared sources around it.

    Parameters
    ----------
    own : pyarrow.Table
        Astrometric sources owned by the tile (canonical columns).
    neighbours : pyarrow.Table
        Astrometric sources of neighbouring tiles (``_NEIGHBOUR_COLUMNS``), for the blend count.
    infrared : pyarrow.Table
        Infrared sources covering the owned sources' match margin.
    tile : int
        The tile id, written into the features.
    radius_arcsec : float
        Match radius, applied at the infrared epoch.
    dt_yr : float
        Infrared epoch minus astrometric epoch (Julian years).
    order : int, optional
        Tiling order; when given, the blend count of every infrared source owned by the tile is
        returned as well (``TileMatch.infrared``).
    """
    ra_own, dec_own = _propagated(own, dt_yr)
    ra_nb, dec_nb = _propagated(neighbours, dt_yr)
    ra_m, dec_m = np.concatenate([ra_own, ra_nb]), np.concatenate([dec_own, dec_nb])
    ir_ra = infrared.column("ra_deg").to_numpy()
    ir_dec = infrared.column("dec_deg").to_numpy()
    own_pairs = pairs_within(ra_own, dec_own, ir_ra, ir_dec, radius_arcsec, workers=1)
    nearest = nearest_within(own_pairs, own.num_rows)
    matched = np.flatnonzero(nearest.index_b >= 0)
    ir_for = nearest.index_b[matched]
    # blend count: every astrometric source (own or neighbour) within the radius of an infrared
    # source, for the counterparts of owned sources and for the tile's own infrared sources
    ir_own = (tiles.tile_of(ir_ra, ir_dec, order) == tile) if order is not None else np.zeros(len(ir_ra), bool)
    counted = np.union1d(np.unique(ir_for), np.flatnonzero(ir_own))
    blend_pairs = pairs_within(ir_ra[counted], ir_dec[counted], ra_m, dec_m, radius_arcsec, workers=1)
    blend = np.bincount(blend_pairs.index_a, minlength=len(counted))
    blend_for = blend[np.searchsorted(counted, ir_for)]
    ir_table = None
    if order is not None:
        own_ir = np.flatnonzero(ir_own)
        ir_table = pa.table({"ir_id": infrared.column("ir_id").take(pa.array(own_ir, pa.int64())),
                             "n_astro_within": pa.array(blend[np.searchsorted(counted, own_ir)].astype(np.int64))})

    rows = matched
    feats = own.take(pa.array(rows, pa.int64()))
    ir_sel = infrared.take(pa.array(ir_for, pa.int64()))
    l_deg, b_deg = galactic(feats.column("ra_deg").to_numpy(), feats.column("dec_deg").to_numpy())
    add = {
        "tile": pa.array(np.full(len(rows), tile, np.int64)),
        "ra_match_deg": pa.array(ra_m[rows]),
        "dec_match_deg": pa.array(dec_m[rows]),
        "ir_id": ir_sel.column("ir_id"),
        "ir_ra_deg": ir_sel.column("ra_deg"),
        "ir_dec_deg": ir_sel.column("dec_deg"),
        "sep_arcsec": pa.array(nearest.separation_arcsec[matched]),
        "n_ir_within": pa.array(nearest.n_within[matched].astype(np.int64)),
        "ir_blend_count": pa.array(blend_for.astype(np.int64)),
        "gal_l_deg": pa.array(l_deg),
        "gal_b_deg": pa.array(b_deg),
    }
    for name in ir_sel.column_names:
        if name not in ("ir_id", "ra_deg", "dec_deg"):
            add[name] = ir_sel.column(name)
    for name, col in add.items():
        feats = feats.append_column(name, col)
    pairs = pa.table({
        "astro_id": own.column("astro_id").take(pa.array(own_pairs.index_a, pa.int64())),
        "ir_id": infrared.column("ir_id").take(pa.array(own_pairs.index_b, pa.int64())),
        "sep_arcsec": pa.array(own_pairs.separation_arcsec),
    })
    return TileMatch(feats, pairs, own.num_rows, ir_table)


@lru_cache(maxsize=1)
def _galactic_matrix() -> np.ndarray:
    """Rotation from ICRS to Galactic unit vectors, taken from astropy's Galactic frame once."""
    from astropy.coordinates import Galactic, SkyCoord
    import astropy.units as u

    basis = SkyCoord(ra=[0.0, 90.0, 0.0] * u.deg, dec=[0.0, 0.0, 90.0] * u.deg, frame="icrs")
    g = basis.transform_to(Galactic()).cartesian
    return np.vstack([g.x.value, g.y.value, g.z.value])  # columns are the images of the ICRS axes


def galactic(ra_deg, dec_deg):
    """Galactic longitude and latitude (deg) of ICRS positions, as astropy's Galactic frame gives them."""
    xyz = radec_to_xyz(ra_deg, dec_deg, workers=1) @ _galactic_matrix().T
    l_deg = np.degrees(np.arctan2(xyz[:, 1], xyz[:, 0])) % 360.0
    b_deg = np.degrees(np.arcsin(np.clip(xyz[:, 2], -1.0, 1.0)))
    return l_deg, b_deg


# --- selection ----------------------------------------------------------------------------------

def _col(table: pa.Table, name: str) -> np.ndarray:
    if name not in table.column_names:
        return np.full(table.num_rows, np.nan)
    return table.column(name).to_numpy(zero_copy_only=False).astype(float, copy=False)


def tile_rejects(features: pa.Table) -> np.ndarray:
    """Rows whose astrometric errors are exactly zero: their significances would be infinite."""
    errs = [_col(features, c) for c in ("parallax_error_mas", "pmra_error_mas_yr", "pmdec_error_mas_yr")]
    return np.any(np.stack([e == 0.0 for e in errs]), axis=0)


def infrared_mags(features: pa.Table, bands) -> dict[str, np.ndarray]:
    """Vega magnitudes keyed by the photometry module's band labels (``3p4``, ...)."""
    return {schema.INFRARED_BANDS[b]: _col(features, schema.infrared_mag_column(b)) for b in bands}


@dataclass
class Selection:
    """Outcome of the selection stages over a feature table.

    Attributes
    ----------
    stages : list of (name, mask)
        Cumulative masks after each cut, in order; the last is the candidates.
    derived : dict of numpy arrays
        Columns computed from the selection settings (significances, colour excess, score).
    """

    stages: list = field(default_factory=list)
    derived: dict = field(default_factory=dict)

    @property
    def passed(self) -> np.ndarray:
        return self.stages[-1][1]


def select(features: pa.Table, cfg: Config, p_quasar: np.ndarray | None = None) -> Selection:
    """Apply the zero-motion test, the colour criteria and the optional cuts to matched sources.

    Parameters
    ----------
    features : pyarrow.Table
        Feature-cache rows (matched sources, tile rejects already removed).
    cfg : Config
        Only the selection sections are read (motion, colours, ranking, classifier).
    p_quasar : numpy.ndarray, optional
        Classifier probabilities; when given, ``classifier.threshold`` is applied as a last cut
        and candidates are ranked by it.
    """
    m = cfg.motion
    n = features.num_rows
    zm = zero_motion(
        _col(features, "parallax_mas"), _col(features, "parallax_error_mas"),
        _col(features, "pmra_mas_yr"), _col(features, "pmdec_mas_yr"),
        _col(features, "pmra_error_mas_yr"), _col(features, "pmdec_error_mas_yr"),
        _col(features, "pmra_pmdec_corr"), parallax_zero_point_mas=m.parallax_zero_point_mas,
        error_inflation=m.error_inflation,
    )
    has_solution = np.isfinite(zm.parallax_snr) & np.isfinite(zm.pm_chi2)
    sel = Selection()
    keep = np.ones(n, bool)

    def stage(name, mask):
        nonlocal keep
        keep = keep & mask
        sel.stages.append((name, keep.copy()))

    stage("matched", np.ones(n, bool))
    if m.require_solution:
        stage("astrometric_solution", has_solution)
    if m.fit_quality_max is not None:
        stage("fit_quality", _col(features, "fit_quality") <= m.fit_quality_max)
    # without a solution (and require_solution = false) the motion tests have nothing to reject
    stage("parallax", ~has_solution | (np.abs(zm.parallax_snr) <= m.parallax_snr_max))
    stage("proper_motion", ~has_solution | (zm.pm_pvalue >= m.pm_pvalue_min))

    c = cfg.colours
    mags = infrared_mags(features, cfg.infrared_bands())
    crit = apply_criteria(mags, c.criteria, c.combine)
    # with a model, the published criteria may be left to the classifier, which then sees every
    # source that passed the zero-motion test
    replaced = p_quasar is not None and not cfg.classifier.require_colour_criteria
    colour_ok = np.ones(n, bool) if replaced else crit.passed
    excess = crit.excess_mag
    if c.linear_cuts:
        quantities = dict(mags)
        for band in cfg.optical_bands():
            quantities[f"opt_{band}"] = _col(features, schema.optical_mag_column(band))
        for spec in c.linear_cuts:
            cut = LinearCut(spec.name, tuple(_label(q) for q in spec.y), tuple(_label(q) for q in spec.x),
                            spec.slope, spec.intercept, spec.side).checked()
            res = apply_linear_cut(quantities, cut)
            colour_ok = colour_ok & res.passed
    stage("infrared_colour", colour_ok)
    if c.optical_infrared is not None:
        oi = c.optical_infrared
        opt = _col(features, schema.optical_mag_column(oi.optical_band))
        ir_ab = vega_to_ab(mags[schema.INFRARED_BANDS[oi.infrared_band]], schema.INFRARED_BANDS[oi.infrared_band])
        colour = opt - ir_ab
        ok = np.isfinite(colour)
        if oi.min_mag is not None:
            ok &= colour >= oi.min_mag
        if oi.max_mag is not None:
            ok &= colour <= oi.max_mag
        stage("optical_infrared", ok)
    if c.galactic_latitude_min_deg is not None:
        stage("galactic_latitude", np.abs(_col(features, "gal_b_deg")) >= c.galactic_latitude_min_deg)
    if p_quasar is not None:
        stage("classifier", np.nan_to_num(p_quasar, nan=0.0) >= cfg.classifier.threshold)

    r = cfg.ranking
    bright = _col(features, schema.infrared_mag_column(r.brightness_band))
    score = criteria_score(excess, bright, r.brightness_pivot_mag, r.brightness_weight)
    sel.derived = {
        "parallax_snr": zm.parallax_snr, "pm_chi2": zm.pm_chi2, "pm_pvalue": zm.pm_pvalue,
        "colour_excess_mag": excess, "criteria_score": score,
    }
    if p_quasar is not None:
        sel.derived["p_quasar"] = np.asarray(p_quasar, float)
    return sel


def _label(name: str) -> str:
    return schema.INFRARED_BANDS.get(name, name)


def criteria_score(excess_mag, bright_mag, pivot_mag: float, weight: float) -> np.ndarray:
    """Ranking score used until a classifier is configured.

    ``score = colour excess over the criterion boundary (mag) + weight · (pivot − m)``: redder
    than the boundary means more secure hot-dust colours, brighter means cheaper spectroscopy and
    smaller photometric errors. A missing band scores as if at the pivot.
    """
    brightness = np.nan_to_num(pivot_mag - np.asarray(bright_mag, float), nan=0.0)
    return np.nan_to_num(np.asarray(excess_mag, float), nan=0.0) + weight * brightness


def cutflow(n_input: int, n_matched_input: int, sel: Selection) -> list[tuple[str, int]]:
    """Rows left after each stage, starting from every usable owned source of the tile(s)."""
    rows = [("input", int(n_input)), ("matched", int(n_matched_input))]
    rows += [(name, int(mask.sum())) for name, mask in sel.stages[1:]]
    return rows


def candidates_table(features: pa.Table, sel: Selection) -> pa.Table:
    """Candidates: passing rows with the derived columns, sorted by score (then id) for determinism."""
    idx = np.flatnonzero(sel.passed)
    out = features.take(pa.array(idx, pa.int64()))
    for name, values in sel.derived.items():
        out = out.append_column(name, pa.array(np.asarray(values)[idx]))
    return sort_by_score(out)


def rank_candidates(table: pa.Table) -> pa.Table:
    """The merged ranked list: sorted by score (then id) with a ``rank`` column from 1."""
    table = sort_by_score(table)
    return table.add_column(0, "rank", pa.array(np.arange(1, table.num_rows + 1, dtype=np.int64)))


def sort_by_score(table: pa.Table) -> pa.Table:
    key = "p_quasar" if "p_quasar" in table.column_names else "criteria_score"
    if table.num_rows == 0:
        return table
    return table.sort_by([(key, "descending"), ("astro_id", "ascending")])


# --- one tile, with I/O -------------------------------------------------------------------------

@dataclass
class TileResult:
    tile: int
    n_rows: int
    features: pa.Table
    candidates: pa.Table
    rejects: pa.Table
    cutflow: list
    pairs: pa.Table | None = None
    infrared: pa.Table | None = None


def process_tile(cfg: Config, tile: int, scorer=None, keep_pairs: bool = False) -> TileResult:
    """Run every stage for one tile and return its tables (nothing written)."""
    own, neighbours, infrared = load_tile(cfg, tile)
    m = match_tile(own, neighbours, infrared, tile, cfg.match.radius_arcsec, cfg.epoch_difference_yr,
                   cfg.tiling.order)
    result = select_tile(cfg, tile, own.num_rows, m.features, scorer, m.pairs if keep_pairs else None)
    result.infrared = m.infrared
    return result


def select_tile(cfg: Config, tile: int, n_rows: int, features: pa.Table, scorer=None, pairs=None) -> TileResult:
    """The selection half of a tile: rejects, cuts, scores, cut-flow (shared by run and tune)."""
    bad = tile_rejects(features)
    rejects = features.filter(pa.array(bad)).select(["astro_id"]).append_column(
        "reason", pa.array([TILE_REJECT_REASONS[0]] * int(bad.sum()), pa.string()))
    usable = features.filter(pa.array(~bad))
    p = scorer(usable) if scorer is not None else None
    sel = select(usable, cfg, p)
    flow = cutflow(n_rows - int(bad.sum()), usable.num_rows, sel)
    return TileResult(tile, n_rows, features, candidates_table(usable, sel), rejects, flow, pairs)


def tile_output_dir(cfg: Config, tile: int):
    return cfg.run_dir / "tiles" / f"tile{int(tile):08d}"


def read_tile_cutflow(cfg: Config, tile: int) -> dict:
    return json.loads((tile_output_dir(cfg, tile) / "cutflow.json").read_text())


def check_accounting(n_rows: int, n_rejects: int, flow: list) -> None:
    """Rows of a tile = rejects + input; the cut-flow never increases. Raises on a violation."""
    counts = [c for _, c in flow]
    if flow[0][1] + n_rejects != n_rows or any(b > a for a, b in zip(counts, counts[1:])):
        from .errors import SelectorError

        raise SelectorError(f"internal error: row accounting does not add up ({n_rows} rows, {n_rejects} rejects, "
                            f"cut-flow {flow}); the results were not written")
