"""One self-contained HTML page per run: provenance, cut-flow, pictures and the top targets.

``selector report --run DIR`` needs only the run folder: the configuration is read back from the
run's provenance record, the feature cache through :mod:`selector.store.cache` and the candidates
from the merged list (every path from :mod:`selector.store.layout`). The page embeds its pictures as base64 PNG data, carries its own style
sheet, has no scripts and refers to nothing outside itself, so it can be mailed, archived or opened
on a machine without a network. It holds no wall-clock time: the same run gives the same bytes.
"""

from __future__ import annotations

import base64
import html
import json
from pathlib import Path

import numpy as np
import pyarrow as pa

from selector.core.calibration import tie_fraction
from selector.core.priors import expected_purity
from selector.core.selection import rank_candidates
from selector.errors import InputError
from selector.jobs import tune
from selector.jobs.train import read_card
from selector.jobs.run.merge import format_chance
from selector.present import plots
from selector.settings.config import SELECTION_SECTIONS, plain
from selector.store.cache import find_rows, load_cache
from selector.store.io import read_parquet, write_text
from selector.store.layout import SKY_PLOT_FILES, TRAINING_PLOT_FILES, layout_of_run

__all__ = ["TABLE_COLUMNS", "build_report", "write_report"]

#: Columns of the top-targets table, where present: (column, heading, format).
TABLE_COLUMNS = (
    ("rank", "rank", "{:d}"),
    ("astro_id", "astrometric id", "{}"),
    ("ra_deg", "RA (deg)", "{:.6f}"),
    ("dec_deg", "Dec (deg)", "{:+.6f}"),
    ("ir_id", "infrared id", "{}"),
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
)

_STYLE = """
body { font-family: sans-serif; margin: 2em auto; max-width: 1100px; color: #222; line-height: 1.35; }
h1 { font-size: 1.6em; } h2 { font-size: 1.25em; border-bottom: 1px solid #ccc; padding-bottom: 0.2em; margin-top: 1.8em; }
table { border-collapse: collapse; font-size: 0.85em; margin: 0.5em 0; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.6em; text-align: right; }
th { background: #f0f0f0; } td.text, th.text { text-align: left; } td.text { white-space: nowrap; }
figure { margin: 1em 0; } figure img { max-width: 100%; border: 1px solid #ddd; }
figcaption { font-size: 0.9em; color: #555; }
pre { background: #f7f7f7; padding: 0.8em; overflow-x: auto; font-size: 0.8em; }
.note { color: #a04000; } .caution { background: #fdf2e9; padding: 0.6em; border-left: 4px solid #e67e22; }
"""


def _e(text) -> str:
    return html.escape(str(text), quote=True)


def _kv_table(rows) -> str:
    body = "".join(f"<tr><th class='text'>{_e(k)}</th><td class='text'>{_e(v)}</td></tr>" for k, v in rows)
    return f"<table>{body}</table>"


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


def _cell(value, fmt: str) -> str:
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return "–"
    try:
        return fmt.format(value)
    except (ValueError, TypeError):
        return str(value)


def _targets_table(cands: pa.Table, top: int) -> str:
    if cands.num_rows == 0:
        return "<p id='no-targets'>No candidates in this run.</p>"
    if "rank" in cands.column_names:
        cands = cands.drop(["rank"])
    ranked = rank_candidates(cands).slice(0, top)
    cols = [(c, h, f) for c, h, f in TABLE_COLUMNS if c in ranked.column_names]
    head = "".join(f"<th class='{'text' if f == '{}' else ''}'>{_e(h)}</th>" for _, h, f in cols)
    data = {c: ranked.column(c).to_pylist() for c, _, _ in cols}
    rows = []
    for i in range(ranked.num_rows):
        cells = "".join(f"<td class='{'text' if f == '{}' else ''}'>{_e(_cell(data[c][i], f))}</td>" for c, _, f in cols)
        rows.append(f"<tr class='target'>{cells}</tr>")
    return f"<table id='targets'><tr>{head}</tr>{''.join(rows)}</table>"


def _figure_html(name: str, title: str, png: bytes) -> str:
    data = base64.b64encode(png).decode("ascii")
    return (f"<figure id='plot-{_e(name)}'><img alt='{_e(title)}' src='data:image/png;base64,{data}'>"
            f"<figcaption>{_e(title)}</figcaption></figure>")


def _selection_rows(cfg) -> list[tuple[str, str]]:
    """The settings that decide the selection, one dotted key per row (training settings left out)."""
    data = plain(cfg)
    rows = []

    def walk(prefix, value):
        if isinstance(value, dict):
            for k in sorted(value):
                walk(f"{prefix}.{k}", value[k])
        else:
            rows.append((prefix, json.dumps(value)))

    for section in SELECTION_SECTIONS:
        if section == "classifier":
            for key in ("model", "threshold"):
                rows.append((f"classifier.{key}", json.dumps(data["classifier"].get(key))))
        else:
            walk(section, data[section])
    return rows


#: Pictures of the model's training shown in the classifier section, with captions.
_MODEL_PICTURES = (
    (SKY_PLOT_FILES[0], "held-out quasar completeness and purity at the labelled and at the sky class mix"),
    (SKY_PLOT_FILES[1], "reliability of P(quasar) on the sky, after the prior adjustment (held out)"),
    (TRAINING_PLOT_FILES[2], "calibration at the labelled class mix (held out)"),
    (TRAINING_PLOT_FILES[4], "the classifier against the published criteria (held out)"),
)


def _pct(x) -> str:
    return "–" if x is None else f"{x:.1%}"


def _classifier_section(cfg, cands: pa.Table, model_path: Path) -> list[str]:
    """What the model claims and what this list is expected to hold on the sky, with the model's pictures."""
    out = ["<h2 id='classifier'>Classifier</h2>"]
    p = cands.column("p_quasar").to_numpy(zero_copy_only=False).astype(float)
    expect = expected_purity(p) if len(p) else None
    rows = [("model file", str(model_path))]
    if expect is not None:
        rows.append(("expected purity of this list on the sky",
                     f"{expect.value:.1%} ± {expect.error:.1%} (mean P(quasar) on the sky over its {len(p):,d} "
                     "candidates)"))
    card = read_card(model_path)
    if card is None:
        out.append("<p class='note'>The model card beside the model file could not be read: the model's own figures "
                   "are not shown.</p>")
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
        rows += [
            ("expected purity of the default list, claimed at training",
             f"{_pct(claim.get('value'))} over {claim.get('listed', 0):,d} candidates" if claim else "–"),
            (f"held-out quasar purity at threshold {m.get('threshold', cfg.classifier.threshold):.2f}, labelled mix",
             f"{_pct(lab.get('purity'))} (completeness {_pct(lab.get('completeness'))})"),
            (f"held-out quasar purity at threshold {m.get('threshold', cfg.classifier.threshold):.2f}, sky mix",
             f"{_pct(sky.get('purity'))} (completeness {_pct(sky.get('completeness'))})"),
            ("classes", ", ".join(card.get("classes", []))),
            ("class proportions on the sky", f"{mix}; {how}"),
            ("class proportions of the labels", labelled),
            ("calibration", (card.get("model", {}).get("calibration") or {}).get("scheme", "–")
             if isinstance(card.get("model", {}).get("calibration"), dict) else "–"),
        ]
    rows.append(("candidates sharing their P(quasar) with another", f"{tie_fraction(p):.2%}"))
    if "beyond_training" in cands.column_names:
        flagged = int(np.sum(cands.column("beyond_training").to_numpy(zero_copy_only=False)))
        rows.append(("candidates beyond the labelled sources' features",
                     f"{flagged:,d} (flagged for a look, never removed)"))
    out.append(_kv_table(rows).replace("<table>", "<table id='classifier-figures'>", 1))
    if card is not None:
        for line in (card.get("label_coverage") or {}).get("warnings", []):
            out.append(f"<p class='note'>Labels and candidates: {_e(line)}.</p>")
    folder = model_path.parent
    for name, caption in _MODEL_PICTURES:
        if (folder / name).is_file():
            out.append(_figure_html(Path(name).stem, caption, (folder / name).read_bytes()))
    return out


def _model_file(run_dir: Path, cfg, prov: dict) -> Path:
    """The run's model file: as recorded relative to the output folder, else as the config names it."""
    rel = prov.get("classifier_model_file")
    return layout_of_run(run_dir).output_dir / rel if rel else cfg.path(cfg.classifier.model)


def build_report(run_dir: Path | str, top: int = 50) -> str:
    """The HTML text of the report of the run in ``run_dir``.

    Parameters
    ----------
    run_dir : path
        The run folder (``layout_of(cfg).run_dir``: it holds the provenance record, the merged candidates and
        the per-tile feature caches).
    top : int
        Rows of the top-targets table.
    """
    run_dir = Path(run_dir)
    cfg, prov = tune.run_config(run_dir)
    cands_path = layout_of_run(run_dir).candidates
    if not cands_path.exists():
        raise InputError(f"{cands_path}: not found; the run in {run_dir} has not finished its merge")
    cands = read_parquet(cands_path)
    cache = load_cache(cfg, tune.needed_columns(cfg, plots=True, classifier=False))
    ev = tune.evaluate(cache, cfg, use_classifier=False)
    is_cand, pos = find_rows(cache, cands.column("astro_id"))
    p_quasar = None
    if "p_quasar" in cands.column_names:
        p_all = cands.column("p_quasar").to_numpy(zero_copy_only=False).astype(float)
        p_quasar = np.full(cache.n_rows, np.nan)
        p_quasar[is_cand] = p_all[pos[is_cand]]
    flow = [tuple(x) for x in prov.get("cutflow", ev.cutflow)]
    data = plots.PlotData.from_evaluation(cache, ev, candidate=is_cand, p_quasar=p_quasar, cutflow=flow)
    pngs = plots.render_plots(data)

    notes = []
    if int(is_cand.sum()) != cands.num_rows:
        notes.append(f"{cands.num_rows - int(is_cand.sum()):,d} recorded candidates are not in the feature cache")
    if not cfg.classifier.model and not np.array_equal(is_cand, ev.passed):
        notes.append("the recorded candidates differ from a re-evaluation of the feature cache with the recorded "
                     "configuration: the run folder mixes results of different runs")

    fingerprints = []
    for kind, files in sorted(prov.get("input_fingerprints", {}).items()):
        for name, fp in sorted(files.items()) if isinstance(files, dict) else [("", files)]:
            fingerprints.append((f"{kind}: {name}", fp))
    prov_rows = [
        ("config hash", prov.get("config_hash", "?")),
        ("match config hash", prov.get("match_config_hash", "?")),
        ("selector version", prov.get("selector_version", "?")),
        ("tiles", f"{prov.get('tiles', len(cache.tiles)):,d} (HEALPix order {cfg.tiling.order}, nested)"),
        ("astrometric rows", f"{prov.get('rows', 0):,d}"),
        ("tile rejects", f"{prov.get('tile_rejects', 0):,d}"),
        ("candidates", f"{cands.num_rows:,d}"),
        ("complete", "yes" if prov.get("complete", True) else
         f"no: {len(prov.get('failed_tiles', []))} tiles failed and are missing from this report"),
        ("expected chance counterparts", format_chance(prov.get("chance_counterparts")) or "not estimated"),
        ("match radius", f"{cfg.match.radius_arcsec:g} arcsec"),
        ("epochs", f"astrometric {cfg.astrometric.epoch_jyear}, infrared {cfg.infrared.epoch_jyear} (Julian years)"),
    ]
    selection = _selection_rows(cfg)
    full = prov.get("config", {})
    captions = {name: title for name, title, _ in plots.PLOTS}

    parts = [
        "<!DOCTYPE html>",
        "<html lang='en'><head><meta charset='utf-8'>",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<title>selector report: {_e(run_dir.name)}</title><style>{_STYLE}</style></head><body>",
        "<h1>Quasar candidate selection: run report</h1>",
        "<p class='caution'>A candidate list is a statistical selection: zero motion and red infrared colours make a "
        "source likely to be a quasar, not certainly one. Every target needs spectroscopic confirmation.</p>",
        *(f"<p class='note'>Note: {_e(n)}.</p>" for n in notes),
        "<h2 id='provenance'>Provenance</h2>",
        _kv_table(prov_rows),
        "<h3>Input fingerprints</h3>",
        _kv_table(fingerprints) if fingerprints else "<p>none recorded</p>",
        "<h3>Selection settings</h3>",
        _kv_table(selection).replace("<table>", "<table id='selection'>", 1),
        "<details><summary>Full configuration</summary>",
        f"<pre id='config'>{_e(json.dumps(full, indent=2, sort_keys=True))}</pre></details>",
        "<h2 id='cutflow-section'>Cut-flow</h2>",
        _cutflow_table(flow),
        _figure_html("cutflow", captions["cutflow"], pngs["cutflow"]),
        "<h2 id='plots'>Diagnostics</h2>",
        *(_figure_html(name, captions[name], png) for name, png in pngs.items() if name != "cutflow"),
        *(_classifier_section(cfg, cands, _model_file(run_dir, cfg, prov))
          if cfg.classifier.model and "p_quasar" in cands.column_names else []),
        f"<h2 id='top-targets'>Top {min(top, cands.num_rows):,d} targets</h2>",
        _targets_table(cands, top),
        "</body></html>",
    ]
    return "\n".join(parts) + "\n"


def write_report(run_dir: Path | str, out: Path | str | None = None, top: int = 50) -> Path:
    """Write the report (atomically) to ``out``, by default the run's report file (:attr:`Layout.report`)."""
    run_dir = Path(run_dir)
    path = Path(out) if out is not None else layout_of_run(run_dir).report
    return write_text(build_report(run_dir, top), path)
