"""Nightly batch runs: manifest, resumption after SIGKILL, incremental runs, failure isolation, executors.

Every test works on its own copy of one small ingested mock sky (a few dozen order-4 tiles). The
reference is one uninterrupted run; the other runs must end with the same bytes in every merged
output, however they got there.
"""

from __future__ import annotations

import io
import json
import os
import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

from selector.jobs import run as run_job
from selector.jobs.run.merge import TileSummary, merge, provenance, ranked_table
from selector.jobs.run.progress import Reporter
from selector import cli
from selector.demo import mocksky as demo
from selector.settings.config import load_config
from selector.errors import SelectorError
from selector.jobs.ingest import ingest
from selector.store.io import parquet_writer_options, write_table_file
from selector.store.layout import layout_of
from selector.store.manifest import Manifest

MERGED = ("candidates.ecsv", "candidates.csv", "candidates.parquet", "cutflow.csv", "provenance.json")


def _quiet(*args, **kwargs):
    pass


def _merged_bytes(cfg) -> dict:
    return {name: (layout_of(cfg).run_dir / name).read_bytes() for name in MERGED}


def _tile_files(cfg) -> dict:
    lay = layout_of(cfg)
    return {p.relative_to(lay.run_dir): p for p in sorted(lay.run_tiles_dir.rglob("*")) if p.is_file()}


def _tile_bytes(cfg) -> dict:
    return {rel: p.read_bytes() for rel, p in _tile_files(cfg).items()}


def _mtimes(cfg) -> dict:
    return {rel: p.stat().st_mtime_ns for rel, p in _tile_files(cfg).items()}


@pytest.fixture(scope="module")
def template(tmp_path_factory) -> Path:
    """The mock catalogues, the demo config and the ingested tiles, not yet run."""
    root = tmp_path_factory.mktemp("batch") / "template"
    root.mkdir()
    demo.write_mock_sky(demo.make_mock_sky(seed=3, scale=0.03), root / "catalogues")
    ingest(load_config(demo.write_demo_config(root)), log=_quiet)
    return root


@pytest.fixture(scope="module")
def reference(template, tmp_path_factory) -> dict:
    """One uninterrupted run: the project folder and the bytes of every output."""
    root = tmp_path_factory.mktemp("batch") / "reference"
    shutil.copytree(template, root)
    cfg = load_config(root / "demo.toml")
    result = run_job.run(cfg, workers=2, quiet=True, log=_quiet)
    assert result.ok and result.actions["computed"] == result.tiles > 20
    return {"root": root, "result": result, "merged": _merged_bytes(cfg), "tiles": _tile_bytes(cfg)}


def _copy(src: Path, dest: Path):
    # copy2 keeps sizes and modification times, as moving a project folder would
    shutil.copytree(src, dest)
    return load_config(dest / "demo.toml")


@pytest.fixture
def finished(reference, tmp_path):
    """A private copy of the reference project, run finished."""
    return _copy(reference["root"], tmp_path / "project")


def _cli_run(config: Path, kill_at: str | None, workers: int = 2) -> subprocess.CompletedProcess:
    env = dict(os.environ)
    env.pop(run_job.KILL_AT_ENV, None)
    if kill_at:
        env[run_job.KILL_AT_ENV] = kill_at
    return subprocess.run([sys.executable, "-m", "selector.cli", "run", "--config", str(config), "--workers",
                           str(workers), "--quiet"], env=env, capture_output=True, text=True, timeout=120)


def test_killed_runs_resume_to_identical_outputs(template, reference, tmp_path):
    """SIGKILL before any tile is recorded, mid-way, and during the merge; each resumed by the next run."""
    cfg = _copy(template, tmp_path / "project")
    config = tmp_path / "project" / "demo.toml"
    n_tiles = reference["result"].tiles

    # 1: the first tile's files are written, but it is not yet recorded
    proc = _cli_run(config, "tile@1")
    assert proc.returncode == -9, proc.stderr
    with Manifest(layout_of(cfg).manifest) as man:
        assert man.counts()["done"] == 0 and man.counts()["pending"] == n_tiles
        assert man.runs()[0]["status"] == "running"

    # 2: mid-way, right after the 25th tile is recorded
    proc = _cli_run(config, "recorded@25")
    assert proc.returncode == -9, proc.stderr
    with Manifest(layout_of(cfg).manifest) as man:
        assert man.counts()["done"] == 25
    assert not (layout_of(cfg).run_dir / "candidates.ecsv").exists()

    # 3: during the merge, after the ECSV list and before the CSV one
    proc = _cli_run(config, "merge:ecsv")
    assert proc.returncode == -9, proc.stderr
    run_dir = layout_of(cfg).run_dir
    assert (run_dir / "candidates.ecsv").exists() and not (run_dir / "candidates.csv").exists()

    proc = _cli_run(config, None)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert _merged_bytes(cfg) == reference["merged"]
    assert _tile_bytes(cfg) == reference["tiles"]
    with Manifest(layout_of(cfg).manifest) as man:
        runs = man.runs()
        assert [r["status"] for r in reversed(runs)] == ["died", "died", "died", "ok"]
        assert runs[0]["computed"] == 0  # every tile was recorded before the merge was killed
        computed = [e["tile"] for e in man.events() if e["action"] == "computed"]
    # no tile that was recorded as finished was ever computed again
    assert sorted(computed) == sorted(set(computed)) and len(computed) == n_tiles


def test_unchanged_rerun_does_no_tile_work(finished, reference):
    before = _mtimes(finished)
    merged_before = {n: (layout_of(finished).run_dir / n).stat().st_mtime_ns for n in MERGED}
    result = run_job.run(finished, workers=2, quiet=True, log=_quiet)
    assert result.ok
    assert result.actions == {"computed": 0, "reselected": 0, "verified": 0, "failed": 0,
                              "reused": reference["result"].tiles}
    assert not result.merged
    assert _mtimes(finished) == before
    assert {n: (layout_of(finished).run_dir / n).stat().st_mtime_ns for n in MERGED} == merged_before
    assert _merged_bytes(finished) == reference["merged"]


def test_one_changed_input_recomputes_that_tile_alone(finished, reference, tmp_path):
    # the top candidate gets a large parallax in the raw astrometric file, then everything is re-ingested
    top = pq.read_table(layout_of(finished).run_dir / "candidates.parquet").sort_by([("criteria_score", "descending")])
    source, tile = top.column("astro_id")[0].as_py(), top.column("tile")[0].as_py()
    raw_dir = finished.path("catalogues/astrometric")
    for part in sorted(raw_dir.glob("*.parquet")):
        table = pq.read_table(part)
        hit = pc.equal(table.column("srcid"), source)
        if pc.any(hit).as_py():
            plx = pc.if_else(hit, 50.0, table.column("plx"))
            pq.write_table(table.set_column(table.column_names.index("plx"), "plx", plx), part)
    ingest(finished, log=_quiet)
    before = _mtimes(finished)

    result = run_job.run(finished, workers=2, quiet=True, log=_quiet)
    assert result.ok and result.actions["computed"] == 1 and result.actions["reselected"] == 0
    with Manifest(layout_of(finished).manifest) as man:
        worked = {e["tile"]: e["action"] for e in man.events(result.run_id)}
    assert [t for t, a in worked.items() if a == "computed"] == [tile]
    # the neighbours that read the file only re-read its positions and motions, which did not change
    assert set(a for t, a in worked.items() if t != tile) <= {"verified"}
    changed = {rel for rel, m in _mtimes(finished).items() if before[rel] != m}
    assert changed and {rel.parts[1] for rel in changed} == {f"tile{tile:08d}"}
    assert result.candidates == reference["result"].candidates - 1

    # the incremental result is the one a full recomputation gives
    forced = _copy(Path(finished.base_dir), tmp_path / "forced")
    full = run_job.run(forced, workers=2, quiet=True, log=_quiet, force=True)
    assert full.actions["computed"] == reference["result"].tiles
    assert _merged_bytes(forced) == _merged_bytes(finished)


def _edit_config(cfg, old: str, new: str):
    path = Path(cfg.base_dir) / "demo.toml"
    text = path.read_text()
    assert text.count(old) == 1, old
    path.write_text(text.replace(old, new))
    return load_config(path)


def test_selection_change_reuses_the_feature_cache_and_match_change_recomputes(finished, reference):
    features = {rel: m for rel, m in _mtimes(finished).items() if rel.name == "features.parquet"}
    loose = _edit_config(finished, "joint_pvalue_min = 0.0027", "joint_pvalue_min = 0.0001")
    result = run_job.run(loose, workers=2, quiet=True, log=_quiet)
    n = reference["result"].tiles
    assert result.actions["reselected"] == n and result.actions["computed"] == 0
    assert dict(result.cutflow)["joint_motion"] > dict(reference["result"].cutflow)["joint_motion"]
    assert {rel: m for rel, m in _mtimes(finished).items() if rel.name == "features.parquet"} == features

    # back to the original cuts: re-selection from the cache gives the bytes of the first computation
    back = _edit_config(finished, "joint_pvalue_min = 0.0001", "joint_pvalue_min = 0.0027")
    result = run_job.run(back, workers=2, quiet=True, log=_quiet)
    assert result.actions["reselected"] == n
    assert _merged_bytes(back) == reference["merged"] and _tile_bytes(back) == reference["tiles"]

    wider = _edit_config(finished, "radius_arcsec = 4.0", "radius_arcsec = 4.5")
    result = run_job.run(wider, workers=2, quiet=True, log=_quiet)
    assert result.actions["computed"] == n


def test_second_run_on_the_same_folder_is_refused(finished, capsys):
    with Manifest(layout_of(finished).manifest) as man:
        n_runs = len(man.runs())
    with run_job.run_lock(finished):
        with pytest.raises(SelectorError, match=rf"{finished.output_dir}: another `selector run` .*pid {os.getpid()}"):
            run_job.run(finished, workers=1, quiet=True, log=_quiet)
        code = cli.main(["run", "--config", str(Path(finished.base_dir) / "demo.toml"), "--quiet"])
    assert code == 2
    err = capsys.readouterr().err
    assert "another `selector run` is using this folder" in err and str(finished.output_dir) in err
    assert len(err.strip().splitlines()) == 1
    with Manifest(layout_of(finished).manifest) as man:
        assert len(man.runs()) == n_runs  # the refused run recorded nothing
    assert run_job.run(finished, workers=1, quiet=True, log=_quiet).ok  # free again afterwards


def test_corrupt_tiles_fail_alone_and_a_retry_redoes_only_them(finished, reference, capsys):
    order = finished.tiling.order
    with Manifest(layout_of(finished).manifest) as man:
        inputs = {t: set(r["inputs"]) for t, r in man.tiles().items()}
    ids = sorted(inputs)
    lay = layout_of(finished)
    bad_astro = lay.tile_file("astrometric", order, ids[len(ids) // 3])
    bad_ir_tile = lay.list_tiles("infrared", order)[-1]
    bad_ir = lay.tile_file("infrared", order, bad_ir_tile)
    saved = {p: p.read_bytes() for p in (bad_astro, bad_ir)}
    bad_astro.write_bytes(saved[bad_astro][: len(saved[bad_astro]) // 2])  # truncated
    ir = pq.read_table(bad_ir)
    pq.write_table(ir.drop(["ir_4p6_vegamag"]), bad_ir)  # wrong schema
    rel = {str(p.relative_to(lay.tiles_dir)) for p in (bad_astro, bad_ir)}
    expected_failed = {t for t, used in inputs.items() if used & rel}

    code = cli.main(["run", "--config", str(Path(finished.base_dir) / "demo.toml"), "--workers", "2", "--quiet"])
    out = capsys.readouterr().out
    assert code == 1
    with Manifest(layout_of(finished).manifest) as man:
        records = man.tiles()
        last = man.runs()[0]
    failed = {t for t, r in records.items() if r["status"] == "failed"}
    assert failed == expected_failed and len(failed) < len(ids) // 2
    assert last["status"] == "incomplete" and last["failed"] == len(failed)
    assert all(r["status"] == "done" for t, r in records.items() if t not in failed)
    for t in failed:
        error = records[t]["error"]
        assert "\n" not in error and (str(bad_astro) in error or str(bad_ir) in error)
    assert any("column 'ir_4p6_vegamag' is missing" in records[t]["error"] for t in failed)
    assert any("cannot read" in records[t]["error"] for t in failed)
    assert f"INCOMPLETE: {len(failed)} of {len(ids)} tiles failed" in out
    assert f"selector run --config {Path(finished.base_dir) / 'demo.toml'}" in out
    prov = json.loads((layout_of(finished).run_dir / "provenance.json").read_text())
    assert prov["complete"] is False and prov["failed_tiles"] == sorted(failed)
    assert prov["tiles"] == len(ids) - len(failed)
    status = run_job.status_text(finished)
    assert f"{len(failed)} failed" in status and f"failed tiles ({len(failed)})" in status

    for p, data in saved.items():
        p.write_bytes(data)
    result = run_job.run(finished, workers=2, quiet=True, log=_quiet)
    assert result.ok and result.actions["computed"] == len(failed)
    assert result.actions["reused"] == len(ids) - len(failed)
    assert _merged_bytes(finished) == reference["merged"]


def test_row_accounting_that_does_not_add_up_fails_the_run(finished):
    db = sqlite3.connect(layout_of(finished).manifest)
    with db:
        db.execute("UPDATE tiles SET rows = rows + 1 WHERE tile = (SELECT MIN(tile) FROM tiles)")
    db.close()
    with pytest.raises(SelectorError, match="row accounting does not add up"):
        run_job.run(finished, workers=1, quiet=True, log=_quiet)
    with Manifest(layout_of(finished).manifest) as man:
        assert man.runs()[0]["status"] == "failed"


def test_account_checks_tiles_against_the_ingest_summary():
    flow = [["input", 10], ["matched", 6], ["colour", 2]]
    tiles_ = [TileSummary(1, rows=11, rejects=1, candidates=2, cutflow=flow),
              TileSummary(2, rows=10, rejects=0, candidates=2, cutflow=flow)]
    ingest_ok = {"astrometric": {"rows_in": 30, "accepted": 28, "rejected_total": 2}}
    lines = run_job.account(tiles_, 4, ingest_ok, failed={3: "broken"}, expected_rows={1: 11, 2: 10, 3: 7})
    assert "30 = 2 ingest rejects + 21 in finished tiles + 7 in failed tiles" in lines[0]
    assert "21 in 2 tiles = 4 candidates + 16 removed by cuts + 1 tile rejects" in lines[1]
    with pytest.raises(SelectorError, match="not 2 ingest rejects"):
        run_job.account(tiles_, 4, ingest_ok)  # tile 3's rows are nowhere
    with pytest.raises(SelectorError, match="does not add up"):
        run_job.account(tiles_, 5, None)


def test_progress_is_one_updating_line_on_a_terminal_and_plain_lines_otherwise(tmp_path):
    class Terminal(io.StringIO):
        def isatty(self):
            return True

    shown = []
    term = Terminal()
    rep = Reporter(shown.append, quiet=False, verbose=False, log_path=tmp_path / "a.log", interval_s=3600,
                          stream=term)
    for done in range(1, 4):
        rep.progress(done, 10, 100 * done, 0)
        rep.bar.last_draw = float("-inf")  # draw every update
    rep.info("a message")
    rep.progress(10, 10, 1000, 1, final=True)
    rep.close()
    text = term.getvalue()
    assert text.count("\n") == 1 and text.endswith("elapsed\x1b[K\n")  # the last state stays on screen
    assert text.count("\r") >= 4 and "tiles 3/10" in text and "left" in text
    assert shown == ["a message"]
    plain = io.StringIO()
    rep = Reporter(shown.append, quiet=False, verbose=True, log_path=tmp_path / "b.log", interval_s=3600,
                          stream=plain)
    rep.progress(1, 10, 100, 0)
    rep.progress(2, 10, 200, 0)  # within the interval: not printed
    rep.detail("tile 5: computed")
    rep.progress(10, 10, 1000, 0, final=True)
    rep.close()
    lines = plain.getvalue().splitlines()
    assert len(lines) == 2 and "\r" not in plain.getvalue() and lines[1].startswith("tiles 10/10 · 1,000 rows")
    assert shown[-1] == "tile 5: computed"
    assert "tile 5: computed" in (tmp_path / "b.log").read_text()


def test_quiet_verbose_log_file_and_status(finished, capsys):
    cfg = _edit_config(finished, "pm_pvalue_min = 0.001", "pm_pvalue_min = 0.002")
    printed = []
    result = run_job.run(cfg, workers=1, verbose=True, log=printed.append)
    per_tile = [line for line in printed if line.startswith("tile ") and "reselected" in line]
    assert len(per_tile) == result.actions["reselected"] > 0
    log_text = result.log_file.read_text()
    assert result.log_file.name == f"run-{result.run_id}.log" and "infrared_colour" in log_text
    printed.clear()
    run_job.run(cfg, workers=1, quiet=True, log=printed.append)
    assert len(printed) == 1 and printed[0].startswith(f"run {result.run_id + 1}: 0 tiles computed")
    assert cli.main(["status", "--config", str(Path(cfg.base_dir) / "demo.toml")]) == 0
    out = capsys.readouterr().out
    assert f"tiles: {result.tiles} — {result.tiles} done, 0 failed, 0 pending" in out
    assert out.count(" ok ") >= 3


def test_dask_executor_gives_the_local_bytes(template, reference, tmp_path):
    distributed = pytest.importorskip("distributed", reason="dask[distributed] is not installed (the test extra has it)")
    cfg = _copy(template, tmp_path / "project")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        result = run_job.run(cfg, executor="dask", scheduler=cluster.scheduler_address, quiet=True,
                             log=_quiet)
    assert result.ok and result.actions["computed"] == reference["result"].tiles
    assert _merged_bytes(cfg) == reference["merged"]
    assert _tile_bytes(cfg) == reference["tiles"]


def test_streamed_merge_gives_the_bytes_of_one_sort_written_by_astropy(finished, reference, monkeypatch, tmp_path):
    # the merge reads each tile once into sorted runs, merges them and writes the text lists with a
    # column writer; with runs of five rows read three at a time (many runs, many blocks) the bytes
    # must still be the reference run's, and those of the reference libraries: the whole list sorted
    # at once by pyarrow (score descending, then id) and written whole by astropy's ECSV and CSV
    # writers (through write_table_file, which rounds each column to its precision first)
    merge_module = sys.modules[ranked_table.__module__]
    lay = layout_of(finished)
    for name in ("candidates.ecsv", "candidates.csv", "candidates.parquet"):
        (lay.run_dir / name).unlink()
    monkeypatch.setattr(merge_module, "RUN_ROWS", 5)
    monkeypatch.setattr(merge_module, "BLOCK_ROWS", 3)
    # tiles gathered two at a time (or fewer rows), text written four rows at a time
    monkeypatch.setattr(merge_module, "GATHER_TILES", 2)
    monkeypatch.setattr(merge_module, "GATHER_ROWS", 7)
    monkeypatch.setattr(merge_module, "TEXT_ROWS", 4)
    monkeypatch.setattr(merge_module, "READERS", 2)
    result = run_job.run(finished, workers=1, quiet=True, log=_quiet)
    assert result.merged and result.candidates > 20
    assert _merged_bytes(finished) == reference["merged"]
    assert not merge_module.merge_spool(lay).exists()

    parts = [pq.read_table(lay.tile_candidates(t)).replace_schema_metadata(None) for t in lay.run_tiles()]
    whole = pa.concat_tables(parts)
    score = "p_quasar" if "p_quasar" in whole.column_names else "criteria_score"
    whole = whole.sort_by([(score, "descending"), ("astro_id", "ascending")])
    whole = whole.add_column(0, "rank", pa.array(np.arange(1, whole.num_rows + 1)))
    table = ranked_table(whole, json.loads(pq.read_schema(lay.candidates).metadata[b"provenance"]))
    for fmt in ("ecsv", "csv"):
        write_table_file(table, tmp_path / f"whole.{fmt}", fmt)
        assert (lay.run_dir / f"candidates.{fmt}").read_bytes() == (tmp_path / f"whole.{fmt}").read_bytes()


def test_merged_parquet_row_groups_are_those_of_one_write(finished, monkeypatch, tmp_path):
    # the merge assembles each row group from pieces of the ranked stream; with groups of six rows
    # (text written four at a time, so pieces straddle groups) the file must be the one pyarrow
    # writes from the whole table at once with the same options
    merge_module = sys.modules[ranked_table.__module__]
    lay = layout_of(finished)
    monkeypatch.setattr(merge_module, "PARQUET_ROW_GROUP_ROWS", 6)
    monkeypatch.setattr(merge_module, "TEXT_ROWS", 4)
    monkeypatch.setattr(merge_module, "RUN_ROWS", 5)
    result = run_job.run(finished, workers=1, quiet=True, log=_quiet, force=True)
    assert result.merged and result.candidates > 12
    merged = pq.ParquetFile(lay.candidates)
    assert merged.metadata.num_row_groups == -(-result.candidates // 6)
    whole = merged.read()
    pq.write_table(whole, tmp_path / "whole.parquet", row_group_size=6, **parquet_writer_options(whole.schema))
    assert lay.candidates.read_bytes() == (tmp_path / "whole.parquet").read_bytes()


def test_an_unreadable_tile_list_stops_the_merge_with_one_line(finished):
    lay = layout_of(finished)
    tile = lay.run_tiles()[3]
    lay.tile_candidates(tile).write_bytes(b"PAR1 not a parquet file")
    with Manifest(lay.manifest) as man:
        summaries = [TileSummary.from_record(rec) for rec in man.tiles().values()]
    with pytest.raises(SelectorError) as err:
        merge(finished, summaries, provenance(finished))
    message = str(err.value)
    assert "\n" not in message and str(lay.tile_candidates(tile)) in message and "cannot read" in message
