"""The one progress display: an updating line on a terminal, plain periodic lines otherwise (through the
job's log, where its other messages go), and that ingest, train, tune and targets show it (the run's
own line is tested in test_batch.py)."""

from __future__ import annotations

import io

import numpy as np
import pyarrow as pa

from conftest import base_config, build, random_astro, random_ir, write_parquet
from selector.jobs import ingest, train, tune
from selector.jobs.progress import Progress, clock
from selector.jobs.targets import lists
from selector.core.observability import night_grid


class _Terminal(io.StringIO):
    def isatty(self):
        return True


def test_plain_lines_every_interval_and_a_last_line():
    out = io.StringIO()
    bar = Progress("ingest x: rows read", 1000, unit="rows", interval_s=3600, stream=out)
    bar.update(0)       # the first state is shown at once, so a log shows the step began
    bar.update(500)     # within the interval: not shown
    bar.finish()
    lines = out.getvalue().splitlines()
    assert "\r" not in out.getvalue() and len(lines) == 2
    assert lines[0] == "ingest x: rows read 0/1,000 · starting"
    assert lines[1].startswith("ingest x: rows read 500/1,000 · ") and lines[1].endswith("elapsed")
    every = io.StringIO()
    bar = Progress("tiles", 4, unit="tiles", interval_s=0, stream=every)
    for i in range(1, 5):
        bar.update(i)
    bar.finish()
    assert len(every.getvalue().splitlines()) == 5 and "left" in every.getvalue().splitlines()[1]


def test_one_updating_line_on_a_terminal():
    term = _Terminal()
    kept = []
    bar = Progress("targets: observability computed", 10, unit="targets", interval_s=3600, stream=term,
                   on_line=kept.append)
    for i in range(1, 4):
        bar.update(i)
        bar.last_draw = float("-inf")  # draw every update
    bar.finish()
    text = term.getvalue()
    assert text.count("\n") == 1 and text.endswith("elapsed\x1b[K\n")
    assert "targets: observability computed 3/10" in text and "about" in text and "left" in text
    assert len(kept) == 2  # the first and the last state, for a log file


def test_unknown_total_and_quiet():
    out = io.StringIO()
    bar = Progress("rows", None, unit="rows", interval_s=0, stream=out)
    bar.update(7)
    assert out.getvalue().splitlines()[-1].startswith("rows 7 · ") and "left" not in out.getvalue()
    silent = io.StringIO()
    kept = []
    Progress("rows", 3, interval_s=0, stream=silent, enabled=False, on_line=kept.append).update(1)
    assert silent.getvalue() == "" and kept


def test_clock():
    assert clock(59.6) == "1:00" and clock(3600 + 61) == "1:01:01"


# --- the jobs show it --------------------------------------------------------------------------------

def test_plain_lines_go_to_the_log_when_given():
    shown, out = [], io.StringIO()
    bar = Progress("rows", 3, interval_s=0, stream=out, log=shown.append)
    bar.update(1)
    bar.finish()
    assert out.getvalue() == "" and len(shown) == 2 and shown[-1].startswith("rows 1/3")
    term = _Terminal()
    Progress("rows", 3, interval_s=0, stream=term, log=shown.append).update(2)
    assert "rows 2/3" in term.getvalue() and len(shown) == 2  # a terminal gets the live line instead


def test_ingest_shows_rows_read_and_tiles_written(tmp_path):
    rng = np.random.default_rng(3)
    write_parquet(random_astro(500, rng), tmp_path / "astro.parquet")
    write_parquet(random_ir(400, rng), tmp_path / "ir.parquet")
    cfg = build(base_config(), tmp_path)
    lines = []
    ingest.ingest(cfg, log=lines.append)
    err = "\n".join(lines)
    assert "ingest astrometric: rows read 0/500 · starting" in err  # the total from the files' metadata
    assert any(line.startswith("ingest astrometric: rows read 500/500") and line.endswith("elapsed")
               for line in err.splitlines())
    assert "ingest infrared: tiles written" in err


def test_train_shows_models_fitted(tmp_path):
    rng = np.random.default_rng(0)
    n = 900
    y = rng.choice(3, n, p=[0.2, 0.4, 0.4])
    X = rng.normal(size=(n, 3)) + np.array([[1.5, 1.0, 0.0], [0.0, 0.0, 1.0], [-0.5, 1.0, -1.0]])[y]
    groups = rng.integers(0, 30, n).astype(np.int64)
    table = pa.table({"astro_id": np.arange(1, n + 1, dtype=np.int64), "tile": groups,
                      "label": [train.CLASSES[k] for k in y], "label_source": ["synthetic"] * n})
    data = train.LabelledSet(table, X, y.astype(np.int64), groups, ["f_a", "f_b", "f_c"], 3,
                             {"rows": n, "by_class": {c: int(np.sum(y == k)) for k, c in enumerate(train.CLASSES)}})
    cfg_data = base_config()
    cfg_data["classifier"] = {"max_iter": 10, "max_leaf_nodes": 7, "permutation_repeats": 1, "folds": 3}
    lines = []
    train.train_labelled(build(cfg_data, tmp_path), data, log=lines.append)
    lines = [line for line in lines if line.startswith("train: ")]
    assert lines[0] == "train: models fitted 0/4 · starting"
    assert lines[-1].startswith("train: models fitted 4/4 (final model") and lines[-1].endswith("elapsed")


def test_tune_shows_rows_reselected(small_demo):
    _, path, _ = small_demo
    lines = []
    tune.tune(path, ["motion.parallax_snr_max=4"], log=lines.append)
    err = "\n".join(lines)
    assert "tune: rows re-selected 0/" in err and "elapsed" in err


def test_targets_show_observability_in_blocks(small_demo, monkeypatch):
    cfg, _, _ = small_demo
    t = cfg.targets
    grid = night_grid(t.site, t.start_date, t.end_date, t.sun_altitude_max_deg, t.time_step_min,
                      moon=t.moon_separation_min_deg is not None)
    ra = np.array([10.0, 150.0, 250.0, 300.0, 45.0])
    dec = np.array([-30.0, 10.0, -60.0, 80.0, 0.0])
    lines = []
    whole = lists._observability_shown(cfg, ra, dec, grid, lines.append)
    monkeypatch.setattr(lists, "_OBSERVABILITY_BLOCK", 2)
    blocks = lists._observability_shown(cfg, ra, dec, grid, lines.append)
    for a, b in zip(whole, blocks):  # every target on its own: blocks change nothing
        assert np.array_equal(a, b)
    err = "\n".join(lines)
    assert "targets: observability computed 0/5 · starting" in err
    assert "targets: observability computed 5/5" in err
