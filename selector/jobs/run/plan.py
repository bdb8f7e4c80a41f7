"""Planning a run: what each tile needs, from the manifest, the input fingerprints and the outputs.

Each tile's record holds the keys its outputs were made from: the match key (matching sections of
the config and software version), the content key of the rows it read (its own file, and the part of
every neighbour file within its margins), the selection key (selection sections, classifier model
file, version) and the size and modification time of its output files. Input files are
fingerprinted by SHA-256, remembered by size and modification time, so an unchanged night reads
nothing. A tile is then *reused* (nothing to do), *re-selected* (the selection changed: cuts
re-applied to its feature cache), *checked* (an input file changed: its rows are re-read and
compared, and it is recomputed only if what it uses changed) or *computed*.
"""

from __future__ import annotations

import json
import os
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, replace
from pathlib import Path

from selector.errors import SelectorError
from selector.settings.config import Config
from selector.store.io import file_sha256
from selector.store.keys import combined_digest, match_key, model_key, model_path, selection_key
from selector.store.layout import FEATURE_FILES, SELECTION_FILES, layout_of, tile_rel_path
from selector.store.manifest import Manifest

#: What :func:`file_digest` gives for a file that exists but cannot be read.
UNREADABLE = "unreadable"

# a file modified this recently may still change within the file system's timestamp resolution,
# so its fingerprint is re-read next time instead of being trusted from size and time
_FRESH_NS = 2_000_000_000


@dataclass(frozen=True)
class TilePlan:
    """What to do with one tile; sent to the worker that does it, so plain and picklable.

    Attributes
    ----------
    mode : {"compute", "check", "select"}
        ``compute``: load, match, select. ``check``: load; match and select only if the rows read
        differ from ``content_key``, else re-select only if ``reselect``. ``select``: re-apply the
        selection to the feature cache (needs ``rows``).
    match_key, selection_key : str
        The keys the tile's outputs are made from (written into their provenance).
    model : (str, str) or None
        Classifier model path and SHA-256, or None without a classifier.
    content_key : str or None
        The recorded digest of the rows the tile read (``check`` only).
    reselect : bool
        In ``check`` mode: the selection must be re-applied even if the rows read are unchanged.
    rows : int or None
        The tile's recorded own rows (``select`` only).
    """

    mode: str
    match_key: str
    selection_key: str
    model: tuple[str, str] | None = None
    content_key: str | None = None
    reselect: bool = False
    rows: int | None = None


def compute_plan(cfg: Config, sha: str | None) -> TilePlan:
    """The plan that computes a tile from scratch with ``cfg``'s keys.

    Parameters
    ----------
    cfg : Config
    sha : str or None
        SHA-256 of the configured classifier model file (``keys.model_sha``), None without one.
    """
    return TilePlan("compute", match_key(cfg), selection_key(cfg, model_key(cfg, sha)),
                    (str(model_path(cfg)), sha) if sha else None)


def tile_rel(cfg: Config, kind: str, tile: int) -> str:
    """A tile file's path relative to the tiles folder: how the manifest names input files."""
    return tile_rel_path(kind, cfg.tiling.order, int(tile))


def ingest_summaries(cfg: Config) -> dict:
    """The ingest summaries of the astrometric and infrared catalogues, by catalogue.

    Raises
    ------
    SelectorError
        When one is missing, damaged, or was ingested at another tiling order.
    """
    lay = layout_of(cfg)
    out = {}
    for kind in ("astrometric", "infrared"):
        path = lay.ingest_summary(kind)
        if not path.exists():
            raise SelectorError(f"{path}: not found; run `selector ingest --config ...` first")
        try:
            out[kind] = json.loads(path.read_text())
        except ValueError:
            raise SelectorError(f"{path}: damaged (not JSON); run `selector ingest --config ...` again") from None
        order = out[kind].get("order")
        if order is not None and int(order) != cfg.tiling.order:
            raise SelectorError(f"{path}: the {kind} tiles were ingested at order {order} but tiling.order = "
                                f"{cfg.tiling.order}; run `selector ingest --config ...` again")
    return out


def expected_rows(ingest: dict) -> dict[int, int]:
    """Rows of each astrometric tile according to the ingest summary."""
    return {int(k): int(v) for k, v in ingest["astrometric"].get("rows_per_tile", {}).items()}


def tile_ids(cfg: Config, expected: dict[int, int]) -> list[int]:
    """The tiles of this run: those on disk, and those the ingest wrote whose file is gone.

    A tile whose file is missing is listed too, so it fails, named, instead of vanishing.
    """
    on_disk = layout_of(cfg).list_tiles("astrometric", cfg.tiling.order)
    return sorted(set(on_disk) | {t for t, n_rows in expected.items() if n_rows})


def file_digest(path: Path) -> str | None:
    """SHA-256 of a file; None when it does not exist, :data:`UNREADABLE` when it cannot be read."""
    try:
        return file_sha256(path)
    except FileNotFoundError:
        return None
    except OSError:
        return UNREADABLE


def scan_inputs(cfg: Config, man: Manifest, extra: set, threads: int, *, needed: set | None = None) -> dict:
    """SHA-256 of the tile files (relative path → digest, None if absent); unchanged files are not read.

    Parameters
    ----------
    needed : set of str, optional
        The files whose digest planning needs (the inputs of tiles that may be reused). Other
        changed files are left out of the result: the tiles that read them are computed anyway, and
        their workers return the digest of the bytes they read (:func:`file_row`), so a first run
        reads no file twice. Default: every file.
    """
    lay = layout_of(cfg)
    root = lay.tiles_dir
    paths = set(extra)
    for kind in ("astrometric", "infrared"):
        for t in lay.list_tiles(kind, cfg.tiling.order):
            paths.add(tile_rel(cfg, kind, t))
    cache = man.file_cache()
    out, todo = {}, []
    for rel in sorted(paths):
        try:
            st = os.stat(root / rel)
        except FileNotFoundError:
            out[rel] = None
            continue
        known = cache.get(rel)
        if known and known[0] == st.st_size and known[1] == st.st_mtime_ns:
            out[rel] = known[2]
        elif needed is None or rel in needed:
            todo.append((rel, st))
    with ThreadPoolExecutor(max_workers=max(1, threads)) as pool:  # hashlib releases the GIL
        digests = list(pool.map(lambda item: file_digest(root / item[0]), todo))
    rows = []
    for (rel, st), digest_ in zip(todo, digests):
        out[rel] = digest_
        if digest_ == UNREADABLE:
            continue  # the tiles that read it will fail on it, each with the reason
        rows.append(file_row(rel, digest_, st.st_size, st.st_mtime_ns))
    man.store_files(rows, [p for p in cache if p in out and out[p] in (None, UNREADABLE)])
    return out


def file_row(rel: str, sha256: str, size: int, mtime_ns: int) -> tuple[str, int, int, str]:
    """A row of the manifest's file fingerprints: path, size, time and digest of the bytes seen.

    A file modified in the last two seconds is stored with no time, so that it is hashed again next
    time rather than trusted from size and time.
    """
    mtime = -1 if time.time_ns() - mtime_ns < _FRESH_NS else mtime_ns
    return rel, size, mtime, sha256


def must_compute(cfg: Config, rec: dict | None, compute: TilePlan, force: bool = False) -> bool:
    """Whether a tile is computed whatever its inputs say (no usable record, or its feature cache is gone)."""
    return (force or rec is None or rec["status"] != "done" or rec["match_key"] != compute.match_key
            or not rec.get("inputs") or not outputs_intact(cfg, rec, FEATURE_FILES))


def output_stats(cfg: Config, tile: int, names) -> dict | None:
    """Size and modification time of each named output file of a tile; None if one is missing."""
    lay = layout_of(cfg)
    out = {}
    for name in names:
        try:
            st = os.stat(lay.tile_output(tile, name))
        except FileNotFoundError:
            return None
        out[name] = [st.st_size, st.st_mtime_ns]
    return out


def outputs_intact(cfg: Config, rec: dict, names) -> bool:
    """Whether a tile's named output files are the ones its manifest record describes."""
    recorded = rec.get("outputs") or {}
    now = output_stats(cfg, rec["tile"], names)
    return now is not None and all(recorded.get(n) == now[n] for n in names)


def inputs_key(inputs: list, shas: dict) -> str:
    """The digest of the fingerprints of a tile's consulted input files."""
    return combined_digest({rel: shas.get(rel) for rel in inputs})


def plan_tiles(cfg: Config, records: dict, shas: dict, *, tiles: list, compute: TilePlan,
               force: bool = False) -> tuple[dict[int, TilePlan], list[int]]:
    """Plan every tile against its manifest record.

    Parameters
    ----------
    cfg : Config
    records : dict
        The manifest's tile records, by tile id.
    shas : dict
        Input fingerprints from :func:`scan_inputs`.
    tiles : list of int
        The tiles of this run.
    compute : TilePlan
        The plan that computes a tile with this configuration (:func:`compute_plan`); the other
        plans carry its keys.
    force : bool
        Compute every tile whatever its record says.

    Returns
    -------
    plans : dict
        Tile id → :class:`TilePlan`, for the tiles with work to do.
    reused : list of int
        Tiles whose outputs are up to date.
    """
    plans, reused = {}, []
    for t in tiles:
        rec = records.get(t)
        if must_compute(cfg, rec, compute, force):
            plans[t] = compute
            continue
        reselect = rec["selection_key"] != compute.selection_key or not outputs_intact(cfg, rec, SELECTION_FILES)
        if inputs_key(rec["inputs"], shas) != rec["inputs_key"]:
            plans[t] = replace(compute, mode="check", content_key=rec["content_key"], reselect=reselect)
        elif reselect:
            plans[t] = replace(compute, mode="select", rows=rec["rows"])
        else:
            reused.append(t)
    return plans, reused
