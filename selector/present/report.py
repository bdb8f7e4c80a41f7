"""One self-contained HTML page per run that leads with the results.

The page reads, top to bottom: the headline numbers (candidates, the classifier's expected quasars,
the target list, completeness and purity against truth labels when they are given), the ranked
table (the target list when ``selector targets`` has made one from this run, else the candidates),
the cut-flow, the plots with a caption under each that says what to look for, and at the end the
provenance and every selection setting that was applied.

``selector report --config FILE`` reads the run folder below the configuration's output folder and
finds the target list, the classifier's evaluation pictures and truth labels from the configuration;
``selector report --run DIR`` reads a run folder alone, with the configuration recorded in it. The
selection shown is always the one recorded with the run (what was applied), read back from its
provenance; the feature cache comes through :mod:`selector.store.cache`, every path from
:mod:`selector.store.layout`.

The page embeds its pictures as base64 PNG data, carries its own style sheet, has no scripts and
refers to nothing outside itself, so it can be mailed, archived or opened on a machine without a
network. It holds no wall-clock time: the same outputs give the same bytes.

Extending: a picture drawn from the selection alone is one :class:`~selector.present.plots.Plot`
entry in :data:`selector.present.plots.PLOTS`; a picture that needs more (the target list, the
classifier, new columns) is one :class:`ReportFigure` entry in :data:`FIGURES`; a block of the page
is one :class:`Section` entry in :data:`SECTIONS`; a headline number is one function in
:data:`HEADLINES`.
"""

from __future__ import annotations

import base64
import html
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, NamedTuple

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from selector.core.calibration import tie_fraction
from selector.core.metrics import completeness_purity
from selector.core.observability import altitude_deg
from selector.core.priors import expected_purity
from selector.core.selection import rank_candidates
from selector.errors import InputError
from selector.jobs import tune
from selector.jobs.targets.lists import DROP_REASONS
from selector.jobs.train import read_card
from selector.jobs.run.merge import format_chance
from selector.present import plots
from selector.settings.config import SELECTION_SECTIONS, Config, plain
from selector.store.cache import FeatureCache, find_rows, load_cache
from selector.store.io import file_sha256, read_parquet, read_table, write_text
from selector.store.layout import (SKY_PLOT_FILES, TRAINING_PLOT_FILES, classifier_dir, labelled_luminosities, layout_of,
                                   layout_of_run, target_full_list, target_list, targets_file)
from selector.store.truth import TruthLabels, find_truth, load_truth

__all__ = ["CANDIDATE_COLUMNS", "FIGURES", "HEADLINES", "SECTIONS", "TARGET_COLUMNS", "ReportFigure", "ReportInputs",
           "Section", "build_report", "selection_settings", "write_report"]

#: Columns of the ranked candidates table, where present: (column, heading, format).
CANDIDATE_COLUMNS = (
    ("rank", "rank", "{:d}"),
    ("astro_id", "astrometric id", "{}"),
    ("ra_deg", "RA (deg)", "{:.6f}"),
    ("dec_deg", "Dec (deg)", "{:+.6f}"),
    ("opt_broad_abmag", "broad (AB)", "{:.2f}"),
    ("ir_3p4_vegamag", "[3.4] (Vega)", "{:.2f}"),
    ("ir_4p6_vegamag", "[4.6] (Vega)", "{:.2f}"),
    ("ir_12_vegamag", "[12] (Vega)", "{:.2f}"),
    ("parallax_snr", "ϖ/σ", "{:+.2f}"),
    ("pm_pvalue", "p(μ = 0)", "{:.3f}"),
    ("colour_excess_mag", "colour excess (mag)", "{:+.3f}"),
    ("criteria_score", "criteria score", "{:.3f}"),
    ("p_quasar", "P(quasar) on the sky", "{:.4f}"),
    ("p_quasar_labelled_mix", "P(quasar) at the labelled mix", "{:.4f}"),
    ("beyond_training", "beyond training", "{}"),
    ("redshift", "z", "{:.2f}"),
    ("z_source", "z from", "{}"),
    ("lbol_erg_s", "L_bol (erg/s)", "{:.2e}"),
    ("expected_lbol_erg_s", "P × L_bol (erg/s)", "{:.2e}"),
    ("beyond_labelled_luminosity", "beyond labelled", "{}"),
)

#: Columns of the ranked targets table, where present (the first of each alternative found).
TARGET_COLUMNS = (
    ("priority", "priority", "{:d}"),
    ("rank", "rank", "{:d}"),
    ("name", "name", "{}"),
    ("astro_id", "astrometric id", "{}"),
    ("ra_hms", "RA (h:m:s)", "{}"),
    ("dec_dms", "Dec (d:m:s)", "{}"),
    ("opt_brightest_abmag", "optical (AB)", "{:.2f}"),
    ("opt_brightest_band", "band", "{}"),
    ("ir_brightest_vegamag", "infrared (Vega)", "{:.2f}"),
    ("ir_brightest_band", "band (µm)", "{}"),
    ("score", "score", "{:.3f}"),
    ("p_quasar", "P(quasar)", "{:.3f}"),
    ("best_night", "best night", "{}"),
    ("best_night_hours", "hours that night", "{:.1f}"),
    ("history_status", "status", "{}"),
)

#: Target-list drop reasons that mean "never observable from the site in the date range".
_NEVER_OBSERVABLE = ("below_altitude_limit", "not_in_dark_time", "moon_too_close")
#: Targets whose visibility is drawn night by night (the list's top; the plot's cost stays small).
_VISIBILITY_TARGETS = 500
#: Sampling step of the visibility plot between dusk and dawn (minutes).
_VISIBILITY_STEP_MIN = 15.0
#: A target counts as observable on a night with at least this much dark time above the limit (h).
_VISIBILITY_HOURS_MIN = 1.0

_STYLE = """
body { font-family: sans-serif; margin: 1.2em auto; max-width: 1060px; padding: 0 1em; color: #222; line-height: 1.35; }
h1 { font-size: 1.5em; margin: 0.2em 0; } .subtitle { color: #555; margin: 0 0 0.8em 0; font-size: 0.95em; }
h2 { font-size: 1.25em; border-bottom: 1px solid #ccc; padding-bottom: 0.2em; margin-top: 1.6em; }
#results h2 { margin-top: 0.6em; }
.stats { display: flex; flex-wrap: wrap; gap: 0.6em; margin: 0.4em 0; }
.stat { border: 1px solid #ddd; border-radius: 6px; padding: 0.45em 0.7em; min-width: 8.5em; flex: 1 1 8.5em; background: #fafafa; }
.stat .value { font-size: 1.6em; font-weight: bold; color: #1a5276; }
.stat .label { font-size: 0.85em; color: #333; } .stat .detail { font-size: 0.78em; color: #666; }
table { border-collapse: collapse; font-size: 0.85em; margin: 0.5em 0; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.6em; text-align: right; }
th { background: #f0f0f0; } td.text, th.text { text-align: left; } td.text { white-space: nowrap; }
figure { margin: 1.2em 0; } figure img { max-width: 100%; border: 1px solid #ddd; }
figcaption { font-size: 0.92em; color: #444; margin-top: 0.3em; max-width: 60em; }
pre { background: #f7f7f7; padding: 0.8em; overflow-x: auto; font-size: 0.8em; }
.note { color: #a04000; } .caution { font-size: 0.85em; color: #555; margin: 0.3em 0; }
"""


# --- what the page draws from ---------------------------------------------------------------------

@dataclass
class TargetView:
    """The target list made by ``selector targets``, as the report shows it.

    Attributes
    ----------
    table : pyarrow.Table
        The listed targets, in list order.
    dropped : dict
        Candidates not listed, by reason code (:data:`selector.jobs.targets.lists.DROP_REASONS`).
    nights : pyarrow.Table or None
        The nights of the date range (``night``, ``dusk_utc``, ``dawn_utc``, ``dark_hours``).
    current : bool
        Made from the candidates of this run (False: from an earlier run's candidates).
    site : object
        The observing site of the configuration.
    altitude_limit_deg : float
        The altitude a target must reach.
    """

    table: pa.Table
    dropped: dict
    nights: pa.Table | None
    current: bool
    site: object
    altitude_limit_deg: float


@dataclass
class ReportInputs:
    """Everything the page's sections and figures draw from.

    Attributes
    ----------
    cfg : Config
        The configuration recorded with the run (the selection that was applied).
    prov : dict
        The run's provenance record.
    run_dir : Path
        The run folder.
    candidates : pyarrow.Table
        The merged candidates, as written by the run.
    cache : FeatureCache
        The run's feature cache (the columns the plots read).
    data : plots.PlotData
        What the selection pictures draw.
    truth : TruthLabels or None
        Truth labels aligned with the cache, when given.
    targets : TargetView or None
        The target list, when ``selector targets`` has made one.
    classifier_folder : Path
        Where ``selector train`` writes its model and evaluation pictures.
    top : int
        Rows of the ranked table.
    notes : list of str
        Warnings shown under the headline.
    """

    cfg: Config
    prov: dict
    run_dir: Path
    candidates: pa.Table
    cache: FeatureCache
    data: plots.PlotData
    truth: TruthLabels | None
    targets: TargetView | None
    classifier_folder: Path
    top: int
    notes: list


def _e(text) -> str:
    return html.escape(str(text), quote=True)


def _column(table: pa.Table, name: str) -> np.ndarray:
    return table.column(name).to_numpy(zero_copy_only=False)


def _floats(table: pa.Table, name: str) -> np.ndarray:
    """A column as float64 (CSV and ECSV side tables may come as text)."""
    return np.asarray(pc.cast(table.column(name), pa.float64()).to_numpy(zero_copy_only=False), float)


def _read_targets(side_cfg, run_candidates: Path) -> TargetView | None:
    """The target list of ``side_cfg`` (None when there is no ``[targets]`` section or no list yet)."""
    tcfg = getattr(side_cfg, "targets", None)
    if tcfg is None:
        return None
    # the full table (scores, ranks, history) where written, else the compact list
    path = target_full_list(side_cfg, "ecsv")
    if not path.is_file():
        path = target_list(side_cfg, "ecsv")
    if not path.is_file():
        return None
    table, _ = read_table(path, what="target list")
    dropped = {code: 0 for code in DROP_REASONS}
    dropped_path = targets_file(side_cfg, "dropped")
    if dropped_path.is_file():
        d, _ = read_table(dropped_path, columns=["reason"], what="dropped targets")
        codes, counts = np.unique(np.asarray(_column(d, "reason"), str), return_counts=True)
        dropped.update({str(c): int(n) for c, n in zip(codes, counts)})
    nights_path = targets_file(side_cfg, "nights")
    nights = read_table(nights_path, what="nights table")[0] if nights_path.is_file() else None
    current = False
    prov_path = targets_file(side_cfg, "provenance")
    if prov_path.is_file():
        try:
            made_from = json.loads(prov_path.read_text(encoding="utf-8")).get("candidates", {})
        except ValueError:
            made_from = {}
        source = run_candidates.with_name(Path(str(made_from.get("file", "") or "none")).name)
        current = bool(made_from.get("file")) and source.is_file() and file_sha256(source) == made_from.get("sha256")
    return TargetView(table, dropped, nights, current, tcfg.site, float(tcfg.altitude_limit_deg))


def _gather(cfg: Config | None, run_dir: Path | None, top: int) -> ReportInputs:
    if run_dir is None:
        run_dir = layout_of(cfg).run_dir
    run_dir = Path(run_dir)
    recorded, prov = tune.run_config(run_dir)
    side = cfg if cfg is not None else recorded
    cands_path = layout_of_run(run_dir).candidates
    if not cands_path.exists():
        raise InputError(f"{cands_path}: not found; the run in {run_dir} has not finished its merge")
    cands = read_parquet(cands_path)
    columns = tune.needed_columns(recorded, plots=True, classifier=False)
    cache = load_cache(recorded, columns)
    ev = tune.evaluate(cache, recorded, use_classifier=False)
    is_cand, pos = find_rows(cache, cands.column("astro_id"))
    p_quasar = None
    if "p_quasar" in cands.column_names:
        p_all = cands.column("p_quasar").to_numpy(zero_copy_only=False).astype(float)
        p_quasar = np.full(cache.n_rows, np.nan)
        p_quasar[is_cand] = p_all[pos[is_cand]]
    truth_path = find_truth(side)
    truth = load_truth(truth_path, cache) if truth_path is not None else None
    flow = [tuple(x) for x in prov.get("cutflow", ev.cutflow)]
    data = plots.PlotData.from_evaluation(cache, ev, candidate=is_cand, p_quasar=p_quasar, cutflow=flow,
                                          truth_quasar=None if truth is None else truth.quasar)
    notes = []
    if int(is_cand.sum()) != cands.num_rows:
        notes.append(f"{cands.num_rows - int(is_cand.sum()):,d} recorded candidates are not in the feature cache")
    if not recorded.classifier.model and not np.array_equal(is_cand, ev.passed):
        notes.append("the recorded candidates differ from a re-evaluation of the feature cache with the recorded "
                     "configuration: the run folder mixes results of different runs")
    targets = _read_targets(side, cands_path)
    if targets is not None and not targets.current:
        notes.append("the target list was made from other candidates than this run's (an earlier run?); run "
                     "`selector targets` again to bring it up to date")
    return ReportInputs(recorded, prov, run_dir, cands, cache, data, truth, targets, classifier_dir(side), top, notes)


# --- headline numbers -----------------------------------------------------------------------------

class Stat(NamedTuple):
    """One headline number: its value as shown, what it counts, and a line of detail."""

    value: str
    label: str
    detail: str = ""


def _pct(x: float) -> str:
    return "–" if not np.isfinite(x) else f"{x:.1%}"


def _candidates_stats(r: ReportInputs) -> list[Stat]:
    rows = int(r.prov.get("rows", 0))
    matched = int(r.cache.n_rows)
    return [Stat(f"{r.candidates.num_rows:,d}", "candidates",
                 f"of {rows:,d} astrometric sources, {matched:,d} with an infrared counterpart")]


def _classifier_stats(r: ReportInputs) -> list[Stat]:
    if not r.cfg.classifier.model or "p_quasar" not in r.candidates.column_names or r.candidates.num_rows == 0:
        return []
    p = r.candidates.column("p_quasar").to_numpy(zero_copy_only=False).astype(float)
    p = p[np.isfinite(p)]
    if not len(p):
        return []
    expect = expected_purity(p)
    return [Stat(f"{expect.value * len(p):,.1f}", "expected quasars among the candidates",
                 f"expected purity on the sky {expect.value:.1%} ± {expect.error:.1%} (mean P(quasar); the "
                 "classifier's claim, as good as its calibration)")]


def _target_stats(r: ReportInputs) -> list[Stat]:
    t = r.targets
    if t is None:
        return []
    n = t.table.num_rows
    detail = ""
    if "priority" in t.table.column_names and n:
        prio = np.asarray(_column(t.table, "priority")).astype(int)
        detail = ", ".join(f"priority {c}: {int((prio == c).sum()):,d}" for c in (1, 2, 3))
    never = sum(t.dropped.get(code, 0) for code in _NEVER_OBSERVABLE)
    site = getattr(t.site, "name", "the site")
    return [Stat(f"{n:,d}", "targets on the list", detail),
            Stat(f"{t.dropped.get('known_object', 0):,d}", "known objects removed",
                 f"{t.dropped.get('observed', 0):,d} more already observed"),
            Stat(f"{never:,d}", f"never observable from {site}",
                 f"never above {t.altitude_limit_deg:g}° in dark time, or only near the Moon")]


def _truth_stats(r: ReportInputs) -> list[Stat]:
    if r.truth is None:
        return []
    s = completeness_purity(r.data.candidate, r.truth.quasar, r.truth.labelled)
    whole = s.true_selected / r.truth.n_quasars if r.truth.n_quasars else float("nan")
    return [Stat(_pct(whole), "completeness against the truth labels",
                 f"{s.true_selected:,d} of {r.truth.n_quasars:,d} true quasars selected "
                 f"({_pct(s.completeness)} of those with an infrared counterpart)"),
            Stat(_pct(s.purity), "purity against the truth labels",
                 f"{s.true_selected:,d} of {s.labelled_selected:,d} labelled candidates are quasars")]


#: Functions giving the headline numbers, in order. Add one to show a new number at the top.
HEADLINES: list[Callable[[ReportInputs], list[Stat]]] = [
    _candidates_stats, _classifier_stats, _target_stats, _truth_stats,
]


# --- tables ---------------------------------------------------------------------------------------

def _cell(value, fmt: str) -> str:
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return "–"
    try:
        return fmt.format(value)
    except (ValueError, TypeError):
        return str(value)


def _table_html(table: pa.Table, columns, table_id: str, row_class: str) -> str:
    cols = [(c, h, f) for c, h, f in columns if c in table.column_names]
    head = "".join(f"<th class='{'text' if f == '{}' else ''}'>{_e(h)}</th>" for _, h, f in cols)
    data = {c: table.column(c).to_pylist() for c, _, _ in cols}
    rows = []
    for i in range(table.num_rows):
        cells = "".join(f"<td class='{'text' if f == '{}' else ''}'>{_e(_cell(data[c][i], f))}</td>" for c, _, f in cols)
        rows.append(f"<tr class='{row_class}'>{cells}</tr>")
    return f"<table id='{table_id}'><tr>{head}</tr>{''.join(rows)}</table>"


def _kv_table(rows, table_id: str | None = None) -> str:
    body = "".join(f"<tr><th class='text'>{_e(k)}</th><td class='text'>{_e(v)}</td></tr>" for k, v in rows)
    ident = f" id='{_e(table_id)}'" if table_id else ""
    return f"<table{ident}>{body}</table>"


def _cutflow_table(flow) -> str:
    first = flow[0][1] if flow and flow[0][1] else 1
    out = ["<table id='cutflow'><tr><th class='text'>stage</th><th>left</th><th>removed</th><th>kept</th></tr>"]
    prev = flow[0][1] if flow else 0
    for name, count in flow:
        out.append(f"<tr><td class='text'>{_e(name)}</td><td>{count:,d}</td><td>{prev - count:,d}</td>"
                   f"<td>{count / first:.2%}</td></tr>")
        prev = count
    out.append("</table>")
    return "".join(out)


def selection_settings(cfg: Config) -> list[tuple[str, str]]:
    """Every key of the selection sections (:data:`~selector.settings.config.SELECTION_SECTIONS`), one
    dotted key per row with its value as JSON: all that decided which sources were selected."""
    data = plain(cfg)
    rows = []

    def walk(prefix, value):
        if isinstance(value, dict) and value:
            for k in sorted(value):
                walk(f"{prefix}.{k}", value[k])
        else:
            rows.append((prefix, json.dumps(value, sort_keys=True)))

    for section in SELECTION_SECTIONS:
        walk(section, data.get(section))
    return rows


# --- sections -------------------------------------------------------------------------------------

def _results_section(r: ReportInputs) -> str:
    stats = [s for fn in HEADLINES for s in fn(r)]
    cards = "".join(f"<div class='stat'><div class='value'>{_e(s.value)}</div><div class='label'>{_e(s.label)}</div>"
                    + (f"<div class='detail'>{_e(s.detail)}</div>" if s.detail else "") + "</div>" for s in stats)
    notes = "".join(f"<p class='note'>Note: {_e(n)}.</p>" for n in r.notes)
    return (f"<div class='stats'>{cards}</div>{notes}"
            "<p class='caution'>A candidate list is a statistical selection: zero motion and red infrared colours make "
            "a source likely to be a quasar, not certainly one. Every target needs spectroscopic confirmation.</p>")


def _ranked_title(r: ReportInputs) -> str:
    what, n = ("targets", r.targets.table.num_rows) if r.targets is not None else ("candidates", r.candidates.num_rows)
    return f"All {n:,d} {what}" if n <= r.top else f"Top {r.top:,d} {what} of {n:,d}"


def _ranked_section(r: ReportInputs) -> str:
    t = r.targets
    if t is not None:
        if t.table.num_rows == 0:
            return "<p id='no-targets'>No target is observable from the site in the date range.</p>"
        never = ", ".join(f"{code.replace('_', ' ')}: {t.dropped.get(code, 0):,d}" for code in _NEVER_OBSERVABLE)
        lead = (f"<p>The follow-up list, in priority order. Not listed: {t.dropped.get('known_object', 0):,d} known "
                f"objects, {t.dropped.get('observed', 0):,d} already observed, and the candidates that never rise "
                f"high enough in dark time ({never}).</p>")
        return lead + _table_html(t.table.slice(0, r.top), TARGET_COLUMNS, "targets", "target")
    if r.candidates.num_rows == 0:
        return "<p id='no-targets'>No candidates in this run.</p>"
    cands = r.candidates.drop(["rank"]) if "rank" in r.candidates.column_names else r.candidates
    ranked = rank_candidates(cands, r.cfg.ranking.order).slice(0, r.top)
    return ("<p>The candidates in ranked order (no target list has been made from this run: "
            "<code>selector targets</code> removes known objects and those the site never sees).</p>"
            + _table_html(ranked, CANDIDATE_COLUMNS, "targets", "target"))


def _cutflow_section(r: ReportInputs) -> str:
    return _cutflow_table(r.data.cutflow)


def _figure_html(name: str, caption: str, png: bytes) -> str:
    data = base64.b64encode(png).decode("ascii")
    return (f"<figure id='plot-{_e(name)}'><img alt='{_e(name.replace('_', ' '))}' src='data:image/png;base64,{data}'>"
            f"<figcaption>{_e(caption)}</figcaption></figure>")


def _plots_section(r: ReportInputs) -> str:
    parts = []
    for fig in FIGURES:
        png = fig.draw(r)
        if png is not None:
            parts.append(_figure_html(fig.name, fig.caption, png))
    return "".join(parts)


def _provenance_section(r: ReportInputs) -> str:
    prov, cfg = r.prov, r.cfg
    rows = [
        ("config hash", prov.get("config_hash", "?")),
        ("match config hash", prov.get("match_config_hash", "?")),
        ("selector version", prov.get("selector_version", "?")),
        ("tiles", f"{prov.get('tiles', len(r.cache.tiles)):,d} (HEALPix order {cfg.tiling.order}, nested)"),
        ("astrometric rows", f"{prov.get('rows', 0):,d}"),
        ("tile rejects", f"{prov.get('tile_rejects', 0):,d}"),
        ("candidates", f"{r.candidates.num_rows:,d}"),
        ("complete", "yes" if prov.get("complete", True) else
         f"no: {len(prov.get('failed_tiles', []))} tiles failed and are missing from this report"),
        ("expected chance counterparts", format_chance(prov.get("chance_counterparts")) or "not estimated"),
        ("match radius", f"{cfg.match.radius_arcsec:g} arcsec"),
        ("epochs", f"astrometric {cfg.astrometric.epoch_jyear}, infrared {cfg.infrared.epoch_jyear} (Julian years)"),
    ]
    fingerprints = []
    for kind, files in sorted(prov.get("input_fingerprints", {}).items()):
        for name, fp in sorted(files.items()) if isinstance(files, dict) else [("", files)]:
            fingerprints.append((f"{kind}: {name}", fp))
    return (_kv_table(rows, "provenance-table") + "<h3>Input fingerprints</h3>"
            + (_kv_table(fingerprints) if fingerprints else "<p>none recorded</p>"))


def _settings_section(r: ReportInputs) -> str:
    full = r.prov.get("config", {})
    return ("<p>Every key of the selection sections, as recorded with the run.</p>"
            + _kv_table(selection_settings(r.cfg), "selection")
            + "<details><summary>Full configuration</summary>"
            f"<pre id='config'>{_e(json.dumps(full, indent=2, sort_keys=True))}</pre></details>")


def _model_file(r: ReportInputs) -> Path:
    """The run's model file: as recorded relative to the output folder, else as the config names it."""
    rel = r.prov.get("classifier_model_file")
    return layout_of_run(r.run_dir).output_dir / rel if rel else r.cfg.path(r.cfg.classifier.model)


def _pct_or_dash(x) -> str:
    return "–" if x is None else f"{x:.1%}"


def _classifier_section(r: ReportInputs) -> str | None:
    """What the model claims and what this list is expected to hold on the sky (the model's pictures are
    among the plots)."""
    cfg, cands = r.cfg, r.candidates
    if not cfg.classifier.model or "p_quasar" not in cands.column_names:
        return None
    model_path = _model_file(r)
    notes = []
    p = cands.column("p_quasar").to_numpy(zero_copy_only=False).astype(float)
    expect = expected_purity(p) if len(p) else None
    rows = [("model file", str(model_path))]
    if expect is not None:
        rows.append(("expected purity of this list on the sky",
                     f"{expect.value:.1%} ± {expect.error:.1%} (mean P(quasar) on the sky over its {len(p):,d} "
                     "candidates)"))
    card = read_card(model_path)
    if card is None:
        notes.append("<p class='note'>The model card beside the model file could not be read: the model's own "
                     "figures are not shown.</p>")
    else:
        m = card.get("metrics", {})
        claim = m.get("default_list_expected_purity_on_the_sky") or {}
        lab = m.get("held_out_quasar_at_threshold_labelled_mix") or {}
        sky = m.get("held_out_quasar_at_threshold_sky_mix") or {}
        pri = card.get("sky_priors", {})
        how = {"em": "estimated at training by EM (Saerens, Latinne & Decaestecker 2002)",
               "config": "given in classifier.sky_priors"}.get(pri.get("method"), str(pri.get("method")))
        if "sky" in pri:
            mix = ", ".join(f"{c} {v:.4g}" for c, v in pri["sky"].items())
            labelled = ", ".join(f"{c} {v:.4g}" for c, v in pri.get("labelled_mix", {}).items())
        else:
            mix = f"per {pri.get('band')} magnitude bin (see the model card)"
            labelled = "per bin"
        threshold = m.get("threshold", cfg.classifier.threshold)
        calibration = card.get("model", {}).get("calibration")
        rows += [
            ("expected purity of the default list, claimed at training",
             f"{_pct_or_dash(claim.get('value'))} over {claim.get('listed', 0):,d} candidates" if claim else "–"),
            (f"held-out quasar purity at threshold {threshold:.2f}, labelled mix",
             f"{_pct_or_dash(lab.get('purity'))} (completeness {_pct_or_dash(lab.get('completeness'))})"),
            (f"held-out quasar purity at threshold {threshold:.2f}, sky mix",
             f"{_pct_or_dash(sky.get('purity'))} (completeness {_pct_or_dash(sky.get('completeness'))})"),
            ("classes", ", ".join(card.get("classes", []))),
            ("class proportions on the sky", f"{mix}; {how}"),
            ("class proportions of the labels", labelled),
            ("calibration", (calibration or {}).get("scheme", "–") if isinstance(calibration, dict) else "–"),
        ]
        for line in (card.get("label_coverage") or {}).get("warnings", []):
            notes.append(f"<p class='note'>Labels and candidates: {_e(line)}.</p>")
    rows.append(("candidates sharing their P(quasar) with another", f"{tie_fraction(p):.2%}"))
    if "beyond_training" in cands.column_names:
        flagged = int(np.sum(cands.column("beyond_training").to_numpy(zero_copy_only=False)))
        rows.append(("candidates beyond the labelled sources' features",
                     f"{flagged:,d} (flagged for a look, never removed)"))
    return (_kv_table(rows, "classifier-figures") + "".join(notes)
            + "<p>The model's held-out pictures are among the plots below.</p>")


def _luminosity_section(r: ReportInputs) -> str | None:
    """Redshift figures, counts and the luminosity–redshift plane, when the candidates carry luminosities."""
    cands = r.candidates
    if "lbol_erg_s" not in cands.column_names:
        return None
    lum = r.prov.get("luminosities") or {}
    col = {name: cands.column(name).to_numpy(zero_copy_only=False) for name in
           ("redshift", "redshift_low", "redshift_high", "lbol_erg_s", "z_source", "beyond_labelled_luminosity")}
    source = col["z_source"].astype(str)
    ev = lum.get("redshift_evaluation") or {}

    def fig(value, fmt):
        return "–" if value is None or (isinstance(value, float) and not np.isfinite(value)) else fmt.format(value)

    rows = [("ranking order", lum.get("ranking_order", r.cfg.ranking.order)),
            ("candidates with a spectroscopic redshift", f"{int(np.sum(source == 'spec')):,d}"),
            ("candidates with a photometric redshift", f"{int(np.sum(source == 'photo')):,d}"),
            ("more luminous than every labelled quasar", f"{int(np.sum(col['beyond_labelled_luminosity'])):,d}"),
            ("most luminous labelled quasar", fig(lum.get("labelled_lbol_max_erg_s"), "{:.3e} erg/s")),
            ("redshift model: held-out quasars", fig(ev.get("rows"), "{:,d}")),
            ("redshift model: sigma_NMAD = 1.48 median(|dz|/(1+z))", fig(ev.get("sigma_nmad"), "{:.3f}")),
            ("redshift model: outliers, |dz|/(1+z) > 0.15", fig(ev.get("outlier_fraction"), "{:.1%}")),
            ("redshift model: bias, median(dz/(1+z))", fig(ev.get("bias"), "{:+.3f}")),
            ("redshift model: true z inside the 68% interval", fig(ev.get("interval_68_coverage"), "{:.1%}"))]
    labelled = None
    path = labelled_luminosities(layout_of_run(r.run_dir))
    if path.is_file():
        t = read_parquet(path)
        labelled = {"redshift": t.column("redshift").to_numpy(), "lbol_erg_s": t.column("lbol_erg_s").to_numpy()}
    png = plots.figure_png(plots.luminosity_redshift(
        {"redshift": col["redshift"], "redshift_low": col["redshift_low"], "redshift_high": col["redshift_high"],
         "lbol_erg_s": col["lbol_erg_s"], "z_source": source, "beyond": col["beyond_labelled_luminosity"]},
        labelled))
    return ("<p>Photometric redshifts from the model's quantile regressors (held-out figures on labelled quasars in "
            "sky regions the model did not see); a spectroscopic redshift wins where a known object or a recorded "
            "outcome has one. Luminosities assume a power-law continuum under the [physics] settings.</p>"
            + _kv_table(rows, "redshift-figures")
            + _figure_html("luminosity_redshift", "Candidates in the luminosity–redshift plane, the labelled quasars "
                           "for reference: the most luminous candidates sit at the top; a ringed one outshines every "
                           "labelled quasar, so its redshift and luminosity rest on extrapolation: look at it.", png))


class Section(NamedTuple):
    """A block of the page: its anchor, its heading (text, or a function of the inputs) and the
    function that writes its HTML (None leaves the block out)."""

    id: str
    title: str | Callable[[ReportInputs], str]
    render: Callable[[ReportInputs], str | None]


#: The page's blocks, top to bottom: results first, bookkeeping last. Add one entry for a new block.
SECTIONS = [
    Section("results", "Results", _results_section),
    Section("ranked", _ranked_title, _ranked_section),
    Section("classifier", "Classifier", _classifier_section),
    Section("luminosities", "Redshifts and luminosities", _luminosity_section),
    Section("cutflow-section", "Cut-flow", _cutflow_section),
    Section("plots", "Plots", _plots_section),
    Section("provenance", "Provenance", _provenance_section),
    Section("settings", "Selection settings applied", _settings_section),
]


# --- figures --------------------------------------------------------------------------------------

class ReportFigure(NamedTuple):
    """A picture of the report: its name (the anchor ``plot-<name>``), the function that draws it from
    the :class:`ReportInputs` (PNG bytes, or None when it has nothing to show) and its caption, which
    says what to look for."""

    name: str
    draw: Callable[[ReportInputs], bytes | None]
    caption: str


def _from_plot(plot: plots.Plot) -> ReportFigure:
    return ReportFigure(plot.name, lambda r: plots.draw_png(plot.draw, r.data), plot.caption)


def _nights_mjd(nights: pa.Table, column: str) -> np.ndarray:
    from astropy.time import Time

    text = np.asarray(pc.cast(nights.column(column), pa.string()).fill_null("").to_numpy(zero_copy_only=False), str)
    out = np.full(len(text), np.nan)
    ok = text != ""
    if ok.any():
        out[ok] = Time(list(text[ok]), format="isot", scale="utc").mjd
    return out


def _visibility(r: ReportInputs):
    """Per night, how many listed targets are above the altitude limit for an hour or more of dark time,
    by priority class, beside the night's dark hours.

    Altitudes come from :func:`selector.core.observability.altitude_deg` (the same arithmetic as
    the list's observability), sampled every 15 minutes between each night's dusk and dawn from the
    list's nights table; the Moon is not considered here.
    """
    t = r.targets
    if t is None or t.nights is None or t.table.num_rows == 0 or t.nights.num_rows == 0:
        return None
    needed = {"ra_deg", "dec_deg"}
    if not needed <= set(t.table.column_names):
        return None
    table = t.table.slice(0, _VISIBILITY_TARGETS)
    ra, dec = _floats(table, "ra_deg"), _floats(table, "dec_deg")
    prio = (np.asarray(_floats(table, "priority")).astype(int) if "priority" in table.column_names
            else np.full(table.num_rows, 3))
    dusk, dawn = _nights_mjd(t.nights, "dusk_utc"), _nights_mjd(t.nights, "dawn_utc")
    nights = np.asarray(_column(t.nights, "night"), str)
    dark_h = _floats(t.nights, "dark_hours") if "dark_hours" in t.nights.column_names else np.full(len(nights), np.nan)
    step_d = _VISIBILITY_STEP_MIN / 1440.0
    times, which = [], []
    for i, (a, b) in enumerate(zip(dusk, dawn)):
        if np.isfinite(a) and np.isfinite(b) and b > a:
            s = np.arange(a + step_d / 2, b, step_d)
            times.append(s)
            which.append(np.full(len(s), i))
    if not times:
        return None
    mjd, night_of = np.concatenate(times), np.concatenate(which)
    high = altitude_deg(ra, dec, mjd, t.site) >= t.altitude_limit_deg          # (targets, samples)
    hours = np.stack([np.bincount(night_of, weights=row, minlength=len(nights)) for row in high.astype(float)])
    hours *= _VISIBILITY_STEP_MIN / 60.0
    seen = hours >= _VISIBILITY_HOURS_MIN                                        # (targets, nights)
    x = np.arange(len(nights))
    fig = plots.new_figure(height_in=4.8)
    ax = fig.add_subplot()
    bottom = np.zeros(len(nights))
    for c, colour in ((1, "#c0392b"), (2, "#e67e22"), (3, "#7f8c8d")):
        n = seen[prio == c].sum(axis=0)
        if n.any():
            ax.fill_between(x, bottom, bottom + n, step="mid", color=colour, alpha=0.75, label=f"priority {c}")
        bottom = bottom + n
    ax.set_ylabel(f"targets up ≥ {_VISIBILITY_HOURS_MIN:g} h in dark time")
    ax.set_ylim(0, max(1.0, bottom.max() * 1.1))
    ax2 = ax.twinx()
    ax2.plot(x, dark_h, color="k", lw=1.2, label="dark hours of the night")
    ax2.set_ylabel("dark hours")
    ax2.set_ylim(0, max(1.0, np.nanmax(dark_h) * 1.15) if np.isfinite(dark_h).any() else 1.0)
    step = max(1, len(nights) // 8)
    ax.set_xticks(x[::step])
    ax.set_xticklabels(nights[::step], rotation=30, ha="right")
    ax.set_xlim(-0.5, len(nights) - 0.5)
    shown = f"the top {table.num_rows:,d}" if t.table.num_rows > table.num_rows else f"all {table.num_rows:,d}"
    ax.set_title(f"visibility of {shown} targets from {getattr(t.site, 'name', 'the site')}, night by night")
    h1, l1 = ax.get_legend_handles_labels()
    h2, l2 = ax2.get_legend_handles_labels()
    ax.legend(h1 + h2, l1 + l2, loc="upper left", fontsize=10, framealpha=0.85)
    return fig


def _draw_visibility(r: ReportInputs) -> bytes | None:
    return plots.draw_png(_visibility, r)


def _training_picture(file_name: str) -> Callable[[ReportInputs], bytes | None]:
    def draw(r: ReportInputs) -> bytes | None:
        path = r.classifier_folder / file_name
        return path.read_bytes() if path.is_file() else None

    return draw


_TRAINING_CAPTIONS = (
    "From the last `selector train`, on held-out folds: completeness and purity of each class against the "
    "threshold. The dashed line is the threshold in use; look for where purity flattens while completeness "
    "still holds.",
    "Held-out confusion matrix: the quasar row shows which quasars are lost, and to what; the quasar column "
    "shows what the contaminants are.",
    "Calibration: calibrated points on the diagonal mean a P(quasar) of 0.8 is right four times in five, so "
    "the expected-quasar count in the results can be trusted.",
    "Which inputs the classifier leans on: a single dominant feature, or one that should not matter (such as the "
    "separation), points to a bias of the labelled set.",
    "The classifier against the published colour criteria on the same held-out sources: the curve should lie "
    "above and to the right of their points.",
)

_SKY_CAPTIONS = (
    "Held-out quasar completeness and purity at the labelled class mix and at the sky's: the sky's purity is "
    "the one a telescope meets; a large gap means the labelled set holds far more quasars than the sky.",
    "Reliability of P(quasar) on the sky after the prior adjustment (held out): points on the diagonal mean the "
    "expected-quasar count at the top of the page can be trusted.",
)

#: Every picture of the page, in order. Add one entry for a new picture (pictures drawn from the
#: selection alone go in :data:`selector.present.plots.PLOTS`, which this list takes in).
FIGURES = [
    *(_from_plot(p) for p in plots.PLOTS),
    ReportFigure("visibility", _draw_visibility,
                 "When the listed targets can be observed: the coloured bands count, night by night, the targets "
                 "above the altitude limit for at least an hour of dark time; the black line is the night's dark "
                 "time. Plan priority-1 targets on the nights where their band is wide; the Moon is not "
                 "considered here (the list's own hours and best night do consider it when configured)."),
    *(ReportFigure(f"classifier_{Path(name).stem}", _training_picture(name), caption)
      for name, caption in zip(TRAINING_PLOT_FILES, _TRAINING_CAPTIONS)),
    *(ReportFigure(f"classifier_{Path(name).stem}", _training_picture(name), caption)
      for name, caption in zip(SKY_PLOT_FILES, _SKY_CAPTIONS)),
]


# --- the page -------------------------------------------------------------------------------------

def build_report(cfg: Config | None = None, *, run_dir: Path | str | None = None, top: int = 50) -> str:
    """The HTML text of the report.

    Parameters
    ----------
    cfg : Config, optional
        The configuration: its run folder is reported, and its target list, classifier pictures and
        truth labels are shown.
    run_dir : path, optional
        A run folder read alone (``<output_dir>/run``), with the configuration recorded in it; give
        this or ``cfg``.
    top : int
        Rows of the ranked table.
    """
    if (cfg is None) == (run_dir is None):
        raise InputError("report: give a configuration or a run folder, one of the two")
    r = _gather(cfg, None if run_dir is None else Path(run_dir), top)
    parts = [
        "<!DOCTYPE html>",
        "<html lang='en'><head><meta charset='utf-8'>",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<title>selector report: {_e(r.run_dir.parent.name)}</title><style>{_STYLE}</style></head><body>",
        "<h1>Quasar candidates: run report</h1>",
        f"<p class='subtitle'>Run folder <code>{_e(r.run_dir.parent.name)}/{_e(r.run_dir.name)}</code> · "
        f"config hash {_e(str(r.prov.get('config_hash', '?'))[:12])} · provenance and settings at the end</p>",
    ]
    for section in SECTIONS:
        body = section.render(r)
        if body is None:
            continue
        title = section.title(r) if callable(section.title) else section.title
        parts.append(f"<section id='{_e(section.id)}'><h2 id='{_e(section.id)}-heading'>{_e(title)}</h2>{body}</section>")
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


def write_report(cfg: Config | None = None, *, run_dir: Path | str | None = None, out: Path | str | None = None,
                 top: int = 50) -> Path:
    """Write the report (atomically) to ``out``, by default the run's report file (:attr:`Layout.report`)."""
    if run_dir is None and cfg is not None:
        run_dir = layout_of(cfg).run_dir
    text = build_report(cfg, run_dir=None if cfg is not None else run_dir, top=top)
    path = Path(out) if out is not None else layout_of_run(run_dir).report
    return write_text(text, path)
