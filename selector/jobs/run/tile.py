"""One tile through every stage: read, match, select (nothing written here).
"""

from __future__ import annotations

import json
from dataclasses import dataclass
import pyarrow as pa

from selector.core.candidate_physics import candidate_columns
from selector.core.selection import TILE_REJECT_REASONS, candidates_table, cutflow, select, tile_rejects
from selector.core.tiles import max_margin_arcsec
from selector.core.tilematch import ChanceEstimate, MatchSettings, TileMatch, chance_estimate, match_tile
from selector.errors import SelectorError
from selector.store.tilereader import LoadedTile, load_tile
from selector.settings.config import Config
from selector.store.layout import layout_of


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
    chance: ChanceEstimate | None = None


def match_settings(cfg: Config) -> MatchSettings:
    """The match settings of a configuration (``[match]`` and the catalogues' position keys)."""
    m, a, i = cfg.match, cfg.astrometric, cfg.infrared
    return MatchSettings(
        radius_arcsec=m.radius_arcsec, dt_yr=cfg.epoch_difference_yr, order=cfg.tiling.order, method=m.method,
        n_sigma=m.n_sigma, completeness=m.expected_completeness, ambiguity_ratio=m.ambiguity_ratio,
        astrometric_floor_arcsec=a.position_floor_arcsec or 0.0, astrometric_inflation=a.position_error_inflation,
        infrared_floor_arcsec=i.position_floor_arcsec or 0.0, infrared_inflation=i.position_error_inflation,
        max_proper_motion_mas_yr=m.max_proper_motion_mas_yr, chance_shift_arcsec=m.chance_shift_arcsec,
        chance_shifts=m.chance_shifts)


def load_and_match(cfg: Config, tile: int, on_input=None, *, cache=None) -> tuple[LoadedTile, TileMatch]:
    """Load a tile with its margins and match it, growing the margins until the assignment is exact.

    The one-to-one assignment of an owned source depends on every pair connected to it through shared
    sources; when such a chain reaches the edge of the loaded area the tile is read again with the margin
    the match asks for, so a tiled run gives the same counterparts as the untiled sky. The tile's
    ``read_s`` is the time of every reading.
    """
    settings = match_settings(cfg)
    loaded = load_tile(cfg, tile, on_input, cache=cache)
    read_s = loaded.read_s
    limit = 3.0 * max_margin_arcsec(cfg.tiling.order)
    while True:
        m = match_tile(loaded.own, loaded.neighbours, loaded.infrared, tile, settings=settings, area=loaded.area)
        if m.needs_ir_margin_arcsec is None:
            return loaded._replace(read_s=read_s), m
        if m.needs_ir_margin_arcsec > limit:
            raise SelectorError(f"tile {tile}: a chain of competing counterparts reaches more than "
                                f"{limit:.0f} arcsec beyond the tile; the field is too crowded for match.radius_arcsec "
                                f"= {cfg.match.radius_arcsec}: lower it or match.n_sigma, or use a lower tiling.order")
        loaded = load_tile(cfg, tile, on_input, cache=cache, ir_margin_arcsec=m.needs_ir_margin_arcsec)
        read_s += loaded.read_s


def process_tile(cfg: Config, tile: int, scorer=None, keep_pairs: bool = False) -> TileResult:
    """Run every stage for one tile and return its tables (nothing written)."""
    loaded, m = load_and_match(cfg, tile)
    result = select_tile(cfg, tile, loaded.own.num_rows, m.features, scorer,
                         pairs=m.pairs if keep_pairs else None)
    result.infrared = m.infrared
    result.chance = estimate_chance(cfg, result, m.chance, n_shifted=m.n_chance_sources, scorer=scorer)
    return result


def estimate_chance(cfg: Config, result: TileResult, chance: pa.Table | None, *, n_shifted: int,
                    scorer=None) -> ChanceEstimate | None:
    """Expected chance counterparts among a tile's matched sources and candidates.

    The chance pairs of the shifted sources go through the same selection as the real matches, so the
    estimate for the candidates follows every cut.
    """
    if chance is None or n_shifted <= 0:
        return None
    shifted = select_tile(cfg, result.tile, chance.num_rows, chance, scorer)
    n_matched = result.features.num_rows
    return chance_estimate(result.n_rows, n_matched, n_shifted, chance.num_rows, shifted.candidates.num_rows)


def select_tile(cfg: Config, tile: int, n_rows: int, features: pa.Table, scorer=None, *,
                pairs=None, redshifts=None) -> TileResult:
    """The selection half of a tile: rejects, cuts, scores, cut-flow (shared by run and tune).

    With ``redshifts`` (a model's photometric-redshift predictor), the candidates also get their
    redshifts and luminosities (:func:`selector.core.candidate_physics.candidate_columns`).
    """
    bad = tile_rejects(features)
    rejects = features.filter(pa.array(bad)).select(["astro_id"]).append_column(
        "reason", pa.array([TILE_REJECT_REASONS[0]] * int(bad.sum()), pa.string()))
    usable = features.filter(pa.array(~bad))
    p = scorer(usable) if scorer is not None else None
    sel = select(usable, cfg, p)
    flow = cutflow(n_rows - int(bad.sum()), usable.num_rows, sel)
    candidates = candidates_table(usable, sel)
    if redshifts is not None:
        candidates = candidate_columns(candidates, redshifts(candidates), cfg)
    return TileResult(tile, n_rows, features, candidates, rejects, flow, pairs)


def read_tile_cutflow(cfg: Config, tile: int) -> dict:
    """A tile's recorded cut-flow file: ``tile``, ``rows``, ``rejects``, ``cutflow``."""
    return json.loads(layout_of(cfg).tile_cutflow(tile).read_text())
