"""The labelled set: label sources matched against the feature cache.

Training uses only labelled sources that pass the zero-motion test, because those are the only
sources the model is ever asked about. Brown dwarfs count as stars (through
``classifier.class_map``): they are stellar contaminants, and far too rare to learn and calibrate
as a class of their own.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from selector.core import tiles
from selector.core.crossmatch import nearest_within, pairs_within
from selector.core.selection import tile_rejects
from selector.errors import InputError, SelectorError
from selector.store import history
from selector.jobs.train.features import feature_matrix, feature_specs, zero_motion
from selector.settings.config import CLASSIFIER_CLASSES, Config
from selector.store.io import read_parquet, read_table
from selector.store.keys import match_key
from selector.store.layout import layout_of

__all__ = ["CLASSES", "QUASAR", "LabelSource", "LabelledSet", "collect_labelled", "feature_cache", "group_order",
           "label_sources", "map_classes"]

#: Classes, in the order of the probability columns (a label is an index into it).
CLASSES = CLASSIFIER_CLASSES
#: Index of the quasar class in :data:`CLASSES`.
QUASAR = CLASSES.index("quasar")


def _normalise(text: str) -> str:
    return str(text).strip().lower().replace(" ", "_").replace("-", "_")


def _text(values) -> np.ndarray:
    """Values as a numpy array of str, with "" for missing ones."""
    if not isinstance(values, (pa.Array, pa.ChunkedArray)):
        values = pa.array(values)
    text = pc.fill_null(pc.utf8_trim_whitespace(pc.cast(values, pa.string())), "")
    return np.asarray(text.to_numpy(zero_copy_only=False), dtype=str) if len(text) else np.zeros(0, str)


def map_classes(raw, class_map: dict) -> tuple[np.ndarray, dict]:
    """Class index per row (-1 where the text is not in the map) and counts of dropped texts.

    Parameters
    ----------
    raw : array-like of str
        Label texts as written (matched case-insensitively, spaces and hyphens as underscores).
    class_map : dict
        ``classifier.class_map``: text → one of :data:`CLASSES`.

    Returns
    -------
    label : numpy.ndarray of int64
    dropped : dict
        Count of rows per text outside the map (``"(empty)"`` for missing ones), sorted by text.
    """
    table = {_normalise(k): CLASSES.index(v) for k, v in class_map.items()}
    text = _text(raw)
    uniq, inverse = np.unique(text, return_inverse=True)
    # one lookup per distinct text, not per row
    codes = np.array([table.get(_normalise(v), -1) if v else -1 for v in uniq], np.int64)
    label = codes[inverse.ravel()] if len(uniq) else np.zeros(0, np.int64)
    dropped = {}
    for v, c, n in zip(uniq, codes, np.bincount(inverse.ravel(), minlength=len(uniq))):
        if c < 0:
            dropped[v or "(empty)"] = int(n)
    return label, dict(sorted(dropped.items()))


@dataclass
class LabelSource:
    """One origin of labels, in order of precedence (lower rank wins).

    Attributes
    ----------
    name : str
        As shown in the card and the summary.
    rank : int
    label : numpy.ndarray of int64
        Class index of each label.
    ids : pyarrow.Array of str or None
        Astrometric source ids (labels by identifier).
    ra_deg, dec_deg : numpy.ndarray or None
        Positions (labels by position).
    summary : dict
        Rows read and dropped, for the card.
    tiles : numpy.ndarray or None
        Tile of each positional label.
    redshift : numpy.ndarray or None
        Spectroscopic redshift of each label (NaN where none), for the photometric-redshift model.
    """

    name: str
    rank: int
    label: np.ndarray
    ids: pa.Array | None = None
    ra_deg: np.ndarray | None = None
    dec_deg: np.ndarray | None = None
    summary: dict = field(default_factory=dict)
    tiles: np.ndarray | None = None
    redshift: np.ndarray | None = None


def _redshifts(values, n: int) -> np.ndarray:
    """Redshifts as float64, NaN where missing, not a number or not positive (no redshift column: all NaN)."""
    if values is None:
        return np.full(n, np.nan)
    if not isinstance(values, (pa.Array, pa.ChunkedArray)):
        values = pa.array(values)
    if pa.types.is_string(values.type) or pa.types.is_large_string(values.type):
        values = pc.if_else(pc.fill_null(pc.match_substring_regex(values, _NUMBER), False), values,
                            pa.scalar(None, values.type))
    z = pc.fill_null(pc.cast(values, pa.float64()), np.nan).to_numpy(zero_copy_only=False).astype(np.float64)
    with np.errstate(invalid="ignore"):
        return np.where(np.isfinite(z) & (z > 0.0), z, np.nan)


def _id_source(name: str, rank: int, ids, raw_class, *, class_map: dict, extra=None, redshift=None) -> LabelSource:
    label, dropped = map_classes(raw_class, class_map)
    z = _redshifts(redshift, len(label))
    text = _text(ids)
    valid = text != ""
    invalid = int((~valid & (label >= 0)).sum())
    keep = valid & (label >= 0)
    text, label, z = text[keep], label[keep], z[keep]
    # the same id twice: one label if they agree, none if they disagree
    order = np.lexsort((label, text))
    text, label, z = text[order], label[order], z[order]
    first = np.r_[True, text[1:] != text[:-1]] if len(text) else np.zeros(0, bool)
    start = np.flatnonzero(first)
    agree = np.minimum.reduceat(label, start) == np.maximum.reduceat(label, start) if len(start) else np.zeros(0, bool)
    n_disagree = int((~agree).sum())
    text, label, z = text[start][agree], label[start][agree], z[start][agree]
    summary = {"rows": int(len(keep)), "dropped_unknown_class": dropped, "dropped_missing_id": invalid,
               "dropped_inconsistent_duplicates": n_disagree, **(extra or {})}
    return LabelSource(name, rank, label, ids=pa.array(text.tolist(), pa.string()), summary=summary, redshift=z)


def _position_source(name: str, rank: int, ra, dec, raw_class, *, class_map: dict, order: int,
                     redshift=None) -> LabelSource:
    label, dropped = map_classes(raw_class, class_map)
    z = _redshifts(redshift, len(label))
    ra = np.asarray(ra, np.float64)
    dec = np.asarray(dec, np.float64)
    valid = np.isfinite(ra) & np.isfinite(dec) & (np.abs(dec) <= 90.0)
    invalid = int((~valid & (label >= 0)).sum())
    keep = valid & (label >= 0)
    ra, dec, label = np.mod(ra[keep], 360.0), dec[keep], label[keep]
    summary = {"rows": int(len(keep)), "dropped_unknown_class": dropped, "dropped_invalid_position": invalid}
    src = LabelSource(name, rank, label, ra_deg=ra, dec_deg=dec, summary=summary, redshift=z[keep])
    src.tiles = tiles.tile_of(ra, dec, order) if len(ra) else np.zeros(0, np.int64)
    return src


_NUMBER = r"^\s*[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?\s*$"


def _as_degrees(path: Path, name: str, col, unit: str | None) -> np.ndarray:
    """A position column as float degrees; text that is not a number becomes NaN (and is dropped)."""
    if pa.types.is_string(col.type) or pa.types.is_large_string(col.type):
        numeric = pc.fill_null(pc.match_substring_regex(col, _NUMBER), False)
        col = pc.cast(pc.if_else(numeric, col, pa.scalar(None, col.type)), pa.float64())
    values = pc.fill_null(pc.cast(col, pa.float64()), np.nan).to_numpy(zero_copy_only=False).astype(np.float64)
    if unit and unit not in ("deg", "degree", "degrees"):
        import astropy.units as u

        try:
            values = (values * u.Unit(unit)).to_value(u.deg)
        except (ValueError, u.UnitConversionError):
            raise InputError(f"{path}: column '{name}' has unit {unit!r}, which is not an angle") from None
    return values


def label_sources(cfg: Config) -> list[LabelSource]:
    """Every configured origin of labels, in order of precedence.

    Parameters
    ----------
    cfg : Config

    Returns
    -------
    list of LabelSource
        Recorded follow-up outcomes (when ``[targets]`` is set), the labelled file of
        ``[classifier.labels]``, the ingested known objects (``classifier.use_known``).

    Raises
    ------
    SelectorError
        When there is no label source at all, or the known objects were not ingested.
    """
    c = cfg.classifier
    order = cfg.tiling.order
    sources = []
    if cfg.targets is not None:
        t = history.training_labels(cfg)
        if t.num_rows:
            sources.append(_id_source("follow-up outcomes", 0, t.column("astro_id"), t.column("label"),
                                      class_map=c.class_map, redshift=t.column("redshift")))
    if c.labels is not None:
        lf = c.labels
        path = cfg.path(lf.file)
        what = "labelled file named in classifier.labels.file"
        z_cols = [lf.redshift_column] if lf.redshift_column else []
        if lf.id_column is not None:
            table, _ = read_table(path, [lf.id_column, lf.class_column, *z_cols], lf.format, what=what)
            sources.append(_id_source(f"labelled file {lf.file}", 1, table.column(lf.id_column),
                                      table.column(lf.class_column), class_map=c.class_map,
                                      redshift=table.column(lf.redshift_column) if z_cols else None))
        else:
            table, units = read_table(path, [lf.ra_column, lf.dec_column, lf.class_column, *z_cols], lf.format,
                                      what=what)
            ra = _as_degrees(path, lf.ra_column, table.column(lf.ra_column), units.get(lf.ra_column))
            dec = _as_degrees(path, lf.dec_column, table.column(lf.dec_column), units.get(lf.dec_column))
            sources.append(_position_source(f"labelled file {lf.file}", 1, ra, dec, table.column(lf.class_column),
                                            class_map=c.class_map, order=order,
                                            redshift=table.column(lf.redshift_column) if z_cols else None))
    if c.use_known and cfg.known is not None:
        path = layout_of(cfg).known_objects
        if not path.exists():
            raise SelectorError(f"{path}: not found; run `selector ingest --config ...` first (or set "
                                "classifier.use_known = false)")
        z_cols = ["redshift"] if "redshift" in cfg.known.columns else []
        t = read_parquet(path, columns=["ra_deg", "dec_deg", "known_class", *z_cols])
        sources.append(_position_source("known objects", 2, t.column("ra_deg").to_numpy(zero_copy_only=False),
                                        t.column("dec_deg").to_numpy(zero_copy_only=False),
                                        t.column("known_class"), class_map=c.class_map, order=order,
                                        redshift=t.column("redshift") if z_cols else None))
    if not sources:
        raise SelectorError("no labels for training: name a labelled file in [classifier.labels], or ingest a [known] "
                            "catalogue with classifier.use_known = true, or record follow-up outcomes")
    return sources


def feature_cache(cfg: Config) -> Iterator[pa.Table]:
    """Every tile's feature cache, one table at a time, checked against the config's match settings.

    Finding no cache at all is reported at once (before any table is read); a cache built with
    other match settings when its table is reached.

    Parameters
    ----------
    cfg : Config

    Returns
    -------
    iterator of pyarrow.Table
        The ``features.parquet`` of every run tile, by ascending tile.

    Raises
    ------
    SelectorError
        No feature cache, a cache without provenance, or one with another ``match_key``.
    """
    layout = layout_of(cfg)
    paths = [layout.features(tile) for tile in layout.run_tiles()]
    paths = [p for p in paths if p.is_file()]
    if not paths:
        raise SelectorError(f"{layout.run_tiles_dir}: no feature cache; run `selector run --config ...` before "
                            "`selector train`")
    want = match_key(cfg)

    def tables():
        for path in paths:
            table = read_parquet(path)
            try:
                got = json.loads((table.schema.metadata or {})[b"provenance"])["match_key"]
            except (KeyError, ValueError, TypeError):
                raise SelectorError(f"{path}: feature cache without provenance; run `selector run --config ...` "
                                    "again") from None
            if got != want:
                raise SelectorError(f"{path}: the feature cache was built with different [astrometric], [infrared], "
                                    "[tiling] or [match] settings than this config; run `selector run --config ...` "
                                    "again")
            yield table

    return tables()


@dataclass
class LabelledSet:
    """Labelled feature-cache rows that passed the zero-motion test, ready for training.

    Attributes
    ----------
    table : pyarrow.Table
        The feature-cache rows, with ``label`` (class name) and ``label_source`` columns.
    X : numpy.ndarray, shape (rows, features)
        Model inputs (NaN where missing).
    y : numpy.ndarray of int
        Class index into :data:`CLASSES`.
    groups : numpy.ndarray of int64
        Sky region (HEALPix pixel at the grouping order) of each row.
    feature_names : list of str
    group_order : int
    summary : dict
        Training-set summary for the model card (counts by class and source, dropped labels).
    """

    table: pa.Table
    X: np.ndarray
    y: np.ndarray
    groups: np.ndarray
    feature_names: list
    group_order: int
    summary: dict


def group_order(cfg: Config) -> int:
    """HEALPix order of the cross-validation's sky regions: never finer than a tile."""
    return min(cfg.classifier.group_order, cfg.tiling.order)


def collect_labelled(cfg: Config) -> LabelledSet:
    """Match every label source against the feature cache and build the training set.

    Precedence when a source is labelled twice: recorded follow-up outcomes, then the labelled
    file, then the known-objects catalogue. A positional label is given to its nearest source
    within ``classifier.known_radius_arcsec`` only (so a neighbour of a known star is not called a
    star too).

    Parameters
    ----------
    cfg : Config

    Returns
    -------
    LabelledSet

    Raises
    ------
    SelectorError
        No feature cache, a stale one, no labels, or no label matching the cache.
    """
    cache = feature_cache(cfg)
    sources = label_sources(cfg)
    radius = cfg.classifier.known_radius_arcsec
    order = cfg.tiling.order
    names = [f.name for f in feature_specs(cfg)]
    parts, assign = [], []
    offset = 0
    for table in cache:
        usable = table.filter(pa.array(~tile_rejects(table)))
        n = usable.num_rows
        if n == 0:
            continue
        ids = pc.cast(usable.column("astro_id"), pa.string())
        rows_all, per_source = [], []
        ra = dec = None
        for s in sources:
            if s.ids is not None:
                idx = pc.fill_null(pc.index_in(ids, value_set=s.ids), -1).to_numpy(zero_copy_only=False)
                rows = np.flatnonzero(idx >= 0)
                lab_idx, sep = idx[rows].astype(np.int64), np.zeros(len(rows))
            else:
                if ra is None:
                    ra = usable.column("ra_deg").to_numpy(zero_copy_only=False)
                    dec = usable.column("dec_deg").to_numpy(zero_copy_only=False)
                tile = int(usable.column("tile")[0].as_py())
                near = np.flatnonzero(np.isin(s.tiles, tiles.tiles_near(tile, order, radius)))
                pairs = pairs_within(ra, dec, s.ra_deg[near], s.dec_deg[near], radius, workers=1)
                nearest = nearest_within(pairs, n)
                rows = np.flatnonzero(nearest.index_b >= 0)
                lab_idx, sep = near[nearest.index_b[rows]], nearest.separation_arcsec[rows]
            per_source.append((s, rows, lab_idx, sep))
            rows_all.append(rows)
        keep = np.unique(np.concatenate(rows_all)) if rows_all else np.zeros(0, np.int64)
        if len(keep) == 0:
            continue
        sub = usable.take(pa.array(keep, pa.int64()))
        passed, plx_snr, chi2 = zero_motion(sub, cfg)
        X = feature_matrix(sub, cfg, names, (plx_snr, chi2))
        parts.append((sub, X, passed))
        for s, rows, lab_idx, sep in per_source:
            assign.append((offset + np.searchsorted(keep, rows), np.full(len(rows), s.rank), lab_idx,
                           s.label[lab_idx], sep, s.redshift[lab_idx]))
        offset += len(keep)
    if not parts:
        raise SelectorError("no labelled source matched the feature cache; check the labels' identifiers or positions "
                            f"(radius classifier.known_radius_arcsec = {radius})")
    table = pa.concat_tables([p[0] for p in parts], promote_options="permissive")
    X = np.concatenate([p[1] for p in parts])
    passed = np.concatenate([p[2] for p in parts])
    row, rank, lab_idx, label = (np.concatenate([a[i] for a in assign]).astype(np.int64) for i in range(4))
    sep = np.concatenate([a[4] for a in assign]).astype(np.float64)
    zs = np.concatenate([a[5] for a in assign]).astype(np.float64)
    # a positional label names one source: its nearest, across tiles too
    positional = np.zeros(max(s.rank for s in sources) + 1, bool)
    positional[[s.rank for s in sources if s.ids is None]] = True
    by_pos = positional[rank]
    o = np.lexsort((row, sep, lab_idx, rank))
    first = np.ones(len(o), bool)
    first[1:] = (rank[o][1:] != rank[o][:-1]) | (lab_idx[o][1:] != lab_idx[o][:-1])
    drop = np.zeros(len(row), bool)
    drop[o[~first]] = by_pos[o[~first]]
    row, rank, label, zs = row[~drop], rank[~drop], label[~drop], zs[~drop]
    # per source row: the highest-precedence label; disagreements are counted
    o = np.lexsort((rank, row))
    row, rank, label, zs = row[o], rank[o], label[o], zs[o]
    head = np.r_[True, row[1:] != row[:-1]] if len(row) else np.zeros(0, bool)
    start = np.flatnonzero(head)
    conflicts = int(np.sum(np.minimum.reduceat(label, start) != np.maximum.reduceat(label, start))) if len(start) else 0
    final_row, final_rank, final_label = row[start], rank[start], label[start]
    # a quasar's redshift: the first given in order of precedence by a source that also calls it a quasar
    with_z = np.where(np.isfinite(zs) & (label == QUASAR), np.arange(len(row)), len(row))
    first_z = np.minimum.reduceat(with_z, start) if len(start) else np.zeros(0, np.int64)
    final_z = np.where((first_z < len(row)) & (final_label == QUASAR),
                       np.append(zs, np.nan)[np.minimum(first_z, len(row))], np.nan)

    summary_sources = {}
    for s in sources:
        matched = int(np.sum(rank == s.rank))
        used_rows = final_row[final_rank == s.rank]
        summary_sources[s.name] = {**s.summary, "matched": matched, "used": int(np.sum(passed[used_rows]))}
    failing = {CLASSES[k]: int(np.sum(final_label[~passed[final_row]] == k)) for k in range(len(CLASSES))}
    use = final_row[passed[final_row]]
    y = final_label[passed[final_row]]
    table = table.take(pa.array(use, pa.int64()))
    by_rank = {s.rank: s.name for s in sources}
    table = table.append_column("label", pa.array([CLASSES[k] for k in y], pa.string()))
    table = table.append_column("label_source", pa.array([by_rank[r] for r in final_rank[passed[final_row]]],
                                                         pa.string()))
    table = table.append_column("label_redshift", pa.array(final_z[passed[final_row]], pa.float64()))
    X = X[use]
    grouping = group_order(cfg)
    t = table.column("tile").to_numpy(zero_copy_only=False).astype(np.int64)
    groups = t >> (2 * (order - grouping))
    summary = {
        "rows": int(len(y)),
        "by_class": {CLASSES[k]: int(np.sum(y == k)) for k in range(len(CLASSES))},
        "sources": summary_sources,
        "precedence": [s.name for s in sorted(sources, key=lambda s: s.rank)],
        "conflicting_labels": conflicts,
        "quasars_with_redshift": int(np.sum(np.isfinite(final_z[passed[final_row]]))),
        "labelled_but_failing_zero_motion": failing,
        "brown_dwarfs": "counted as stars",
    }
    return LabelledSet(table, X, y.astype(np.int64), groups, names, grouping, summary)
