"""Re-apply changed selection settings to the feature cache of a finished run, in seconds.

The feature cache (``run/tiles/tile<N>/features.parquet``) holds every matched owned source and
depends only on the matching sections of the configuration (:data:`~selector.config.MATCH_SECTIONS`).
Changing a zero-motion threshold, a colour criterion, the ranking or the classifier threshold
therefore needs no new cross-match: :func:`selector.store.cache.load_cache` reads the columns the
selection needs (:func:`needed_columns`) from every tile at once, and :func:`evaluate` runs
:func:`selector.core.selection.select` over all rows, vectorised, in blocks of rows that are not
aligned with tiles. The per-tile cut-flow comes from
``np.bincount`` over each row's tile, one per stage. Because ``select`` is a row-by-row function,
the result is exactly what ``selector run`` gives with the same configuration
(``tests/test_tune.py`` checks this against a real re-run).

The command::

    selector tune --config FILE [--set KEY=VALUE ...] [--truth FILE] [--plots DIR] [--write]

compares the selection recorded in the run (the configuration kept in ``run/provenance.json``)
with the one in ``FILE`` plus the ``--set`` changes. It writes nothing unless asked: ``--plots DIR``
writes the diagnostic pictures of the new selection, ``--write`` makes the new selection the run's
result (through ``selector run`` itself, which re-applies the selection to each tile's cache).
"""

from __future__ import annotations

import copy
import json
import os
import time
import tomllib
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np
import pyarrow as pa

from selector.core import schema, selection
from selector.core.metrics import Score, completeness_purity
from selector.core.photometry import CRITERIA
from selector.errors import ConfigError, InputError, SelectorError
from selector.jobs.train import load_scorer
from selector.jobs import run as run_job
from selector.jobs.progress import Progress
from selector.settings.config import (
    MATCH_SECTIONS,
    SELECTION_SECTIONS,
    Config,
    config_hash,
    from_dict,
    load_config,
    plain,
)
from selector.settings.validate import suggest
from selector.store.cache import FeatureCache, find_rows, load_cache, tile_features
from selector.store.io import read_parquet
from selector.store.layout import layout_of_run, layout_of
from selector.store.truth import TruthLabels, find_truth, load_truth

__all__ = [
    "Evaluation",
    "Recorded",
    "TuneOutcome",
    "apply_settings",
    "candidates",
    "compare",
    "compare_cutflows",
    "evaluate",
    "format_outcome",
    "needed_columns",
    "parse_setting",
    "recorded",
    "run_config",
    "score_truth",
    "setting_changes",
    "tune",
    "with_settings",
    "write_results",
]

#: Columns every evaluation needs: the zero-motion inputs (the reader adds what the tile-reject test
#: reads, which are among them). A row's tile is known from the file it is read from, so the tile
#: column is not loaded.
_BASE_COLUMNS = ("parallax_mas", "parallax_error_mas", "pmra_mas_yr", "pmdec_mas_yr",
                 "pmra_error_mas_yr", "pmdec_error_mas_yr", "pm_corr", "parallax_pmra_corr",
                 "parallax_pmdec_corr")
#: Extra columns the plots read.
PLOT_COLUMNS = ("astro_id", "ra_deg", "dec_deg", "sep_arcsec",
                *(schema.infrared_mag_column(b) for b in ("3.4", "4.6", "12")))

#: Rows evaluated at a time (see :func:`evaluate`).
_BLOCK_ROWS = 1 << 17

_REMOVE = object()  # value of ``KEY=`` (nothing after the sign): drop the key, back to its default


# --- --set KEY=VALUE ----------------------------------------------------------------------------

def parse_setting(text: str):
    """Split ``KEY=VALUE`` into a dotted key path and a TOML value.

    The value is read as a TOML value (``4``, ``0.7``, ``true``, ``["stern2012"]``,
    ``{name = "x", ...}``); anything TOML cannot read is taken as a bare string, so
    ``colours.combine=all`` works without quotes. ``KEY=`` with nothing after the sign removes the
    key, which restores its default.

    Returns
    -------
    (tuple of str, object)
        The key path and the value (or a private marker for removal).
    """
    if "=" not in text:
        raise ConfigError(f"--set {text!r}: write KEY=VALUE, for example motion.parallax_snr_max=4")
    key, raw = text.split("=", 1)
    key, raw = key.strip(), raw.strip()
    parts = tuple(key.split("."))
    if not key or any(not p or not p.replace("_", "a").isalnum() for p in parts):
        raise ConfigError(f"--set {text!r}: {key!r} is not a dotted key path such as motion.parallax_snr_max")
    if raw == "":
        return parts, _REMOVE
    try:
        value = tomllib.loads(f"x = {raw}")["x"]
    except tomllib.TOMLDecodeError:
        value = raw
    return parts, value


def _check_section(parts: tuple[str, ...], text: str) -> None:
    section = parts[0]
    if section in MATCH_SECTIONS:
        raise ConfigError(f"--set {text}: [{section}] changes the cross-match and so the feature cache; "
                          "tune cannot re-apply it, a full `selector run` is needed")
    if section not in SELECTION_SECTIONS:
        known = set(SELECTION_SECTIONS) | set(MATCH_SECTIONS) | {"project", "run", "targets", "known"}
        if section in known:
            raise ConfigError(f"--set {text}: [{section}] does not change the selection; tune re-applies only "
                              f"{', '.join(f'[{s}]' for s in SELECTION_SECTIONS)}")
        raise ConfigError(f"--set {text}: unknown section '{section}'{suggest(section, SELECTION_SECTIONS)}")
    if len(parts) < 2:
        raise ConfigError(f"--set {text}: name a key inside [{section}], for example {section}.<key>=VALUE")


def apply_settings(data: dict, settings: Sequence[str]) -> dict:
    """Return a copy of plain configuration data with ``KEY=VALUE`` changes applied.

    Only keys of the selection sections (:data:`~selector.config.SELECTION_SECTIONS`) may be set;
    a key of a matching section is refused with a message that a full run is needed. The result
    is not validated here (:func:`with_settings` and :func:`tune` do that).
    """
    out = copy.deepcopy(data)
    for text in settings:
        parts, value = parse_setting(text)
        _check_section(parts, text)
        node = out
        for i, part in enumerate(parts[:-1]):
            child = node.get(part)
            if child is None:
                child = node[part] = {}
            if not isinstance(child, dict):
                raise ConfigError(f"--set {text}: '{'.'.join(parts[:i + 1])}' is a value, not a table")
            node = child
        if value is _REMOVE:
            node.pop(parts[-1], None)
        else:
            node[parts[-1]] = value
    return out


def with_settings(cfg: Config, settings: Sequence[str]) -> Config:
    """``cfg`` with ``KEY=VALUE`` changes to its selection settings, re-validated as a whole.

    Raises
    ------
    ConfigError
        One line naming the key, for a bad value, an unknown key or a key that changes matching.
    """
    data = apply_settings(plain(cfg), settings)
    try:
        return from_dict(data, base_dir=cfg.base_dir)
    except ConfigError as exc:
        raise ConfigError(f"with --set {' '.join(settings)}: {exc}") from None


def run_config(run_dir: Path, base_dir: Path | None = None) -> tuple[Config, dict]:
    """The configuration a run was made with, rebuilt from its ``provenance.json``.

    Parameters
    ----------
    run_dir : Path
        The run folder (``layout_of(cfg).run_dir``).
    base_dir : Path, optional
        Folder the config's relative paths are taken from. Without it, ``project.output_dir`` is
        pointed at ``run_dir``'s parent, so the run folder alone is enough.

    Returns
    -------
    (Config, dict)
        The configuration and the provenance record.
    """
    layout = layout_of_run(run_dir)
    path = layout.provenance
    if not path.exists():
        raise InputError(f"{path}: not found; is {run_dir} the run folder of a finished `selector run`?")
    try:
        prov = json.loads(path.read_text(encoding="utf-8"))
        data = prov["config"]
    except (ValueError, KeyError):
        raise InputError(f"{path}: not a run record (no 'config'); re-run `selector run`") from None
    if base_dir is None:
        data = copy.deepcopy(data)
        data.setdefault("project", {})["output_dir"] = str(layout.output_dir)
        base_dir = layout.output_dir
    try:
        return from_dict(data, base_dir=base_dir), prov
    except ConfigError as exc:
        raise ConfigError(f"{path}: the recorded configuration is no longer valid ({exc})") from None


# --- the feature cache ----------------------------------------------------------------------------

def _needed_bands(cfg: Config) -> list[str]:
    """Infrared bands the selection reads: the criteria's, the cuts', the ranking's.

    A band left out reads as missing, which changes nothing for criteria that do not use it.
    """
    wanted = {b for name in cfg.colours.criteria for b in CRITERIA[name].bands}
    wanted.add(cfg.ranking.brightness_band)
    for cut in cfg.colours.linear_cuts:
        wanted.update(q for q in (*cut.x, *cut.y) if q in schema.INFRARED_BANDS)
    if cfg.colours.optical_infrared is not None:
        wanted.add(cfg.colours.optical_infrared.infrared_band)
    return [b for b in cfg.infrared_bands() if b in wanted]


def needed_columns(cfg: Config, plots: bool = False, classifier: bool = True,
                   ids: bool = False) -> tuple[str, ...] | None:
    """Feature columns the selection with ``cfg`` reads.

    None (every column) when a classifier is configured and ``classifier`` is true, since a model
    may read any feature; ``plots`` adds the columns the pictures need, ``ids`` the source ids
    (for truth labels).
    """
    if classifier and cfg.classifier.model:
        return None
    cols = (["astro_id"] if ids else []) + list(_BASE_COLUMNS)
    if cfg.motion.fit_quality_max is not None:
        cols.append("fit_quality")
    if selection.match_method(cfg) != "nearest":
        cols.append(selection.MATCH_PROBABILITY_COLUMN)
    cols += selection.point_source_columns(cfg)
    cols += [schema.infrared_mag_column(b) for b in _needed_bands(cfg)]
    c = cfg.colours
    if c.linear_cuts or c.optical_infrared is not None:
        cols += [schema.optical_mag_column(b) for b in cfg.optical_bands()]
    if c.galactic_latitude_min_deg is not None:
        cols.append("gal_b_deg")
    if plots:
        cols += [*PLOT_COLUMNS, *(schema.optical_mag_column(b) for b in cfg.optical_bands())]
    return tuple(dict.fromkeys(cols))


# --- evaluation ---------------------------------------------------------------------------------

@dataclass
class Evaluation:
    """The selection of one configuration over a whole feature cache.

    Attributes
    ----------
    cfg : Config
        The configuration evaluated.
    stage_names : list of str
        Cut-flow stages: ``input``, ``matched``, then the selection stages.
    tile_counts : numpy.ndarray
        ``(n_tiles, n_stages)`` rows left after each stage in each tile.
    blocks : list of selector.selection.Selection
        The selection of consecutive blocks of cache rows; :attr:`selection` joins them (on
        first use, so a cut-flow alone costs no copy of the derived columns).
    seconds : float
        Wall time of the evaluation (not part of any result file).
    """

    cfg: Config
    stage_names: list
    tile_counts: np.ndarray
    blocks: list
    seconds: float = 0.0
    _joined: dict = field(default_factory=dict, repr=False)

    @property
    def selection(self) -> selection.Selection:
        """Cumulative stage masks and derived columns over every cache row."""
        if "selection" not in self._joined:
            stages = [(name, self.stage_mask(name)) for name, _ in self.blocks[0].stages]
            derived = {k: np.concatenate([np.asarray(b.derived[k]) for b in self.blocks])
                       for k in self.blocks[0].derived}
            self._joined["selection"] = selection.Selection(stages, derived)
        return self._joined["selection"]

    def stage_mask(self, name: str) -> np.ndarray:
        """Rows left after the stage ``name`` (KeyError for a stage this selection lacks)."""
        key = ("mask", name)
        if key not in self._joined:
            names = [n for n, _ in self.blocks[0].stages]
            j = names.index(name) if name in names else None
            if j is None:
                raise KeyError(name)
            self._joined[key] = np.concatenate([b.stages[j][1] for b in self.blocks])
        return self._joined[key]

    @property
    def passed(self) -> np.ndarray:
        """The candidates among the cache rows."""
        return self.stage_mask(self.blocks[0].stages[-1][0])

    @property
    def cutflow(self) -> list[tuple[str, int]]:
        """Totals over every tile, as ``selector run`` reports them."""
        totals = self.tile_counts.sum(axis=0)
        return [(n, int(c)) for n, c in zip(self.stage_names, totals)]

    def tile_cutflow(self, i: int) -> list[tuple[str, int]]:
        """The cut-flow of the ``i``-th tile of the cache (as in its ``cutflow.json``)."""
        return [(n, int(c)) for n, c in zip(self.stage_names, self.tile_counts[i])]


def _scorer(cfg: Config):
    return load_scorer(str(cfg.path(cfg.classifier.model)), cfg)


def evaluate(cache: FeatureCache, cfg: Config, p_quasar: np.ndarray | None = None,
             use_classifier: bool = True, threads: int | None = None, *, progress: Progress | None = None) -> Evaluation:
    """Apply ``cfg``'s selection to every cached row at once.

    Parameters
    ----------
    cache : FeatureCache
        From :func:`selector.store.cache.load_cache` (with every column when a classifier is used).
    cfg : Config
        Configuration whose selection sections are applied; its matching sections must be those
        of the run (see :func:`tune`).
    p_quasar : numpy.ndarray or selection.ModelScores, optional
        Classifier probabilities (or a model's scores) of the cache rows, computed once and shared
        between evaluations.
        When None and ``cfg.classifier.model`` is set (and ``use_classifier``), the model scores
        the cache here.
    use_classifier : bool
        False leaves the classifier stage out (the report does, for a model it cannot load).
    threads : int, optional
        Blocks of rows evaluated side by side (default: one per core).
    progress : Progress, optional
        Counts the rows evaluated (``selector tune`` shows it).
    """
    t0 = time.perf_counter()
    if p_quasar is None and use_classifier and cfg.classifier.model:
        if cache.columns is not None:
            raise SelectorError("the classifier needs every feature column: load the cache with columns=None")
        p_quasar = _scorer(cfg)(cache.table)
    if p_quasar is not None and not isinstance(p_quasar, selection.ModelScores):
        p_quasar = np.asarray(p_quasar, float)
    if not use_classifier:
        p_quasar = None
    n, n_tiles = cache.n_rows, len(cache.tiles)
    # select() is row by row, so blocks of rows give exactly the whole-table result; blocks small
    # enough for the cache keep its many temporaries from being fresh, page-faulted memory, which
    # is several times faster than one pass over 10^7 rows (and the blocks can run side by side)
    bounds = list(range(0, n, _BLOCK_ROWS)) or [0]

    def block(lo):
        hi = min(lo + _BLOCK_ROWS, n)
        scores = None if p_quasar is None else (p_quasar.rows(lo, hi) if isinstance(p_quasar, selection.ModelScores)
                                                else p_quasar[lo:hi])
        part = selection.select(cache.table.slice(lo, hi - lo), cfg, scores)
        idx = cache.tile_index(lo, hi)
        if progress is not None:
            progress.add(hi - lo)
        return part, np.stack([np.bincount(idx[mask], minlength=n_tiles) for _, mask in part.stages], axis=1)

    with ThreadPoolExecutor(max_workers=max(1, min(threads or os.cpu_count() or 1, len(bounds)))) as pool:
        parts = list(pool.map(block, bounds))
    stage_names = [name for name, _ in parts[0][0].stages]
    counts = np.empty((n_tiles, len(stage_names) + 1), np.int64)
    counts[:, 0] = cache.rows_per_tile - cache.rejects_per_tile
    counts[:, 1:] = np.sum([c for _, c in parts], axis=0)
    # the first stage of select() is "matched": every usable row
    return Evaluation(cfg, ["input"] + stage_names, counts, [p for p, _ in parts], time.perf_counter() - t0)


def _tile_selection(ev: Evaluation, s: slice) -> selection.Selection:
    return selection.Selection([(n, m[s]) for n, m in ev.selection.stages],
                              {k: np.asarray(v)[s] for k, v in ev.selection.derived.items()})


def candidates(cache: FeatureCache, ev: Evaluation) -> pa.Table:
    """Every column of the candidates of ``ev``, as the run's merged ``candidates.parquet`` holds them.

    Ranked over all tiles by score then id (:func:`selector.selection.rank_candidates`, as the
    merge does); full rows are read only for tiles that have candidates.
    """
    passed_tiles = np.unique(np.searchsorted(cache.offsets, np.flatnonzero(ev.passed), side="right") - 1)
    parts = []
    for i in passed_tiles:
        s = cache.tile_slice(int(i))
        parts.append(selection.candidates_table(tile_features(cache, int(i)), _tile_selection(ev, s)))
    if not parts:
        return pa.table({"astro_id": pa.array([], pa.int64())})
    return selection.rank_candidates(pa.concat_tables(parts, promote_options="permissive"))


def write_results(ev: Evaluation, config_path=None, log=print):
    """Make ``ev``'s selection the run's result, through ``selector run`` itself.

    The matching settings are the run's, so every tile's feature cache is reused and only the
    selection is re-applied, tile by tile, with the run's manifest, lock and merge: the run folder
    then holds exactly what ``selector run`` with ``ev.cfg`` writes, and a later ``selector run``
    with another configuration re-selects from it as usual.
    """
    result = run_job.run(ev.cfg, quiet=True, log=log, config_path=config_path)
    log(f"wrote the tuned selection as the run's result: {result.candidates:,} candidates in "
        f"{result.outputs['ecsv']}")
    return result


# --- truth labels ---------------------------------------------------------------------------------

def score_truth(labels: TruthLabels, passed: np.ndarray) -> Score:
    """Completeness and purity of the cache rows in ``passed`` (:func:`selector.core.metrics.completeness_purity`).

    The completeness denominator is every labelled quasar of the file, with or without a cache
    row: a quasar the cross-match lost is a quasar the selection missed.
    """
    score = completeness_purity(passed, labels.quasar, labels.labelled)
    return score._replace(positives=labels.n_quasars)


# --- the tuning loop ------------------------------------------------------------------------------

@dataclass
class Recorded:
    """A run's selection as its outputs record it: the "before" of ``selector tune``.

    Attributes
    ----------
    cfg : Config
        The configuration kept in ``provenance.json``.
    cutflow : list of (stage, count)
        The run's cut-flow totals.
    candidate_ids : pyarrow.Array
        ``astro_id`` of the run's candidates.
    passed : numpy.ndarray of bool or None
        The candidates among a cache's rows, once aligned with one (needs the ids loaded).
    """

    cfg: Config
    cutflow: list
    candidate_ids: pa.Array
    passed: np.ndarray | None = None


def recorded(run_dir: Path, cfg: Config, prov: dict, cache: FeatureCache | None = None) -> Recorded:
    """The run's recorded selection; aligned with ``cache`` when its ids are loaded."""
    path = layout_of_run(run_dir).candidates
    if not path.exists():
        raise InputError(f"{path}: not found; the run in {run_dir} has not finished its merge")
    ids = read_parquet(path, columns=["astro_id"]).column("astro_id").combine_chunks()
    out = Recorded(cfg, [(str(n), int(c)) for n, c in prov.get("cutflow", [])], ids)
    if cache is not None and "astro_id" in cache.table.column_names:
        out.passed = find_rows(cache, ids)[0]
    return out


@dataclass
class TuneOutcome:
    """Before and after of a tuning step.

    Attributes
    ----------
    before : Recorded or Evaluation
        The run's selection (as recorded, from ``selector tune``; any evaluation, from the API).
    after : Evaluation
        The changed selection over the cache.
    changes : list of (key, before, after)
        Selection settings that differ.
    truth_before, truth_after : selector.core.metrics.Score or None
        Against the truth labels, where given.
    """

    cache: FeatureCache
    before: "Recorded | Evaluation"
    after: Evaluation
    changes: list = field(default_factory=list)
    truth: TruthLabels | None = None
    truth_before: Score | None = None
    truth_after: Score | None = None


def _flatten(data, prefix=""):
    if isinstance(data, dict):
        out = {}
        for k in sorted(data):
            out.update(_flatten(data[k], f"{prefix}{k}."))
        return out
    return {prefix[:-1]: data}


def setting_changes(before: Config, after: Config) -> list[tuple[str, object, object]]:
    """Selection settings that differ between two configurations, as (dotted key, before, after)."""
    a = _flatten({k: plain(before)[k] for k in SELECTION_SECTIONS})
    b = _flatten({k: plain(after)[k] for k in SELECTION_SECTIONS})
    return [(k, a.get(k), b.get(k)) for k in sorted(set(a) | set(b)) if a.get(k) != b.get(k)]


def _check_same_match(cfg: Config, prov: dict, where: str) -> None:
    recorded = prov.get("match_config_hash")
    if recorded is not None and config_hash(cfg, MATCH_SECTIONS) != recorded:
        run_cfg = prov.get("config", {})
        now = plain(cfg)
        differ = [s for s in MATCH_SECTIONS if json.dumps(run_cfg.get(s), sort_keys=True)
                  != json.dumps(now.get(s), sort_keys=True)]
        which = ", ".join(f"[{s}]" for s in differ) or "the matching sections"
        raise ConfigError(f"{where}: {which} differ from the run in {layout_of(cfg).run_dir}, so its feature cache does not "
                          "apply; a full `selector run` is needed")


def tune(config_path: Path | str, settings: Sequence[str] = (), truth: Path | str | None = None,
         plots: bool = False, *, log=print) -> TuneOutcome:
    """Compare a run's recorded selection with ``config_path`` plus ``settings``, on its feature cache.

    Parameters
    ----------
    config_path : path
        The configuration file; its matching sections must be those of the run.
    settings : sequence of str
        ``KEY=VALUE`` changes to selection settings (see :func:`parse_setting`).
    truth : path, optional
        Truth labels for completeness and purity; by default the demo's, when present.
    plots : bool
        Also load the columns the plots read.
    """
    config_path = Path(config_path)
    base = load_config(config_path)  # validates the file as written, with its own messages
    data = tomllib.loads(config_path.read_text(encoding="utf-8"))
    data = apply_settings(data, settings)
    try:
        after_cfg = from_dict(data, base_dir=config_path.resolve().parent)
    except ConfigError as exc:
        raise ConfigError(f"{config_path} with --set {' '.join(settings)}: {exc}") from None
    before_cfg, prov = run_config(layout_of(base).run_dir, base_dir=config_path.resolve().parent)
    _check_same_match(after_cfg, prov, str(config_path))
    truth_path = Path(truth) if truth is not None else find_truth(after_cfg)
    cache = load_cache(after_cfg, needed_columns(after_cfg, plots, ids=truth_path is not None))
    with Progress("tune: rows re-selected", cache.n_rows, unit="rows",
                  interval_s=after_cfg.run.progress_interval_s, log=log) as shown:
        shown.update(0)
        after = evaluate(cache, after_cfg, progress=shown)  # scores with the classifier, when one is set
    labels = load_truth(truth_path, cache) if truth_path is not None else None
    # the run's own record is the "before": nothing to re-evaluate, and exactly what the run gave
    before = recorded(layout_of(base).run_dir, before_cfg, prov, cache if labels is not None else None)
    return compare(cache, before, after, labels)


def compare(cache: FeatureCache, before, after: Evaluation, labels: TruthLabels | None = None) -> TuneOutcome:
    """Put two selections over one cache side by side (settings changed; truth figures where labels exist).

    ``before`` is an :class:`Evaluation` or a :class:`Recorded` aligned with ``cache``.
    """
    out = TuneOutcome(cache, before, after, setting_changes(before.cfg, after.cfg), truth=labels)
    if labels is not None:
        out.truth_before = score_truth(labels, before.passed)
        out.truth_after = score_truth(labels, after.passed)
    return out


def compare_cutflows(before: list, after: list) -> list[tuple[str, int | None, int | None]]:
    """Stages of two cut-flows side by side (a stage only one of them has gets None in the other)."""
    b = dict(before)
    a = dict(after)
    order = [n for n, _ in after]
    for i, (name, _) in enumerate(before):
        if name not in a:
            prev = before[i - 1][0] if i else None
            order.insert(order.index(prev) + 1 if prev in order else len(order), name)
    return [(n, b.get(n), a.get(n)) for n in order]


def _fmt(v) -> str:
    return "-" if v is None else f"{v:,d}"


def _trained_on(cfg: Config, truth_path: Path) -> bool:
    """Whether ``cfg`` scores with a classifier whose training labels are ``truth_path``."""
    labels = getattr(cfg.classifier, "labels", None)
    file = getattr(labels, "file", None)
    if not cfg.classifier.model or not file:
        return False
    return cfg.path(file).resolve() == Path(truth_path).resolve()


def format_outcome(out: TuneOutcome) -> str:
    """The printed summary: changed settings, cut-flows before and after, truth figures."""
    lines = []
    if out.changes:
        lines.append("changed selection settings:")
        for key, a, b in out.changes:
            lines.append(f"  {key}: {json.dumps(a)} -> {json.dumps(b)}")
    else:
        lines.append("no selection setting differs from the run's")
    if not out.after.cfg.classifier.model and any(k == "classifier.threshold" for k, _, _ in out.changes):
        lines.append("  (classifier.threshold has no effect: no classifier.model is set)")
    for note in out.after.blocks[0].notes:
        lines.append(f"  ({note})")
    rows = compare_cutflows(out.before.cutflow, out.after.cutflow)
    width = max(len(n) for n, _, _ in rows)
    lines.append("")
    lines.append(f"{'stage':<{width}}  {'before':>12}  {'after':>12}  {'change':>10}")
    for name, b, a in rows:
        change = "" if a is None or b is None else f"{a - b:+,d}"
        lines.append(f"{name:<{width}}  {_fmt(b):>12}  {_fmt(a):>12}  {change:>10}")
    if out.truth is not None:
        tb, ta = out.truth_before, out.truth_after
        lines.append("")
        lines.append(f"against the truth labels in {out.truth.path} ({tb.positives:,d} true quasars):")
        lines.append(f"  {'':<14}{'before':>10}  {'after':>10}")
        lines.append(f"  {'completeness':<14}{tb.completeness:>10.1%}  {ta.completeness:>10.1%}")
        lines.append(f"  {'purity':<14}{tb.purity:>10.1%}  {ta.purity:>10.1%}")
        lines.append(f"  {'recovered':<14}{tb.true_selected:>10,d}  {ta.true_selected:>10,d}")
        unl_b, unl_a = tb.unlabelled, ta.unlabelled
        if unl_b or unl_a:
            lines.append(f"  {'unlabelled':<14}{unl_b:>10,d}  {unl_a:>10,d}")
        if any(_trained_on(ev.cfg, out.truth.path) for ev in (out.before, out.after)):
            lines.append("  (the classifier was trained on these labels: its figures are optimistic; judge it by "
                         "the held-out evaluation of `selector train`)")
    lines.append("")
    lines.append(f"{out.cache.n_rows:,d} cached rows from {len(out.cache.tiles):,d} tiles: read in "
                 f"{out.cache.seconds:.2f} s, re-evaluated in {out.after.seconds:.2f} s")
    return "\n".join(lines)


# --- the command ----------------------------------------------------------------------------------
