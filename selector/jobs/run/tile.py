"""One tile through every stage: read, match, select (nothing written here).
"""

from __future__ import annotations

import json
from dataclasses import dataclass
import pyarrow as pa

from selector.core.selection import TILE_REJECT_REASONS, candidates_table, cutflow, select, tile_rejects
from selector.core.tilematch import match_tile
from selector.store.tilereader import load_tile
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


def process_tile(cfg: Config, tile: int, scorer=None, keep_pairs: bool = False) -> TileResult:
    """Run every stage for one tile and return its tables (nothing written)."""
    own, neighbours, infrared = load_tile(cfg, tile)
    m = match_tile(own, neighbours, infrared, tile, radius_arcsec=cfg.match.radius_arcsec,
                   dt_yr=cfg.epoch_difference_yr, order=cfg.tiling.order)
    result = select_tile(cfg, tile, own.num_rows, m.features, scorer,
                         pairs=m.pairs if keep_pairs else None)
    result.infrared = m.infrared
    return result


def select_tile(cfg: Config, tile: int, n_rows: int, features: pa.Table, scorer=None, *,
                pairs=None) -> TileResult:
    """The selection half of a tile: rejects, cuts, scores, cut-flow (shared by run and tune)."""
    bad = tile_rejects(features)
    rejects = features.filter(pa.array(bad)).select(["astro_id"]).append_column(
        "reason", pa.array([TILE_REJECT_REASONS[0]] * int(bad.sum()), pa.string()))
    usable = features.filter(pa.array(~bad))
    p = scorer(usable) if scorer is not None else None
    sel = select(usable, cfg, p)
    flow = cutflow(n_rows - int(bad.sum()), usable.num_rows, sel)
    return TileResult(tile, n_rows, features, candidates_table(usable, sel), rejects, flow, pairs)


def read_tile_cutflow(cfg: Config, tile: int) -> dict:
    """A tile's recorded cut-flow file: ``tile``, ``rows``, ``rejects``, ``cutflow``."""
    return json.loads(layout_of(cfg).tile_cutflow(tile).read_text())
