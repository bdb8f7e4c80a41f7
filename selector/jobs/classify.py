"""The quasar classifier: features, labelled set, training, honest evaluation, safe model files.

``selector train`` learns P(quasar), P(star) and P(galaxy) from the feature cache written by
``selector run``; ``selector run`` with ``classifier.model`` set scores every source that passed the
zero-motion test with it and ranks the candidates by P(quasar).

Features (:func:`feature_specs`) are computed from cached columns only: magnitudes, infrared and
optical−infrared colours, infrared magnitude errors, the zero-motion statistics under the current
``[motion]`` settings, the match separation, the blend count and, where mapped, the astrometric fit
quality. A band that was not measured stays NaN; the model (histogram gradient boosting) learns
where missing values go at every split instead of seeing invented values.

Training uses only labelled sources that pass the zero-motion test, because those are the only
sources the model is ever asked about. Brown dwarfs count as stars: they are stellar contaminants,
and far too rare to learn and calibrate as a class of their own.

Honesty of the figures:

* folds are whole sky regions (HEALPix pixels at ``classifier.group_order``, never finer than a
  tile), so neighbouring sources, which share depth, crowding and extinction, never sit on both
  sides of a split;
* every held-out prediction comes from a model that did not see the row, and the calibration
  applied to a fold is fitted on the other folds' out-of-fold predictions;
* the published colour criteria are scored on the same held-out rows.

The final model is fitted on every labelled row; its calibration maps are fitted on all the
out-of-fold predictions (the scheme of scikit-learn's ``CalibratedClassifierCV`` with
``ensemble=False``).

Model files are skops archives checked against :data:`TRUSTED_TYPES` before anything is built
from them, next to a JSON model card holding the archive's SHA-256: a file that differs from its
card, holds any other type, is truncated or is not a model file is refused with one line.
"""

from __future__ import annotations

import io as _io
import json
import math
import platform
import warnings
import zipfile
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Callable, NamedTuple

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from selector import __version__
from selector.core import schema, tiles
from selector.jobs import targets as followup
from selector.settings.config import CLASSIFIER_CLASSES, MATCH_SECTIONS, Config, config_hash, plain
from selector.errors import InputError, SelectorError
from selector.store.io import atomic_path, iter_chunks, read_parquet, write_json, write_parquet

__all__ = [
    "CLASSES",
    "TRUSTED_TYPES",
    "FeatureSpec",
    "LabelledSet",
    "Model",
    "TrainResult",
    "collect_labelled",
    "feature_matrix",
    "feature_specs",
    "grouped_folds",
    "load_model",
    "load_scorer",
    "purity_at_completeness",
    "train",
    "train_labelled",
]

#: Classes, in the order of the probability columns.
CLASSES = CLASSIFIER_CLASSES
_QUASAR = CLASSES.index("quasar")

#: File names written by ``selector train`` below ``project.output_dir / classifier.output_folder``.
MODEL_FILE = "quasar_classifier.skops"
EVALUATION_FILE = "evaluation.json"
PREDICTIONS_FILE = "held_out_predictions.parquet"
PLOT_FILES = ("threshold_curves.png", "confusion_matrix.png", "calibration.png", "permutation_importance.png",
              "criteria_comparison.png")

_CARD_FORMAT = "selector-classifier-card"
_BUNDLE_FORMAT = "selector-classifier"
_FORMAT_VERSION = 1
#: Quasar completeness at which purities are compared.
COMPLETENESS_TARGET = 0.95
#: Probability thresholds of the completeness and purity curves.
_THRESHOLDS = np.round(np.linspace(0.0, 1.0, 101), 2)
#: Held-out rows (over all folds together) used for permutation importances: their cost grows as
#: features × repeats × rows × trees, while the ranking of the features settles with far fewer rows.
_IMPORTANCE_ROWS = 5_000
#: Rows scored at a time.
_SCORE_BLOCK_ROWS = 1 << 20

#: Every type a model archive may hold: exactly what :func:`train` writes (the model, its binning
#: and loss objects, the calibration maps, numpy arrays and scalars, plain containers). Anything
#: else in a file is refused before any object is built from it.
TRUSTED_TYPES = (
    "builtins.dict",
    "builtins.list",
    "builtins.str",
    "builtins.tuple",
    "numpy.float64",
    "numpy.ndarray",
    "numpy.random._generator.Generator",
    "numpy.uint64",
    "sklearn._loss._loss.CyHalfMultinomialLoss",
    "sklearn._loss.link.Interval",
    "sklearn._loss.link.MultinomialLogit",
    "sklearn._loss.loss.HalfMultinomialLoss",
    "sklearn.ensemble._hist_gradient_boosting.binning._BinMapper",
    "sklearn.ensemble._hist_gradient_boosting.gradient_boosting.HistGradientBoostingClassifier",
    "sklearn.ensemble._hist_gradient_boosting.predictor.TreePredictor",
    "sklearn.isotonic.IsotonicRegression",
    "sklearn.linear_model._logistic.LogisticRegression",
    "sklearn.preprocessing._label.LabelEncoder",
)


# --- features --------------------------------------------------------------------------------------

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
    out += [
        FeatureSpec("parallax_snr", "", "(parallax − zero point) / error, under the [motion] settings"),
        FeatureSpec("pm_chi2", "", "chi^2 of zero proper motion (2 degrees of freedom), under the [motion] settings"),
        FeatureSpec("sep_arcsec", "arcsec", "separation from the infrared counterpart at its epoch"),
        FeatureSpec("ir_blend_count", "", "astrometric sources within the match radius of the counterpart"),
    ]
    if "fit_quality" in cfg.astrometric.columns:
        out.append(FeatureSpec("fit_quality", "", "astrometric fit-quality indicator (larger = worse)"))
    return out


def _column(table: pa.Table, name: str) -> np.ndarray:
    if name not in table.column_names:
        return np.full(table.num_rows, np.nan)
    return table.column(name).to_numpy(zero_copy_only=False).astype(np.float64)


def _zero_motion(table: pa.Table, cfg: Config):
    """Rows that pass the zero-motion test of ``cfg`` and the statistics behind it."""
    from selector.core.selection import select

    sel = select(table, cfg)
    passed = dict(sel.stages)["proper_motion"]
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
    """
    if names is None:
        names = [f.name for f in feature_specs(cfg)]
    if statistics is None:
        _, plx_snr, chi2 = _zero_motion(table, cfg)
    else:
        plx_snr, chi2 = statistics
    from selector.core.photometry import vega_to_ab

    ir_ab = {}
    for b in cfg.infrared_bands():
        ir_ab[_ir_suffix(b)] = vega_to_ab(_column(table, schema.infrared_mag_column(b)), b)
    out = np.empty((table.num_rows, len(names)), np.float64)
    with np.errstate(invalid="ignore"):
        for j, name in enumerate(names):
            if name == "parallax_snr":
                values = plx_snr
            elif name == "pm_chi2":
                values = chi2
            elif name.startswith("ir_") and name.endswith("_mag") and "_minus_" in name:
                a, b = name[3:-4].split("_minus_")
                values = _column(table, f"ir_{a}_vegamag") - _column(table, f"ir_{b}_vegamag")
            elif name.startswith("opt_") and name.endswith("_abmag") and "_minus_ir_" in name:
                o, b = name[4:-6].split("_minus_ir_")
                values = _column(table, schema.optical_mag_column(o)) - ir_ab.get(b, np.nan)
            elif name.startswith("opt_") and name.endswith("_mag") and "_minus_" in name:
                a, b = name[4:-4].split("_minus_")
                values = _column(table, schema.optical_mag_column(a)) - _column(table, schema.optical_mag_column(b))
            else:
                values = _column(table, name)
            out[:, j] = values
    # an infinite value (a zero error upstream) carries no information a split could use
    out[~np.isfinite(out)] = np.nan
    return out


def _feature_settings(cfg: Config) -> dict:
    """Settings that change what the features mean, recorded in the card and checked on loading."""
    return {"parallax_zero_point_mas": cfg.motion.parallax_zero_point_mas,
            "error_inflation": cfg.motion.error_inflation}


# --- labels ------------------------------------------------------------------------------------------

def _normalise(text: str) -> str:
    return str(text).strip().lower().replace(" ", "_").replace("-", "_")


def _text(values) -> np.ndarray:
    """Values as a numpy array of str, with "" for missing ones."""
    if not isinstance(values, (pa.Array, pa.ChunkedArray)):
        values = pa.array(values)
    text = pc.fill_null(pc.utf8_trim_whitespace(pc.cast(values, pa.string())), "")
    return np.asarray(text.to_numpy(zero_copy_only=False), dtype=str) if len(text) else np.zeros(0, str)


def _map_classes(raw, class_map: dict) -> tuple[np.ndarray, dict]:
    """Class index per row (-1 where the text is not in the map) and counts of dropped texts."""
    table = {_normalise(k): CLASSES.index(v) for k, v in class_map.items()}
    text = _text(raw)
    uniq, inverse = np.unique(text, return_inverse=True)
    # one lookup per distinct text, not per row
    codes = np.array([table.get(_normalise(u), -1) if u else -1 for u in uniq], np.int64)
    label = codes[inverse.ravel()] if len(uniq) else np.zeros(0, np.int64)
    dropped = {}
    for u, c, n in zip(uniq, codes, np.bincount(inverse.ravel(), minlength=len(uniq))):
        if c < 0:
            dropped[u or "(empty)"] = int(n)
    return label, dict(sorted(dropped.items()))


@dataclass
class _Source:
    """One origin of labels, in order of precedence (lower rank wins)."""

    name: str
    rank: int
    label: np.ndarray
    ids: pa.Array | None = None
    ra_deg: np.ndarray | None = None
    dec_deg: np.ndarray | None = None
    summary: dict = field(default_factory=dict)
    tiles: np.ndarray | None = None


def _id_source(name, rank, ids, raw_class, class_map, extra=None) -> _Source:
    label, dropped = _map_classes(raw_class, class_map)
    text = _text(ids)
    valid = text != ""
    invalid = int((~valid & (label >= 0)).sum())
    keep = valid & (label >= 0)
    text, label = text[keep], label[keep]
    # the same id twice: one label if they agree, none if they disagree
    order = np.lexsort((label, text))
    text, label = text[order], label[order]
    first = np.r_[True, text[1:] != text[:-1]] if len(text) else np.zeros(0, bool)
    start = np.flatnonzero(first)
    agree = np.minimum.reduceat(label, start) == np.maximum.reduceat(label, start) if len(start) else np.zeros(0, bool)
    n_disagree = int((~agree).sum())
    text, label = text[start][agree], label[start][agree]
    summary = {"rows": int(len(keep)), "dropped_unknown_class": dropped, "dropped_missing_id": invalid,
               "dropped_inconsistent_duplicates": n_disagree, **(extra or {})}
    return _Source(name, rank, label, ids=pa.array(text.tolist(), pa.string()), summary=summary)


def _position_source(name, rank, ra, dec, raw_class, class_map, order) -> _Source:
    label, dropped = _map_classes(raw_class, class_map)
    ra = np.asarray(ra, np.float64)
    dec = np.asarray(dec, np.float64)
    valid = np.isfinite(ra) & np.isfinite(dec) & (np.abs(dec) <= 90.0)
    invalid = int((~valid & (label >= 0)).sum())
    keep = valid & (label >= 0)
    ra, dec, label = np.mod(ra[keep], 360.0), dec[keep], label[keep]
    summary = {"rows": int(len(keep)), "dropped_unknown_class": dropped, "dropped_invalid_position": invalid}
    src = _Source(name, rank, label, ra_deg=ra, dec_deg=dec, summary=summary)
    src.tiles = tiles.tile_of(ra, dec, order) if len(ra) else np.zeros(0, np.int64)
    return src


def _read_columns(path: Path, fmt: str, columns: list[str]) -> tuple[dict, dict]:
    if not path.is_file():
        raise InputError(f"{path}: labelled file named in classifier.labels.file not found")
    parts, units = [], {}
    for chunk in iter_chunks([path], fmt, columns, 1_000_000):
        parts.append(chunk.table)
        units.update(chunk.units)
    table = pa.concat_tables(parts, promote_options="permissive") if parts else pa.table({c: [] for c in columns})
    return {c: table.column(c) for c in columns}, units


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


def _label_sources(cfg: Config) -> list[_Source]:
    c = cfg.classifier
    order = cfg.tiling.order
    sources = []
    if cfg.targets is not None:
        t = followup.training_labels(cfg)
        if t.num_rows:
            sources.append(_id_source("follow-up outcomes", 0, t.column("astro_id"), t.column("label"),
                                      c.class_map))
    if c.labels is not None:
        lf = c.labels
        path = cfg.path(lf.file)
        if lf.id_column is not None:
            cols, _ = _read_columns(path, lf.format, [lf.id_column, lf.class_column])
            sources.append(_id_source(f"labelled file {lf.file}", 1, cols[lf.id_column], cols[lf.class_column],
                                      c.class_map))
        else:
            cols, units = _read_columns(path, lf.format, [lf.ra_column, lf.dec_column, lf.class_column])
            ra = _as_degrees(path, lf.ra_column, cols[lf.ra_column], units.get(lf.ra_column))
            dec = _as_degrees(path, lf.dec_column, cols[lf.dec_column], units.get(lf.dec_column))
            sources.append(_position_source(f"labelled file {lf.file}", 1, ra, dec, cols[lf.class_column], c.class_map,
                                            order))
    if c.use_known and cfg.known is not None:
        path = cfg.tiles_dir / "known" / "objects.parquet"
        if not path.exists():
            raise SelectorError(f"{path}: not found; run `selector ingest --config ...` first (or set "
                                "classifier.use_known = false)")
        t = read_parquet(path, columns=["ra_deg", "dec_deg", "known_class"])
        sources.append(_position_source("known objects", 2, t.column("ra_deg").to_numpy(zero_copy_only=False),
                                        t.column("dec_deg").to_numpy(zero_copy_only=False),
                                        t.column("known_class"), c.class_map, order))
    if not sources:
        raise SelectorError("no labels for training: name a labelled file in [classifier.labels], or ingest a [known] "
                            "catalogue with classifier.use_known = true, or record follow-up outcomes")
    return sources


def _feature_files(cfg: Config) -> list[Path]:
    root = cfg.run_dir / "tiles"
    files = sorted(root.glob("tile*/features.parquet"))
    if not files:
        raise SelectorError(f"{root}: no feature cache; run `selector run --config ...` before `selector train`")
    return files


def _check_cache(path: Path, table: pa.Table, want: str) -> None:
    meta = table.schema.metadata or {}
    try:
        got = json.loads(meta[b"provenance"])["match_key"]
    except (KeyError, ValueError, TypeError):
        raise SelectorError(f"{path}: feature cache without provenance; run `selector run --config ...` again") from None
    if got != want:
        raise SelectorError(f"{path}: the feature cache was built with different [astrometric], [infrared], [tiling] "
                            "or [match] settings than this config; run `selector run --config ...` again")


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


def _group_order(cfg: Config) -> int:
    return min(cfg.classifier.group_order, cfg.tiling.order)


def collect_labelled(cfg: Config) -> LabelledSet:
    """Match every label source against the feature cache and build the training set.

    Precedence when a source is labelled twice: recorded follow-up outcomes, then the labelled
    file, then the known-objects catalogue. A positional label is given to its nearest source
    within ``classifier.known_radius_arcsec`` only (so a neighbour of a known star is not called a
    star too).
    """
    from selector.store.keys import match_key
    from selector.core.crossmatch import nearest_within, pairs_within
    from selector.core.selection import tile_rejects

    files = _feature_files(cfg)
    sources = _label_sources(cfg)
    want = match_key(cfg)
    radius = cfg.classifier.known_radius_arcsec
    order = cfg.tiling.order
    names = [f.name for f in feature_specs(cfg)]
    parts, assign = [], []
    offset = 0
    for path in files:
        table = read_parquet(path)
        _check_cache(path, table, want)
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
        passed, plx_snr, chi2 = _zero_motion(sub, cfg)
        X = feature_matrix(sub, cfg, names, (plx_snr, chi2))
        parts.append((sub, X, passed))
        for s, rows, lab_idx, sep in per_source:
            assign.append((offset + np.searchsorted(keep, rows), np.full(len(rows), s.rank), lab_idx,
                           s.label[lab_idx], sep))
        offset += len(keep)
    if not parts:
        raise SelectorError("no labelled source matched the feature cache; check the labels' identifiers or positions "
                            f"(radius classifier.known_radius_arcsec = {radius})")
    table = pa.concat_tables([p[0] for p in parts], promote_options="permissive")
    X = np.concatenate([p[1] for p in parts])
    passed = np.concatenate([p[2] for p in parts])
    row, rank, lab_idx, label = (np.concatenate([a[i] for a in assign]).astype(np.int64) for i in range(4))
    sep = np.concatenate([a[4] for a in assign]).astype(np.float64)
    # a positional label names one source: its nearest, across tiles too
    positional = np.zeros(max(s.rank for s in sources) + 1, bool)
    positional[[s.rank for s in sources if s.ids is None]] = True
    by_pos = positional[rank]
    o = np.lexsort((row, sep, lab_idx, rank))
    first = np.ones(len(o), bool)
    first[1:] = (rank[o][1:] != rank[o][:-1]) | (lab_idx[o][1:] != lab_idx[o][:-1])
    drop = np.zeros(len(row), bool)
    drop[o[~first]] = by_pos[o[~first]]
    row, rank, label = row[~drop], rank[~drop], label[~drop]
    # per source row: the highest-precedence label; disagreements are counted
    o = np.lexsort((rank, row))
    row, rank, label = row[o], rank[o], label[o]
    head = np.r_[True, row[1:] != row[:-1]] if len(row) else np.zeros(0, bool)
    start = np.flatnonzero(head)
    conflicts = int(np.sum(np.minimum.reduceat(label, start) != np.maximum.reduceat(label, start))) if len(start) else 0
    final_row, final_rank, final_label = row[start], rank[start], label[start]

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
    X = X[use]
    group_order = _group_order(cfg)
    t = table.column("tile").to_numpy(zero_copy_only=False).astype(np.int64)
    groups = t >> (2 * (order - group_order))
    summary = {
        "rows": int(len(y)),
        "by_class": {CLASSES[k]: int(np.sum(y == k)) for k in range(len(CLASSES))},
        "sources": summary_sources,
        "precedence": [s.name for s in sorted(sources, key=lambda s: s.rank)],
        "conflicting_labels": conflicts,
        "labelled_but_failing_zero_motion": failing,
        "brown_dwarfs": "counted as stars",
    }
    return LabelledSet(table, X, y.astype(np.int64), groups, names, group_order, summary)


# --- folds, model, calibration ---------------------------------------------------------------------

def grouped_folds(groups: np.ndarray, y: np.ndarray, n_folds: int, seed: int) -> np.ndarray:
    """Fold index of every row; all rows of a sky region share a fold, class mix kept similar.

    Raises
    ------
    SelectorError
        When there are fewer regions than folds, or a fold's training part lacks a class.
    """
    from sklearn.model_selection import StratifiedGroupKFold

    n_groups = len(np.unique(groups))
    if n_groups < n_folds:
        raise SelectorError(f"the labelled sources lie in only {n_groups} sky regions, fewer than classifier.folds = "
                            f"{n_folds}; lower classifier.folds or raise classifier.group_order")
    splitter = StratifiedGroupKFold(n_splits=n_folds, shuffle=True, random_state=seed)
    fold = np.full(len(y), -1, np.int64)
    for k, (_, test) in enumerate(splitter.split(np.zeros((len(y), 1)), y, groups)):
        fold[test] = k
    for k in range(n_folds):
        missing = [CLASSES[c] for c in range(len(CLASSES)) if not np.any(y[fold != k] == c)]
        if missing:
            raise SelectorError(f"cross-validation fold {k + 1} would train without any source of class {missing[0]}: "
                                "those labels lie in too few sky regions; lower classifier.folds or raise "
                                "classifier.group_order")
    return fold


def _estimator(cfg: Config, seed: int):
    from sklearn.ensemble import HistGradientBoostingClassifier

    c = cfg.classifier
    return HistGradientBoostingClassifier(
        loss="log_loss", learning_rate=c.learning_rate, max_iter=c.max_iter, max_leaf_nodes=c.max_leaf_nodes,
        min_samples_leaf=c.min_samples_leaf, l2_regularization=c.l2_regularization, early_stopping=False,
        class_weight="balanced" if c.class_weight == "balanced" else None, random_state=seed)


def _raw_proba(estimator, X: np.ndarray) -> np.ndarray:
    """Probabilities in :data:`CLASSES` order (a class absent from training gets zero)."""
    p = estimator.predict_proba(X)
    out = np.zeros((len(X), len(CLASSES)))
    out[:, np.asarray(estimator.classes_, np.int64)] = p
    return out


_EPS = 1e-6


def _logit(p: np.ndarray) -> np.ndarray:
    p = np.clip(p, _EPS, 1.0 - _EPS)
    return np.log(p / (1.0 - p))


def fit_calibrators(raw: np.ndarray, y: np.ndarray, method: str) -> list:
    """One map per class from raw to calibrated probability, fitted one class against the rest."""
    from sklearn.isotonic import IsotonicRegression
    from sklearn.linear_model import LogisticRegression

    out = []
    for k in range(len(CLASSES)):
        target = (y == k).astype(np.float64)
        if method == "isotonic":
            m = IsotonicRegression(y_min=0.0, y_max=1.0, increasing=True, out_of_bounds="clip")
            m.fit(raw[:, k], target)
        else:
            m = LogisticRegression(C=1e6, max_iter=1000)
            m.fit(_logit(raw[:, k])[:, None], target.astype(np.int64))
        out.append(m)
    return out


def apply_calibrators(raw: np.ndarray, calibrators: list) -> np.ndarray:
    """Calibrated class probabilities, renormalised to sum to one (uniform where all maps give 0)."""
    from sklearn.isotonic import IsotonicRegression

    cal = np.empty_like(raw)
    for k, m in enumerate(calibrators):
        if isinstance(m, IsotonicRegression):
            cal[:, k] = m.predict(raw[:, k])
        else:
            cal[:, k] = m.predict_proba(_logit(raw[:, k])[:, None])[:, 1]
    total = cal.sum(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        cal = np.where(total > 0, cal / total, 1.0 / len(CLASSES))
    return cal


class Model:
    """A trained classifier: the boosting model, its calibration maps and its feature list."""

    def __init__(self, estimator, calibrators: list, feature_names: list, card: dict | None = None):
        self.estimator = estimator
        self.calibrators = calibrators
        self.feature_names = list(feature_names)
        self.card = card or {}

    def predict_proba(self, X: np.ndarray) -> np.ndarray:
        """Calibrated P(quasar), P(star), P(galaxy) for a feature matrix, shape (rows, 3)."""
        if len(X) == 0:
            return np.zeros((0, len(CLASSES)))
        return apply_calibrators(_raw_proba(self.estimator, X), self.calibrators)

    def score_table(self, table: pa.Table, cfg: Config) -> np.ndarray:
        """P(quasar) of every row of a feature table; NaN for rows that fail the zero-motion test."""
        out = np.full(table.num_rows, np.nan)
        # blocks of rows bound the temporaries when a whole feature cache is scored at once
        for lo in range(0, table.num_rows, _SCORE_BLOCK_ROWS):
            part = table.slice(lo, _SCORE_BLOCK_ROWS)
            passed, plx_snr, chi2 = _zero_motion(part, cfg)
            idx = np.flatnonzero(passed)
            if len(idx) == 0:
                continue
            X = feature_matrix(part.take(pa.array(idx, pa.int64())), cfg, self.feature_names, (plx_snr[idx], chi2[idx]))
            # tiles run in parallel processes; threads inside each would only compete for the cores
            with _threads().limit(limits=1):
                out[lo + idx] = self.predict_proba(X)[:, _QUASAR]
        return out


@lru_cache(maxsize=1)
def _threads():
    # the controller sees only libraries already loaded, so the model's OpenMP runtime is loaded
    # first; the scan is slow, so it is done once per process
    import sklearn.ensemble  # noqa: F401
    from threadpoolctl import ThreadpoolController

    return ThreadpoolController()


# --- evaluation ------------------------------------------------------------------------------------

def purity_at_completeness(score: np.ndarray, positive: np.ndarray, target: float = COMPLETENESS_TARGET) -> dict:
    """Purity of the selection ``score >= t`` with the highest ``t`` whose completeness reaches ``target``.

    Rows with a NaN score sort last (they are selected only when nothing less reaches the target).
    Returns ``threshold``, ``completeness``, ``purity`` and ``selected``.
    """
    s = np.where(np.isfinite(score), score, -np.inf)
    n_pos = int(positive.sum())
    if n_pos == 0:
        return {"threshold": None, "completeness": None, "purity": None, "selected": 0}
    order = np.argsort(-s, kind="stable")
    cum = np.cumsum(positive[order])
    k = int(np.searchsorted(cum, math.ceil(target * n_pos - 1e-9)))
    t = s[order][min(k, len(s) - 1)]
    sel = s >= t
    return {"threshold": _num(t), "completeness": float(positive[sel].sum() / n_pos),
            "purity": float(positive[sel].mean()), "selected": int(sel.sum())}


def _num(x):
    x = float(x)
    return x if math.isfinite(x) else None


def _completeness_purity(selected: np.ndarray, positive: np.ndarray) -> dict:
    n_sel, n_pos = int(selected.sum()), int(positive.sum())
    tp = int((selected & positive).sum())
    return {"completeness": tp / n_pos if n_pos else None, "purity": tp / n_sel if n_sel else None, "selected": n_sel}


def _brier(p: np.ndarray, y: np.ndarray) -> float:
    onehot = np.eye(len(CLASSES))[y]
    return float(np.mean(np.sum((p - onehot) ** 2, axis=1)))


def _brier_quasar(p: np.ndarray, y: np.ndarray) -> float:
    return float(np.mean((p[:, _QUASAR] - (y == _QUASAR)) ** 2))


def _calibration_curve(p: np.ndarray, positive: np.ndarray, n_bins: int = 10) -> dict:
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    b = np.clip(np.digitize(p, edges[1:-1]), 0, n_bins - 1)
    count = np.bincount(b, minlength=n_bins)
    mean_p = np.bincount(b, weights=p, minlength=n_bins)
    frac = np.bincount(b, weights=positive.astype(float), minlength=n_bins)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_p, frac = mean_p / count, frac / count
    return {"bin_edges": edges.tolist(), "count": count.tolist(), "mean_predicted": [_num(v) for v in mean_p],
            "observed_fraction": [_num(v) for v in frac]}


def _criteria_scores(table: pa.Table, cfg: Config) -> dict:
    from selector.core.photometry import CRITERIA
    from selector.core.selection import infrared_mags

    mags = infrared_mags(table, cfg.infrared_bands())
    out = {}
    for name, criterion in CRITERIA.items():
        if set(criterion.bands) <= set(mags):
            r = criterion.select(mags)
            out[name] = (np.asarray(r.passed, bool), np.asarray(r.excess_mag, float))
    return out


def _importances(estimator, X, y, seed, repeats, max_rows) -> np.ndarray:
    """Drop in average precision of raw P(quasar) when each feature is shuffled: (features, repeats).

    The permutation importance of Breiman 2001 (Machine Learning 45, 5) as scikit-learn computes it,
    with the repeats of one feature stacked into a single prediction call: the cost of a call is
    dominated by walking every tree once, so this is several times faster on held-out folds of a
    few thousand rows.
    """
    from sklearn.metrics import average_precision_score

    rng = np.random.default_rng(seed)
    if len(X) > max_rows:
        pick = np.sort(rng.choice(len(X), max_rows, replace=False))
        X, y = X[pick], y[pick]
    out = np.full((X.shape[1], repeats), np.nan)
    positive = y == _QUASAR
    if not positive.any() or positive.all():
        return out
    base = average_precision_score(positive, _raw_proba(estimator, X)[:, _QUASAR])
    n = len(X)
    for j in range(X.shape[1]):
        stacked = np.tile(X, (repeats, 1))
        for r in range(repeats):
            stacked[r * n:(r + 1) * n, j] = X[rng.permutation(n), j]
        p = _raw_proba(estimator, stacked)[:, _QUASAR]
        out[j] = [base - average_precision_score(positive, p[r * n:(r + 1) * n]) for r in range(repeats)]
    return out


@dataclass
class TrainResult:
    """What :func:`train_labelled` produced.

    Attributes
    ----------
    model : Model
        The final model (all labelled rows), with its card.
    evaluation : dict
        Held-out figures (machine-readable; written as ``evaluation.json``).
    held_out : pyarrow.Table
        Per labelled row: id, tile, region, fold, label, raw and calibrated probabilities.
    outputs : dict
        Paths written (empty until :func:`write_outputs`).
    """

    model: Model
    evaluation: dict
    held_out: pa.Table
    outputs: dict = field(default_factory=dict)


def train_labelled(cfg: Config, data: LabelledSet, log=print) -> TrainResult:
    """Cross-validate, evaluate and fit the final model on a labelled set (nothing written)."""
    # sums over threads round differently with the thread count, and idle threads spin on a busy
    # machine; classifier.threads = 1 (the default) avoids both
    with _threads().limit(limits=cfg.classifier.threads or None):
        return _train_labelled(cfg, data, log)


def _train_labelled(cfg: Config, data: LabelledSet, log) -> TrainResult:
    c = cfg.classifier
    seed = cfg.project.seed
    y, X = data.y, data.X
    counts = np.bincount(y, minlength=len(CLASSES))
    short = [CLASSES[k] for k in range(len(CLASSES)) if counts[k] < 2 * c.folds]
    if short:
        n = int(counts[CLASSES.index(short[0])])
        raise SelectorError(f"only {n} labelled sources of class {short[0]} pass the zero-motion test; training needs "
                            f"at least {2 * c.folds} of every class with classifier.folds = {c.folds}: add {short[0]} "
                            "labels (e.g. a labelled file in [classifier.labels]) or check classifier.class_map")
    fold = grouped_folds(data.groups, y, c.folds, seed)
    raw = np.zeros((len(y), len(CLASSES)))
    importances = []
    for k in range(c.folds):
        train_rows, test_rows = fold != k, fold == k
        est = _estimator(cfg, seed).fit(X[train_rows], y[train_rows])
        raw[test_rows] = _raw_proba(est, X[test_rows])
        importances.append(_importances(est, X[test_rows], y[test_rows], seed + k, c.permutation_repeats,
                                        math.ceil(_IMPORTANCE_ROWS / c.folds)))
        log(f"  fold {k + 1} of {c.folds}: trained on {int(train_rows.sum()):,d}, held out {int(test_rows.sum()):,d}")
    # the calibration applied to a fold is fitted on the other folds' out-of-fold predictions
    cal = np.zeros_like(raw)
    for k in range(c.folds):
        maps = fit_calibrators(raw[fold != k], y[fold != k], c.calibration)
        cal[fold == k] = apply_calibrators(raw[fold == k], maps)
    final = _estimator(cfg, seed).fit(X, y)
    final_maps = fit_calibrators(raw, y, c.calibration)
    imp = np.concatenate(importances, axis=1)
    evaluation = _evaluate(cfg, data, fold, raw, cal, imp)
    model = Model(final, final_maps, data.feature_names)
    held = pa.table({
        "astro_id": data.table.column("astro_id"),
        "tile": data.table.column("tile"),
        "region": pa.array(data.groups),
        "fold": pa.array(fold),
        "label": data.table.column("label"),
        "label_source": data.table.column("label_source"),
        **{f"p_{name}_raw": pa.array(raw[:, k]) for k, name in enumerate(CLASSES)},
        **{f"p_{name}": pa.array(cal[:, k]) for k, name in enumerate(CLASSES)},
    })
    return TrainResult(model, evaluation, held)


def _evaluate(cfg: Config, data: LabelledSet, fold, raw, cal, imp) -> dict:
    y = data.y
    thr = cfg.classifier.threshold
    positive = {name: y == k for k, name in enumerate(CLASSES)}
    curves, at_thr = {}, {}
    for k, name in enumerate(CLASSES):
        rows = [_completeness_purity(cal[:, k] >= t, positive[name]) for t in _THRESHOLDS]
        curves[name] = {"completeness": [r["completeness"] for r in rows], "purity": [r["purity"] for r in rows],
                        "selected": [r["selected"] for r in rows]}
        at_thr[name] = _completeness_purity(cal[:, k] >= thr, positive[name])
    pred = np.argmax(cal, axis=1)
    confusion = np.zeros((len(CLASSES), len(CLASSES)), np.int64)
    np.add.at(confusion, (y, pred), 1)
    q = positive["quasar"]
    classifier_95 = purity_at_completeness(cal[:, _QUASAR], q)
    criteria = {}
    for name, (passed, excess) in _criteria_scores(data.table, cfg).items():
        at_boundary = _completeness_purity(passed, q)
        same = (purity_at_completeness(cal[:, _QUASAR], q, at_boundary["completeness"])
                if at_boundary["completeness"] else {"purity": None})
        criteria[name] = {"at_published_boundary": at_boundary,
                          "classifier_purity_at_same_completeness": same["purity"],
                          f"at_{int(COMPLETENESS_TARGET * 100)}_percent_completeness": purity_at_completeness(excess, q)}
    key = f"at_{int(COMPLETENESS_TARGET * 100)}_percent_completeness"
    best = max(criteria, key=lambda n: (criteria[n][key]["purity"] or -1.0, n)) if criteria else None
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a feature never shuffled (no quasar in a fold)
        imp_mean, imp_std = np.nanmean(imp, axis=1), np.nanstd(imp, axis=1)
    order = np.argsort(-np.nan_to_num(imp_mean, nan=-np.inf), kind="stable")
    return {
        "note": "held-out figures from spatially grouped cross-validation; completeness and purity are over labelled "
                "sources that passed the zero-motion test, so they depend on how representative the labels are",
        "classes": list(CLASSES),
        "rows": int(len(y)),
        "by_class": {name: int(positive[name].sum()) for name in CLASSES},
        "folds": {"n": int(cfg.classifier.folds), "group_order": int(data.group_order),
                  "regions": int(len(np.unique(data.groups))),
                  "rows_per_fold": np.bincount(fold, minlength=cfg.classifier.folds).tolist()},
        "threshold": thr,
        "at_threshold": at_thr,
        "threshold_curves": {"threshold": _THRESHOLDS.tolist(), **curves},
        "confusion_matrix": {"rows": "true class", "columns": "most probable class", "labels": list(CLASSES),
                             "counts": confusion.tolist()},
        "calibration_curves": {name: {"raw": _calibration_curve(raw[:, k], positive[name]),
                                      "calibrated": _calibration_curve(cal[:, k], positive[name])}
                               for k, name in enumerate(CLASSES)},
        "brier": {"raw": _brier(raw, y), "calibrated": _brier(cal, y),
                  "quasar_raw": _brier_quasar(raw, y), "quasar_calibrated": _brier_quasar(cal, y)},
        "permutation_importance": {
            "scoring": "drop in average precision of P(quasar) on held-out folds when the feature is shuffled",
            "features": [data.feature_names[j] for j in order],
            "mean": [_num(imp_mean[j]) for j in order],
            "std": [_num(imp_std[j]) for j in order]},
        "quasar": {key: classifier_95},
        "criteria": criteria,
        "best_criterion": best,
    }


# --- model files -----------------------------------------------------------------------------------

def card_path(model_path: Path) -> Path:
    """The model card beside a model file: ``name.skops`` → ``name.card.json``."""
    model_path = Path(model_path)
    return model_path.with_name(model_path.stem + ".card.json")


def _archive_types(data: bytes) -> list[str]:
    """Every type named in a skops archive's schema (module.class), sorted."""
    with zipfile.ZipFile(_io.BytesIO(data)) as z:
        tree = json.loads(z.read("schema.json"))
    found = set()
    stack = [tree]
    while stack:
        node = stack.pop()
        if isinstance(node, dict):
            if "__class__" in node and "__module__" in node:
                found.add(f"{node['__module__']}.{node['__class__']}")
            stack.extend(node.values())
        elif isinstance(node, list):
            stack.extend(node)
    return sorted(found)


def _canonical_archive(data: bytes) -> bytes:
    """The same archive with memory-address ids renumbered and fixed zip timestamps.

    skops names array files and shared-object ids after ``id()`` and stamps the current time on
    each member, so two dumps of one model differ; renumbering both in order of first appearance
    (which keeps every reference intact) makes equal models give equal bytes.
    """
    with zipfile.ZipFile(_io.BytesIO(data)) as z:
        tree = json.loads(z.read("schema.json"))
        members = {name: z.read(name) for name in z.namelist() if name != "schema.json"}
    ids, files = {}, {}

    def walk(node):
        if isinstance(node, dict):
            out = {}
            for k, v in node.items():
                if k == "__id__" and isinstance(v, int):
                    out[k] = ids.setdefault(v, len(ids) + 1)
                elif k == "file" and isinstance(v, str) and v in members:
                    out[k] = files.setdefault(v, f"{len(files) + 1:06d}.npy")
                else:
                    out[k] = walk(v)
            return out
        if isinstance(node, list):
            return [walk(v) for v in node]
        return node

    tree = walk(tree)
    if set(files) != set(members):
        raise SelectorError("internal error: a model archive member is not referenced by its schema")
    buf = _io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:
        def put(name, payload):
            info = zipfile.ZipInfo(name, date_time=(1980, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            z.writestr(info, payload, compresslevel=6)

        put("schema.json", json.dumps(tree, separators=(",", ":")).encode())
        for old, new in sorted(files.items(), key=lambda kv: kv[1]):
            put(new, members[old])
    return buf.getvalue()


def _bundle(model: Model) -> dict:
    return {"format": _BUNDLE_FORMAT, "format_version": str(_FORMAT_VERSION), "classes": list(CLASSES),
            "features": list(model.feature_names), "estimator": model.estimator, "calibrators": list(model.calibrators)}


def _versions() -> dict:
    import numpy
    import scipy
    import skops
    import sklearn

    return {"selector": __version__, "scikit-learn": sklearn.__version__, "numpy": numpy.__version__,
            "scipy": scipy.__version__, "skops": skops.__version__, "python": platform.python_version()}


def _model_bytes(model: Model, probe: np.ndarray) -> bytes:
    import skops.io as sio

    data = _canonical_archive(sio.dumps(_bundle(model)))
    untrusted = [t for t in _archive_types(data) if t not in TRUSTED_TYPES]
    if untrusted:
        raise SelectorError(f"internal error: the model holds {untrusted[0]}, which is not in TRUSTED_TYPES")
    back = _build(data, Path("(new model)"))
    if not np.array_equal(Model(back["estimator"], back["calibrators"], back["features"]).predict_proba(probe),
                          model.predict_proba(probe)):
        raise SelectorError("internal error: the written model does not reproduce the trained model's predictions")
    return data


def _card(cfg: Config, data: LabelledSet, result: TrainResult, sha256: str) -> dict:
    e = result.evaluation
    key = f"at_{int(COMPLETENESS_TARGET * 100)}_percent_completeness"
    best = e["best_criterion"]
    return {
        "format": _CARD_FORMAT,
        "format_version": _FORMAT_VERSION,
        "model_file": MODEL_FILE,
        "model_sha256": sha256,
        "purpose": "P(quasar), P(star), P(galaxy) for sources that passed the zero-motion test; a statistical "
                   "ranking for follow-up, not a classification: spectroscopy decides",
        "classes": list(CLASSES),
        "brown_dwarfs": "counted as stars",
        "features": [{"name": f.name, "unit": f.unit, "description": f.description} for f in feature_specs(cfg)],
        "feature_settings": _feature_settings(cfg),
        "missing_values": "kept as NaN; the model routes them at each split",
        "training_set": data.summary,
        "model": {"kind": "histogram gradient boosting (scikit-learn)",
                  "hyperparameters": {k: getattr(cfg.classifier, k) for k in
                                      ("max_iter", "learning_rate", "max_leaf_nodes", "min_samples_leaf",
                                       "l2_regularization", "class_weight")},
                  "calibration": f"{cfg.classifier.calibration}, one class against the rest on out-of-fold "
                                 "predictions, renormalised",
                  "seed": cfg.project.seed},
        "validation": {"folds": cfg.classifier.folds, "grouping": f"HEALPix order {data.group_order} sky regions",
                       "regions": e["folds"]["regions"]},
        "metrics": {
            "threshold": e["threshold"],
            "at_threshold": e["at_threshold"],
            "quasar_purity_at_95_percent_completeness": e["quasar"][key]["purity"],
            "best_published_criterion": best,
            "best_criterion_purity_at_95_percent_completeness": e["criteria"][best][key]["purity"] if best else None,
            "brier": e["brier"],
        },
        "config_hash": config_hash(cfg),
        "match_config_hash": config_hash(cfg, MATCH_SECTIONS),
        "classifier_config": plain(cfg)["classifier"],
        "versions": _versions(),
    }


def _build(data: bytes, path: Path) -> dict:
    """Build the bundle from archive bytes after checking every type in it."""
    import skops.io as sio

    try:
        found = _archive_types(data)
    except (zipfile.BadZipFile, KeyError, ValueError, EOFError, OSError) as exc:
        raise SelectorError(f"{path}: not a readable model file ({_first_line(exc)}); retrain with "
                            "`selector train`") from None
    bad = [t for t in found if t not in TRUSTED_TYPES]
    try:
        untrusted = sio.get_untrusted_types(data=data)
    except Exception as exc:  # skops raises many types for damaged archives
        raise SelectorError(f"{path}: not a readable model file ({_first_line(exc)})") from None
    bad += [t for t in untrusted if t not in TRUSTED_TYPES and t not in bad]
    if bad:
        raise SelectorError(f"{path}: refused: the model file holds the untrusted type {bad[0]}"
                            + (f" (and {len(bad) - 1} more)" if len(bad) > 1 else "")
                            + "; only files written by `selector train` are loaded")
    try:
        bundle = sio.loads(data, trusted=list(TRUSTED_TYPES))
    except Exception as exc:  # a damaged archive can fail anywhere inside skops
        raise SelectorError(f"{path}: not a readable model file ({_first_line(exc)})") from None
    _check_bundle(bundle, path)
    return bundle


def _check_bundle(bundle, path: Path) -> None:
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.isotonic import IsotonicRegression
    from sklearn.linear_model import LogisticRegression

    ok = (isinstance(bundle, dict) and bundle.get("format") == _BUNDLE_FORMAT
          and bundle.get("format_version") == str(_FORMAT_VERSION)
          and bundle.get("classes") == list(CLASSES)
          and type(bundle.get("estimator")) is HistGradientBoostingClassifier
          and isinstance(bundle.get("calibrators"), list) and len(bundle["calibrators"]) == len(CLASSES)
          and all(type(m) in (IsotonicRegression, LogisticRegression) for m in bundle["calibrators"])
          and isinstance(bundle.get("features"), list)
          and getattr(bundle["estimator"], "n_features_in_", None) == len(bundle["features"]))
    if not ok:
        raise SelectorError(f"{path}: not a model written by `selector train` (unexpected contents)")


def _first_line(exc) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def load_model(path, cfg: Config) -> Model:
    """Load a model file after checking its card, its hash, its types and its features against ``cfg``.

    Raises
    ------
    SelectorError
        One line naming the file: card missing or foreign, file changed since training (hash),
        untrusted type inside, unreadable or truncated archive, or features that differ from what
        this configuration provides.
    """
    path = Path(path)
    cpath = card_path(path)
    if not path.is_file():
        raise SelectorError(f"{path}: model file not found (classifier.model); train one with `selector train`")
    try:
        card = json.loads(cpath.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SelectorError(f"{cpath}: model card not found beside {path.name}; a model is loaded only with its "
                            "card") from None
    except (OSError, ValueError) as exc:
        raise SelectorError(f"{cpath}: not a readable model card ({_first_line(exc)})") from None
    if not isinstance(card, dict) or card.get("format") != _CARD_FORMAT or card.get("format_version") != _FORMAT_VERSION:
        raise SelectorError(f"{cpath}: not a model card written by `selector train`")
    data = path.read_bytes()
    import hashlib

    if hashlib.sha256(data).hexdigest() != card.get("model_sha256"):
        raise SelectorError(f"{path}: refused: the file differs from the one its card describes (changed, truncated "
                            "or replaced since training); retrain with `selector train`")
    _check_features(card, cfg, path)
    bundle = _build(data, path)
    if bundle["features"] != [f["name"] for f in card["features"]]:
        raise SelectorError(f"{path}: the model's feature list differs from its card's")
    return Model(bundle["estimator"], bundle["calibrators"], bundle["features"], card)


def _check_features(card: dict, cfg: Config, path: Path) -> None:
    try:
        have = [f["name"] for f in card["features"]]
        settings = card["feature_settings"]
    except (KeyError, TypeError):
        raise SelectorError(f"{card_path(path)}: model card without a feature list") from None
    want = [f.name for f in feature_specs(cfg)]
    missing = [n for n in have if n not in want]
    extra = [n for n in want if n not in have]
    if missing or extra:
        parts = []
        if missing:
            parts.append(f"it needs {', '.join(missing)}, which this config does not provide")
        if extra:
            parts.append(f"this config adds {', '.join(extra)}, which it was not trained on")
        raise SelectorError(f"{path}: refused: the model's features do not match this configuration ({'; '.join(parts)}); "
                            "retrain with `selector train` or use the config it was trained with")
    for key, value in _feature_settings(cfg).items():
        if settings.get(key) != value:
            raise SelectorError(f"{path}: refused: trained with motion.{key} = {settings.get(key)!r}, this config has "
                                f"{value!r}; the zero-motion features would mean something else, so retrain")


_LOADED: dict = {}


def load_scorer(path, cfg: Config) -> Callable[[pa.Table], np.ndarray]:
    """A function giving P(quasar) for feature-cache rows (NaN for rows failing the zero-motion test).

    The model is read once per process and file version; the feature check against ``cfg`` runs
    on every call, so a changed config is never scored with a model that does not fit it.
    """
    p = Path(path).resolve()
    try:
        st = p.stat()
        cst = card_path(p).stat()
        key = (str(p), st.st_mtime_ns, st.st_size, cst.st_mtime_ns, cst.st_size)
    except OSError:
        key = None
    model = _LOADED.get(key) if key else None
    if model is None:
        model = load_model(p, cfg)
        if key:
            _LOADED.clear()
            _LOADED[key] = model
    else:
        _check_features(model.card, cfg, p)

    def scorer(table: pa.Table) -> np.ndarray:
        return model.score_table(table, cfg)

    return scorer


# --- outputs ------------------------------------------------------------------------------------------

def _save_png(fig, path: Path) -> None:
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format="png", dpi=110, metadata={"Software": None})


def write_plots(evaluation: dict, out_dir: Path) -> list[Path]:
    """The evaluation as PNG plots (Agg, no display needed)."""
    from matplotlib.figure import Figure

    out_dir = Path(out_dir)
    paths = []
    e = evaluation
    thr = np.asarray(e["threshold_curves"]["threshold"])

    def nan(values):
        return np.array([np.nan if v is None else v for v in values], float)

    fig = Figure(figsize=(11, 3.6))
    for i, name in enumerate(CLASSES):
        ax = fig.add_subplot(1, 3, i + 1)
        ax.plot(thr, nan(e["threshold_curves"][name]["completeness"]), label="completeness")
        ax.plot(thr, nan(e["threshold_curves"][name]["purity"]), label="purity")
        ax.axvline(e["threshold"], color="0.6", lw=0.8, ls="--")
        ax.set(title=name, xlabel=f"threshold on P({name})", ylim=(0, 1.02))
        if i == 0:
            ax.legend(loc="lower left")
    fig.suptitle("held-out completeness and purity")
    fig.tight_layout()
    paths.append(out_dir / PLOT_FILES[0])
    _save_png(fig, paths[-1])

    fig = Figure(figsize=(4.8, 4.2))
    ax = fig.add_subplot(1, 1, 1)
    counts = np.asarray(e["confusion_matrix"]["counts"], float)
    frac = counts / np.maximum(counts.sum(axis=1, keepdims=True), 1)
    ax.imshow(frac, vmin=0, vmax=1, cmap="Blues")
    for r in range(len(CLASSES)):
        for c in range(len(CLASSES)):
            ax.text(c, r, f"{int(counts[r, c]):,d}\n{frac[r, c]:.1%}", ha="center", va="center",
                    color="white" if frac[r, c] > 0.5 else "black", fontsize=8)
    ax.set(xticks=range(len(CLASSES)), yticks=range(len(CLASSES)), xticklabels=CLASSES, yticklabels=CLASSES,
           xlabel="most probable class", ylabel="true class", title="held-out confusion matrix")
    fig.tight_layout()
    paths.append(out_dir / PLOT_FILES[1])
    _save_png(fig, paths[-1])

    fig = Figure(figsize=(11, 3.6))
    for i, name in enumerate(CLASSES):
        ax = fig.add_subplot(1, 3, i + 1)
        ax.plot([0, 1], [0, 1], color="0.7", lw=0.8)
        for kind, style in (("raw", "o--"), ("calibrated", "s-")):
            cc = e["calibration_curves"][name][kind]
            ax.plot(nan(cc["mean_predicted"]), nan(cc["observed_fraction"]), style, ms=3, label=kind)
        ax.set(title=name, xlabel=f"predicted P({name})", ylabel="observed fraction", xlim=(0, 1), ylim=(0, 1))
        if i == 0:
            ax.legend(loc="upper left")
    fig.suptitle("calibration on held-out folds")
    fig.tight_layout()
    paths.append(out_dir / PLOT_FILES[2])
    _save_png(fig, paths[-1])

    pi = e["permutation_importance"]
    fig = Figure(figsize=(6.4, 0.25 * len(pi["features"]) + 1.2))
    ax = fig.add_subplot(1, 1, 1)
    ypos = np.arange(len(pi["features"]))[::-1]
    ax.barh(ypos, nan(pi["mean"]), xerr=nan(pi["std"]), color="tab:blue")
    ax.set(yticks=ypos, yticklabels=pi["features"], xlabel="drop in average precision of P(quasar)",
           title="permutation importance (held-out folds)")
    ax.tick_params(axis="y", labelsize=7)
    fig.tight_layout()
    paths.append(out_dir / PLOT_FILES[3])
    _save_png(fig, paths[-1])

    fig = Figure(figsize=(6.0, 4.6))
    ax = fig.add_subplot(1, 1, 1)
    qc = e["threshold_curves"]["quasar"]
    ax.plot(nan(qc["completeness"]), nan(qc["purity"]), "-", color="k", label="classifier P(quasar)")
    for name, res in e["criteria"].items():
        b = res["at_published_boundary"]
        if b["completeness"] is not None and b["purity"] is not None:
            ax.plot([b["completeness"]], [b["purity"]], "o", label=f"{name} (published boundary)")
    ax.axvline(COMPLETENESS_TARGET, color="0.6", lw=0.8, ls="--")
    ax.set(xlabel="quasar completeness", ylabel="quasar purity", xlim=(0, 1.01), ylim=(0, 1.01),
           title="classifier against the published criteria (held out)")
    ax.legend(loc="lower left", fontsize=7)
    fig.tight_layout()
    paths.append(out_dir / PLOT_FILES[4])
    _save_png(fig, paths[-1])
    return paths


def write_outputs(cfg: Config, data: LabelledSet, result: TrainResult) -> dict:
    """Write model, card, evaluation JSON, held-out predictions and plots below the output folder."""
    import hashlib

    out = cfg.output_dir / cfg.classifier.output_folder
    model_bytes = _model_bytes(result.model, data.X[: min(len(data.X), 2000)])
    card = _card(cfg, data, result, hashlib.sha256(model_bytes).hexdigest())
    outputs = {"model": out / MODEL_FILE, "card": card_path(out / MODEL_FILE), "evaluation": out / EVALUATION_FILE,
               "predictions": out / PREDICTIONS_FILE}
    with atomic_path(outputs["model"]) as tmp:
        tmp.write_bytes(model_bytes)
    write_json(card, outputs["card"])
    write_json(result.evaluation, outputs["evaluation"])
    write_parquet(result.held_out, outputs["predictions"])
    outputs["plots"] = write_plots(result.evaluation, out)
    result.model.card = card
    result.outputs = outputs
    return outputs


def _pct(x) -> str:
    return "-" if x is None else f"{x:.1%}"


def summary_text(result: TrainResult, data: LabelledSet, configured=()) -> str:
    """A short plain-text account of the training set and the held-out figures.

    ``configured`` names the criteria of ``[colours]``, compared with the classifier too.
    """
    e = result.evaluation
    s = data.summary
    key = f"at_{int(COMPLETENESS_TARGET * 100)}_percent_completeness"
    lines = [f"training set: {s['rows']:,d} labelled sources that passed the zero-motion test ("
             + ", ".join(f"{n} {c:,d}" for n, c in s["by_class"].items()) + ")"]
    for name, src in s["sources"].items():
        dropped = sum(src.get("dropped_unknown_class", {}).values())
        lines.append(f"  {name}: {src['rows']:,d} rows, {src['matched']:,d} matched, {src['used']:,d} used"
                     + (f", {dropped:,d} with a class outside classifier.class_map dropped" if dropped else ""))
    if s["conflicting_labels"]:
        lines.append(f"  {s['conflicting_labels']:,d} sources labelled differently by two sources (precedence: "
                     + " > ".join(s["precedence"]) + ")")
    f = e["folds"]
    lines.append(f"cross-validation: {f['n']} folds over {f['regions']} sky regions (HEALPix order {f['group_order']})")
    lines.append(f"held-out, at threshold {e['threshold']:.2f}:   completeness   purity")
    for name in CLASSES:
        r = e["at_threshold"][name]
        lines.append(f"  {name:<8} {_pct(r['completeness']):>28} {_pct(r['purity']):>8}")
    b = e["brier"]
    lines.append(f"Brier score (held out): raw {b['raw']:.4f} → calibrated {b['calibrated']:.4f}")
    q = e["quasar"][key]
    best = e["best_criterion"]
    if best:
        c = e["criteria"][best]
        lines.append(f"quasar purity at {COMPLETENESS_TARGET:.0%} completeness: classifier {_pct(q['purity'])}, best "
                     f"published criterion ({best}) {_pct(c[key]['purity'])}")
        bd = c["at_published_boundary"]
        lines.append(f"  {best} at its published boundary: completeness {_pct(bd['completeness'])}, purity "
                     f"{_pct(bd['purity'])}; the classifier at that completeness: purity "
                     f"{_pct(c['classifier_purity_at_same_completeness'])}")
    else:
        lines.append(f"quasar purity at {COMPLETENESS_TARGET:.0%} completeness: classifier {_pct(q['purity'])}")
    for name in configured:
        if name in e["criteria"] and name != best:
            bd = e["criteria"][name]["at_published_boundary"]
            lines.append(f"  {name} (configured) at its published boundary: completeness {_pct(bd['completeness'])}, "
                         f"purity {_pct(bd['purity'])}; the classifier at that completeness: purity "
                         f"{_pct(e['criteria'][name]['classifier_purity_at_same_completeness'])}")
    return "\n".join(lines)


def train(cfg: Config, log=print) -> TrainResult:
    """``selector train``: labelled set from the feature cache, cross-validation, final model, outputs."""
    data = collect_labelled(cfg)
    log(f"labelled set: {data.summary['rows']:,d} sources; training {cfg.classifier.folds} folds and the final model")
    result = train_labelled(cfg, data, log=log)
    outputs = write_outputs(cfg, data, result)
    log(summary_text(result, data, cfg.colours.criteria))
    log(f"model: {outputs['model']} (card: {outputs['card'].name}); evaluation: {outputs['evaluation']} and "
        f"{len(outputs['plots'])} plots")
    shown = outputs["model"]
    try:
        shown = outputs["model"].resolve().relative_to(Path(cfg.base_dir).resolve())
    except ValueError:
        pass
    log(f"to score candidates with it, set classifier.model = \"{shown}\" and run `selector run`")
    return result
