"""Training time and scoring throughput of the classifier, each beside a reference measured in the same run.

The mock sky is written, ingested and run once (or taken from ``--keep`` when it is already
there). Then:

* training: ``train_labelled`` (grouped cross-validation, calibration, permutation importances,
  final model) on ``--rows`` labelled rows, against one plain fit of the same gradient-boosting
  model on the same rows: the ratio is what the honest evaluation costs on top of a single fit;
* scoring: the scorer that ``selector run`` uses (zero-motion test, features, model, calibration)
  on every feature-cache row, on one thread, against the bare ``predict_proba`` of the model on the
  same scored rows: rows per second per core, and the overhead of everything around the model.

The labelled rows for training are the mock's labelled set resampled with replacement to
``--rows`` rows, each copy jittered by 2 % of the feature's spread and given a sky region of its
own, so the timing is that of a set of that size (the held-out figures of such a set mean nothing
and are not printed).

Usage::

    python benchmarks/classify.py --rows 100000 --keep /tmp/classify-bench
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from selector.jobs import train  # noqa: E402
from selector.jobs.train.features import zero_motion  # noqa: E402
from selector.jobs.train.model import make_estimator, thread_controller  # noqa: E402
from selector.demo import mocksky as demo
from selector.jobs.run import run  # noqa: E402
from selector.settings.config import load_config  # noqa: E402
from selector.jobs.ingest import ingest  # noqa: E402
from selector.store.io import read_parquet  # noqa: E402
from selector.store.layout import layout_of


def _quiet(*args):
    pass


def _mock(folder: Path, scale: float):
    cfg_path = folder / "demo.toml"
    if not (folder / "output" / "run" / "tiles").is_dir():
        print(f"writing, ingesting and running the mock sky (scale {scale}) in {folder}")
        demo.write_mock_sky(demo.make_mock_sky(seed=1, scale=scale), folder / "catalogues")
        cfg_path = demo.write_demo_config(folder)
        cfg = load_config(cfg_path)
        ingest(cfg, log=_quiet)
        run(cfg, workers=1, quiet=True, log=_quiet)
    return load_config(cfg_path)


def _resampled(data: train.LabelledSet, rows: int, seed: int) -> train.LabelledSet:
    rng = np.random.default_rng(seed)
    idx = np.sort(rng.choice(len(data.y), rows, replace=True))
    spread = np.nanstd(data.X, axis=0)
    X = data.X[idx] + 0.02 * spread * rng.standard_normal((rows, data.X.shape[1]))
    groups = data.groups[idx] * 1000 + rng.integers(0, 1000, rows)
    table = pa.table({"astro_id": np.arange(1, rows + 1, dtype=np.int64), "tile": groups,
                      "label": data.table.column("label").take(pa.array(idx)),
                      "label_source": data.table.column("label_source").take(pa.array(idx))})
    return train.LabelledSet(table, X, data.y[idx], groups, data.feature_names, data.group_order, data.summary)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--rows", type=int, default=100_000, help="labelled rows for the training timing")
    parser.add_argument("--scale", type=float, default=1.0, help="size of the mock sky")
    parser.add_argument("--keep", type=Path, default=None, help="folder for the mock sky (reused when present)")
    args = parser.parse_args(argv)

    with tempfile.TemporaryDirectory() as tmp:
        folder = args.keep or Path(tmp)
        folder.mkdir(parents=True, exist_ok=True)
        cfg = _mock(folder, args.scale)

        t0 = time.perf_counter()
        labelled = train.collect_labelled(cfg)
        t_collect = time.perf_counter() - t0
        data = _resampled(labelled, args.rows, cfg.project.seed)
        c = cfg.classifier
        print(f"labelled set of the mock: {len(labelled.y):,d} rows collected in {t_collect:.1f} s; resampled to "
              f"{len(data.y):,d} rows, {data.X.shape[1]} features")

        with thread_controller().limit(limits=c.threads or None):
            t0 = time.perf_counter()
            make_estimator(cfg, cfg.project.seed).fit(data.X, data.y)
            t_fit = time.perf_counter() - t0
        t0 = time.perf_counter()
        result = train.train_labelled(cfg, data, log=_quiet)
        t_train = time.perf_counter() - t0
        print(f"training, {len(data.y):,d} rows, {c.folds} folds, {c.max_iter} iterations, {c.threads or 'all'} "
              f"thread(s):")
        print(f"  one plain fit (reference)       {t_fit:8.1f} s")
        print(f"  selector train_labelled         {t_train:8.1f} s   ratio {t_train / t_fit:5.2f}")

        features = pa.concat_tables([read_parquet(f) for f in sorted((layout_of(cfg).run_dir / "tiles").glob(
            "tile*/features.parquet"))], promote_options="permissive")
        model = result.model
        model.score_table(features.slice(0, 100), cfg)  # warm up imports and the thread controller
        t0 = time.perf_counter()
        p = model.score_table(features, cfg)  # sky and labelled-mix P(quasar), log-odds, novelty
        t_score = time.perf_counter() - t0
        scored = np.isfinite(p.p_quasar)
        passed, plx, chi2 = zero_motion(features, cfg)
        idx = np.flatnonzero(passed)
        X = train.feature_matrix(features.take(pa.array(idx)), cfg, model.feature_names, (plx[idx], chi2[idx]))
        with thread_controller().limit(limits=1):
            t0 = time.perf_counter()
            model.estimator.predict_proba(X)
            t_bare = time.perf_counter() - t0
        n = features.num_rows
        print(f"scoring on one thread: {n:,d} feature-cache rows, {int(scored.sum()):,d} passed the zero-motion "
              "test and were scored")
        print(f"  bare predict_proba (reference)  {t_bare:8.3f} s   {scored.sum() / t_bare:12,.0f} scored rows/s/core")
        print(f"  selector scorer                 {t_score:8.3f} s   {scored.sum() / t_score:12,.0f} scored rows/s/core"
              f"   ratio {t_score / t_bare:5.2f}")
        print(f"  selector scorer, all rows       {'':8s}     {n / t_score:12,.0f} input rows/s/core")
    return 0


if __name__ == "__main__":
    sys.exit(main())
