"""Tests of selector.tune: re-applying changed cuts to the feature cache equals a full re-run."""

from __future__ import annotations

import hashlib
import json
import shutil
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from selector.jobs import run as run_job
from selector.jobs.run import tile as tile_job
from selector.demo import mocksky as demo
from selector.jobs import tune
from selector.core import selection
from selector.cli import main
from selector.settings.config import from_dict, load_config, plain
from selector.errors import ConfigError, SelectorError
from selector.store.cache import load_cache
from selector.store.io import read_parquet
from selector.store.truth import load_truth
from selector.store.layout import layout_of

ROOT = Path(__file__).resolve().parents[1]

#: Changes tried against a full re-run: thresholds and a criterion; then extra stages and a linear cut.
CHANGES = {
    "thresholds": ["motion.test=separate", "motion.parallax_snr_max=5", 'colours.criteria=["assef2018_r75"]',
                   "motion.pm_pvalue_min=0.01", "quality.reject_extended_flags=false"],
    "stages": ["motion.fit_quality_max=1.1", "motion.joint_pvalue_min=0.01", "quality.extent_max_mag=0.05",
               "quality.extent_snr_max=3", "quality.negative_parallax_snr_max=2",
               "colours.galactic_latitude_min_deg=15",
               'colours.criteria=["stern2012", "assef2018_c75"]', "colours.combine=all",
               'colours.linear_cuts=[{name = "blue_edge", y = ["3.4", "4.6"], x = ["4.6"], slope = 0.05, '
               'intercept = 0.1}]'],
}


@pytest.fixture(scope="module")
def demo_run(small_demo):
    """A finished demo run at a small scale (shared, read-only): (config, config path, truth path)."""
    return small_demo


def _full_rerun(cfg, settings, folder: Path):
    """A real `selector run` with the changed config into another output folder (tiles shared)."""
    data = tune.apply_settings(plain(cfg), settings)
    data["project"]["output_dir"] = str(folder)
    new = from_dict(data, base_dir=cfg.base_dir)
    folder.mkdir(parents=True)
    (folder / "tiles").symlink_to(layout_of(cfg).tiles_dir, target_is_directory=True)
    run_job.run(new, workers=1, quiet=True, log=lambda *a: None)
    return new


@pytest.fixture(scope="module")
def reruns(demo_run, tmp_path_factory):
    cfg, _, _ = demo_run
    base = tmp_path_factory.mktemp("reruns")
    return {name: _full_rerun(cfg, s, base / name) for name, s in CHANGES.items()}


def _plain_table(t: pa.Table) -> pa.Table:
    return t.replace_schema_metadata(None).combine_chunks()


def _same(a: pa.Table, b: pa.Table) -> bool:
    """Equal schemas and values, NaN equal to NaN (pyarrow's own equals treats NaN as unequal)."""
    a, b = _plain_table(a), _plain_table(b)
    return a.schema.equals(b.schema) and a.num_rows == b.num_rows and a.to_pandas().equals(b.to_pandas())


# --- --set parsing --------------------------------------------------------------------------------

def test_parse_setting_reads_toml_values_and_bare_strings():
    assert tune.parse_setting("motion.parallax_snr_max=4") == (("motion", "parallax_snr_max"), 4)
    assert tune.parse_setting("classifier.threshold = 0.7") == (("classifier", "threshold"), 0.7)
    assert tune.parse_setting('colours.criteria=["stern2012", "assef2018_r75"]')[1] == ["stern2012", "assef2018_r75"]
    assert tune.parse_setting("motion.require_solution=false")[1] is False
    assert tune.parse_setting("colours.combine=all")[1] == "all"  # not TOML: taken as a bare string
    with pytest.raises(ConfigError, match="KEY=VALUE"):
        tune.parse_setting("motion.parallax_snr_max")


def test_empty_value_restores_the_default(demo_run):
    cfg, _, _ = demo_run
    changed = tune.with_settings(cfg, ["motion.fit_quality_max=1.5"])
    assert changed.motion.fit_quality_max == 1.5
    assert tune.with_settings(changed, ["motion.fit_quality_max="]).motion.fit_quality_max is None


@pytest.mark.parametrize("setting, message", [
    ("match.radius_arcsec=3", r"\[match\] changes the cross-match.*selector run"),
    ("tiling.order=3", r"\[tiling\].*selector run"),
    ("infrared.epoch_jyear=2010", r"\[infrared\].*selector run"),
    ("project.seed=3", r"\[project\] does not change the selection"),
    ("motoin.parallax_snr_max=4", r"unknown section 'motoin' \(did you mean 'motion'\?\)"),
    ("motion.parallax_snr_max=-1", r"motion\.parallax_snr_max = -1.* out of range"),
    ("motion.parallax_snr=4", r"unknown key 'motion\.parallax_snr' \(did you mean 'parallax_snr_max'"),
    ('colours.criteria=["stern2021"]', r"colours\.criteria\[0\] = 'stern2021' is not a known criterion"),
    ("colours.criteria=stern2021", r"colours\.criteria\[0\] = 'stern2021' is not a known criterion"),
    ("motion.parallax_snr_max.x=1", r"'motion\.parallax_snr_max' is a value, not a table"),
])
def test_bad_settings_are_one_line_errors_naming_the_key(demo_run, setting, message):
    cfg, _, _ = demo_run
    with pytest.raises(ConfigError, match=message) as info:
        tune.with_settings(cfg, [setting])
    assert "\n" not in str(info.value)


def test_a_single_name_stands_for_a_list_of_one(demo_run):
    cfg, _, _ = demo_run
    one = tune.with_settings(cfg, ["colours.criteria=stern2012"])
    assert one.colours.criteria == ("stern2012",)
    assert one == tune.with_settings(cfg, ['colours.criteria=["stern2012"]'])


# --- equality with a full re-run ------------------------------------------------------------------

@pytest.mark.parametrize("block_rows", [None, 257])
@pytest.mark.parametrize("name", sorted(CHANGES))
def test_tune_equals_a_full_rerun(demo_run, reruns, name, block_rows, monkeypatch):
    cfg, path, _ = demo_run
    new = reruns[name]
    if block_rows:  # blocks of rows that cut through tiles give the same result
        monkeypatch.setattr(tune, "_BLOCK_ROWS", block_rows)
    out = tune.tune(path, CHANGES[name])
    assert len(out.after.blocks) == (1 if block_rows is None else -(-out.cache.n_rows // block_rows))
    cache, ev = out.cache, out.after
    # the candidates, every column, as the re-run's merged list holds them
    rerun_cands = read_parquet(layout_of(new).run_dir / "candidates.parquet")
    assert rerun_cands.num_rows > 0
    assert _same(tune.candidates(cache, ev), rerun_cands)
    # cut-flow totals and every tile's cut-flow, as the re-run's select_tile wrote them
    prov = json.loads((layout_of(new).run_dir / "provenance.json").read_text())
    assert [list(x) for x in ev.cutflow] == prov["cutflow"]
    for i, tile in enumerate(cache.tiles):
        recorded = tile_job.read_tile_cutflow(new, int(tile))
        assert [list(x) for x in ev.tile_cutflow(i)] == recorded["cutflow"], tile
        assert cache.rejects_per_tile[i] == recorded["rejects"]
    # the "before" side is the run as recorded
    run_prov = json.loads((layout_of(cfg).run_dir / "provenance.json").read_text())
    assert [list(x) for x in out.before.cutflow] == run_prov["cutflow"]


def test_tile_rejects_are_counted_as_the_run_counts_them(demo_run, tmp_path):
    """Rows with a zero astrometric error leave the cut-flow per tile exactly as select_tile says."""
    cfg, _, _ = demo_run
    run_dir = tmp_path / "run"
    shutil.copytree(layout_of(cfg).run_dir, run_dir)
    moved, _ = tune.run_config(run_dir)
    cache0 = load_cache(moved, tune.needed_columns(moved))
    i = int(np.argmax(np.diff(cache0.offsets)))  # the tile with most cached rows
    path = cache0.folders[i] / "features.parquet"
    features = read_parquet(path)
    err = features.column("parallax_error_mas").to_numpy().copy()
    err[[0, 2]] = 0.0
    features = features.set_column(features.schema.get_field_index("parallax_error_mas"),
                                   features.schema.field("parallax_error_mas"), pa.array(err))
    from selector.store.io import write_parquet

    write_parquet(features, path)
    cache = load_cache(moved, tune.needed_columns(moved))
    assert cache.rejects_per_tile[i] == 2 and cache.rejects_per_tile.sum() == 2
    ev = tune.evaluate(cache, moved)
    res = tile_job.select_tile(moved, int(cache.tiles[i]), int(cache.rows_per_tile[i]), features)
    assert res.rejects.num_rows == 2
    assert [list(x) for x in ev.tile_cutflow(i)] == [list(x) for x in res.cutflow]
    selection.check_accounting(int(cache.rows_per_tile[i]), 2, ev.tile_cutflow(i))


def test_stage_list_follows_the_config(demo_run):
    _, path, _ = demo_run
    out = tune.tune(path, CHANGES["stages"])
    names = [n for n, _ in out.after.cutflow]
    assert names == ["input", "matched", "match_quality", "astrometric_solution", "fit_quality", "negative_parallax", "joint_motion",
                     "point_source", "infrared_colour", "galactic_latitude"]
    rows = tune.compare_cutflows(out.before.cutflow, out.after.cutflow)
    assert [r[0] for r in rows] == names
    assert dict((n, b) for n, b, _ in rows)["galactic_latitude"] is None  # not a stage of the recorded run
    # the separate test swaps the joint stage for its two cuts
    names = [n for n, _ in tune.tune(path, ["motion.test=separate"]).after.cutflow]
    assert names[names.index("negative_parallax") + 1:names.index("point_source")] == ["parallax", "proper_motion"]


def test_classifier_scores_are_applied_like_select_tile(demo_run):
    """With probabilities from a model, the vectorised path equals select_tile tile by tile."""
    cfg, _, _ = demo_run
    changed = tune.with_settings(cfg, ["classifier.threshold=0.8"])

    def scorer(table):  # any per-row function of the features will do
        c = selection._col(table, "ir_3p4_vegamag") - selection._col(table, "ir_4p6_vegamag")
        return 1.0 / (1.0 + np.exp(-4.0 * (np.nan_to_num(c) - 0.7)))

    cache = load_cache(changed, columns=None)
    ev = tune.evaluate(cache, changed, p_quasar=scorer(cache.table))
    assert ev.stage_names[-1] == "classifier"
    assert 0 < ev.cutflow[-1][1] < ev.cutflow[-2][1]
    parts = []
    for i, tile in enumerate(cache.tiles):
        features = read_parquet(cache.folders[i] / "features.parquet")
        res = tile_job.select_tile(changed, int(tile), int(cache.rows_per_tile[i]), features, scorer)
        assert [list(x) for x in ev.tile_cutflow(i)] == [list(x) for x in res.cutflow]
        if res.candidates.num_rows:
            parts.append(res.candidates)
    assert _same(tune.candidates(cache, ev),
                 selection.rank_candidates(pa.concat_tables(parts, promote_options="permissive")))


def test_model_in_config_is_loaded_once_through_classify(demo_run, monkeypatch):
    cfg, path, _ = demo_run
    calls = []

    def load_scorer(model_path, cfg_):
        calls.append(model_path)
        return lambda table: np.linspace(0.0, 1.0, table.num_rows)

    monkeypatch.setattr(tune, "load_scorer", load_scorer)
    out = tune.tune(path, ["classifier.model=model.skops", "classifier.threshold=0.9"])
    assert len(calls) == 1 and calls[0].endswith("model.skops")
    p = out.after.selection.derived["p_quasar"]
    assert out.after.cutflow[-1] == ("classifier", int(((p >= 0.9) & out.after.stage_mask("infrared_colour")).sum()))


def test_missing_model_file_is_a_clear_error(demo_run):
    _, path, _ = demo_run
    with pytest.raises(SelectorError, match="model.skops"):
        tune.tune(path, ["classifier.model=model.skops"])


# --- truth ----------------------------------------------------------------------------------------

def test_truth_figures_agree_with_the_demo_evaluation(demo_run):
    cfg, path, truth_path = demo_run
    out = tune.tune(path, CHANGES["thresholds"])  # finds catalogues/truth.parquet by itself
    assert out.truth is not None and out.truth.path == truth_path
    report = demo.evaluate_run(cfg, truth_path)  # the run as recorded is the "before"
    recovered = sum(report.by_population.get(p, 0) for p in ("quasar", "bright_quasar"))
    assert out.truth_before.true_selected == recovered
    assert out.truth_before.positives == report.quasars_total
    assert out.truth_before.purity == pytest.approx(report.purity)
    assert out.truth_after.true_selected != out.truth_before.true_selected


def test_label_file_with_a_label_column(demo_run, tmp_path):
    cfg, _, _ = demo_run
    cache = load_cache(cfg, tune.needed_columns(cfg, ids=True))
    ev = tune.evaluate(cache, cfg)
    ids = cache.table.column("astro_id").to_numpy()
    cand, other = ids[ev.passed], ids[~ev.passed]
    assert len(cand) >= 8
    rows = ([(i, "quasar") for i in cand[:6]] + [(i, "star") for i in cand[6:8]]
            + [(i, "Quasar") for i in other[:3]] + [(1, "quasar")])  # id 1 is in no catalogue
    path = tmp_path / "labels.csv"
    pacsv.write_csv(pa.table({"id": [str(i) for i, _ in rows], "label": [lab for _, lab in rows]}), path)
    score = tune.score_truth(load_truth(path, cache), ev.passed)
    assert (score.positives, score.true_selected, score.labelled_selected) == (10, 6, 8)
    assert score.completeness == pytest.approx(0.6)
    assert score.purity == pytest.approx(0.75)


def test_truth_file_without_the_needed_columns(demo_run, tmp_path):
    cfg, _, _ = demo_run
    cache = load_cache(cfg, tune.needed_columns(cfg, ids=True))
    path = tmp_path / "labels.csv"
    pacsv.write_csv(pa.table({"id": ["1"], "kind": ["quasar"]}), path)
    with pytest.raises(SelectorError, match="needs a column 'population' or 'label'"):
        load_truth(path, cache)


def test_truth_id_column_is_configurable(demo_run, tmp_path):
    cfg, _, _ = demo_run
    cache = load_cache(cfg, tune.needed_columns(cfg, ids=True))
    ids = cache.table.column("astro_id").to_pylist()[:5]
    path = tmp_path / "labels.parquet"
    pq.write_table(pa.table({"source": ids, "label": ["quasar"] * 4 + ["star"]}), path)
    labels = load_truth(path, cache, id_column="source")
    assert (labels.n_quasars, int(labels.quasar.sum()), int(labels.labelled.sum())) == (4, 4, 5)
    with pytest.raises(SelectorError, match="no column 'id'"):
        load_truth(path, cache)


def test_cache_of_chosen_tiles_equals_those_tiles_of_the_whole(demo_run):
    cfg, _, _ = demo_run
    whole = load_cache(cfg, ["astro_id"])
    assert len(whole.tiles) >= 2
    pick = [int(whole.tiles[-1]), int(whole.tiles[0])]
    part = load_cache(cfg, ["astro_id"], tiles=pick)
    assert list(part.tiles) == sorted(pick)
    for i, tile in enumerate(part.tiles):
        j = int(np.flatnonzero(whole.tiles == tile)[0])
        assert part.table.slice(part.tile_slice(i).start, part.tile_slice(i).stop - part.tile_slice(i).start).equals(
            whole.table.slice(whole.tile_slice(j).start, whole.tile_slice(j).stop - whole.tile_slice(j).start))
        assert part.rows_per_tile[i] == whole.rows_per_tile[j]


# --- the command ----------------------------------------------------------------------------------

def _snapshot(folder: Path) -> dict:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def test_command_prints_before_and_after_and_writes_nothing(demo_run, capsys):
    cfg, path, _ = demo_run
    before = _snapshot(cfg.output_dir)
    code = main(["tune", "--config", str(path), "--set", "motion.joint_pvalue_min=0.01",
                 "--set", 'colours.criteria=["assef2018_r75"]'])
    text = capsys.readouterr().out
    assert code == 0
    assert "motion.joint_pvalue_min: 0.0027 -> 0.01" in text
    line = next(ln for ln in text.splitlines() if ln.startswith("joint_motion "))
    assert len(line.split()) == 4  # stage, before, after, change
    assert "completeness" in text and "purity" in text
    assert _snapshot(cfg.output_dir) == before


def test_command_refuses_matching_keys(demo_run, capsys):
    _, path, _ = demo_run
    assert main(["tune", "--config", str(path), "--set", "match.radius_arcsec=3"]) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and "selector run" in err and "match.radius_arcsec" in err


def test_config_file_with_changed_matching_is_refused(demo_run, tmp_path):
    _, path, _ = demo_run
    edited = path.with_name("edited.toml")
    edited.write_text(path.read_text().replace("radius_arcsec = 4.0", "radius_arcsec = 3.5"))
    try:
        with pytest.raises(ConfigError, match=r"\[match\] differ.*a full `selector run` is needed"):
            tune.tune(edited)
    finally:
        edited.unlink()


def test_write_makes_the_tuned_selection_the_run_result(demo_run, reruns, tmp_path, capsys):
    cfg, path, _ = demo_run
    copy = tmp_path / "copy"
    shutil.copytree(Path(cfg.base_dir), copy, symlinks=True)
    code = main(["tune", "--config", str(copy / path.name), *sum((["--set", s] for s in CHANGES["thresholds"]), []),
                 "--write"])
    assert code == 0
    run_dir = layout_of(load_config(copy / path.name)).run_dir
    rerun = layout_of(reruns["thresholds"]).run_dir
    assert _same(read_parquet(run_dir / "candidates.parquet"), read_parquet(rerun / "candidates.parquet"))
    assert (run_dir / "cutflow.csv").read_bytes() == (rerun / "cutflow.csv").read_bytes()
    # the run now records the tuned settings: tuning again from it changes nothing
    again = tune.tune(copy / path.name, CHANGES["thresholds"])
    assert again.changes == [] and again.before.cutflow == again.after.cutflow
    capsys.readouterr()


def test_plots_option_writes_every_picture(demo_run, tmp_path, capsys):
    _, path, _ = demo_run
    assert main(["tune", "--config", str(path), "--set", "motion.parallax_snr_max=4", "--plots", str(tmp_path)]) == 0
    from selector.present.plots import PLOTS

    for plot in PLOTS:  # truth lies beside the demo's config, so the completeness picture is drawn too
        assert (tmp_path / f"{plot.name}.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    capsys.readouterr()


# --- the notebook ---------------------------------------------------------------------------------

def test_tuning_notebook_executes(tmp_path, monkeypatch):
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")

    nb = nbformat.read(ROOT / "notebooks" / "tuning.ipynb", as_version=4)
    assert any(c.cell_type == "markdown" for c in nb.cells) and any(c.cell_type == "code" for c in nb.cells)
    # a kernel spec of our own, first on the search path, so the notebook runs on this interpreter and
    # not on whatever "python3" kernel a user folder may hold
    spec = tmp_path / "jupyter" / "kernels" / "selector-test"
    spec.mkdir(parents=True)
    (spec / "kernel.json").write_text(json.dumps({
        "argv": [sys.executable, "-m", "ipykernel_launcher", "-f", "{connection_file}"],
        "display_name": "selector tests", "language": "python"}))
    monkeypatch.setenv("JUPYTER_PATH", str(tmp_path / "jupyter"))
    client = nbclient.NotebookClient(nb, kernel_name="selector-test", timeout=120,
                                     resources={"metadata": {"path": str(tmp_path)}})
    client.execute()
    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])]
    assert not [o for o in outputs if o.output_type == "error"]
    images = [o for o in outputs if "image/png" in o.get("data", {})]
    assert len(images) >= 3
    text = "".join(o.get("text", "") for o in outputs if o.output_type == "stream")
    assert "before" in text and "after" in text and "completeness" in text
