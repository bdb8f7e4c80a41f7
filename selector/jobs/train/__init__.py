"""``selector train``: the quasar classifier, from the feature cache to a safe model file.

``selector train`` learns the class probabilities (quasar against star, galaxy or "other", as the
labels allow) from the feature cache written by ``selector run``, estimates the sky's class
proportions over every source a run scores, and measures how far each lies from the labelled set;
``selector run`` with ``classifier.model`` set scores every source that passed the zero-motion test
with it (:func:`load_scorer`) and ranks the candidates by P(quasar) on the sky.

The parts, in the order they depend on each other:

* :mod:`~selector.jobs.train.features`: the model inputs of feature-cache rows;
* :mod:`~selector.jobs.train.labels`: label sources matched against the feature cache;
* :mod:`~selector.jobs.train.evaluation`: the held-out figures, a :class:`TrainingEvaluation`;
* :mod:`~selector.jobs.train.sky`: the move from the labelled class mix to the sky's;
* :mod:`~selector.jobs.train.model`: folds, the estimator, calibration, :func:`train_labelled`;
* :mod:`~selector.jobs.train.modelfile`: the model archive, its card, :func:`load_model`.

The job writes the model, its card, ``evaluation.json`` and the held-out predictions; the
evaluation's pictures belong to the presentation floor
(:func:`selector.present.training_plots.write_training_plots`), which the public
:func:`selector.api.train` calls after this job.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pyarrow as pa

from selector.core.novelty import label_coverage
from selector.jobs.train.evaluation import (COMPLETENESS_TARGET, TrainingEvaluation, purity_at_completeness, sky_mix,
                                            summary_text)
from selector.jobs.train.features import FeatureSpec, feature_matrix, feature_specs
from selector.jobs.train.labels import CLASSES, QUASAR, LabelledSet, collect_labelled
from selector.jobs.train.model import (Model, TrainOutputs, TrainResult, grouped_folds, plan_classes, score_population,
                                       train_labelled)
from selector.jobs.train.modelfile import (TRUSTED_TYPES, load_model, load_redshifts, load_reference, load_scorer,
                                           read_card, write_model_files)
from selector.jobs.train.redshift import RedshiftResult, fit_redshift, redshift_figures
from selector.jobs.train.sky import (ScoredPopulation, band_column, estimate_adjustment, list_expectation, move_proba,
                                     sky_weights)
from selector.settings.config import Config

__all__ = [
    "CLASSES",
    "COMPLETENESS_TARGET",
    "TRUSTED_TYPES",
    "FeatureSpec",
    "LabelledSet",
    "Model",
    "RedshiftResult",
    "TrainOutputs",
    "TrainResult",
    "TrainingEvaluation",
    "collect_labelled",
    "feature_matrix",
    "feature_specs",
    "grouped_folds",
    "fit_redshift",
    "load_model",
    "load_redshifts",
    "load_reference",
    "load_scorer",
    "plan_classes",
    "purity_at_completeness",
    "read_card",
    "redshift_figures",
    "estimate_sky",
    "train",
    "train_labelled",
    "written_lines",
]


def train(cfg: Config, log=print, *, run_complete: bool = True) -> TrainResult:
    """``selector train``: labelled set from the feature cache, cross-validation, final model, model files.

    Parameters
    ----------
    cfg : Config
    log : callable
        Receives the progress lines and the summary of the training set and held-out figures.
    run_complete : bool
        False when the run's outputs are incomplete (allowed by the caller); the card records it.

    Returns
    -------
    TrainResult
        With ``outputs`` set (its ``plots`` empty: the job draws nothing).
    """
    data = collect_labelled(cfg)
    if not run_complete:
        # trained on the finished tiles of an incomplete run (--allow-incomplete): the card says so
        data.summary["from_incomplete_run"] = True
    log(f"labelled set: {data.summary['rows']:,d} sources; training {cfg.classifier.folds} folds and the final model")
    result = train_labelled(cfg, data, log=log)
    log("scoring every source that passed the zero-motion test, for the sky's class proportions")
    estimate_sky(cfg, result, data, score_population(cfg, result, data), log=log)
    result.redshift = fit_redshift(cfg, data, log=log)
    if result.redshift is not None:
        result.model.redshift = result.redshift.model
    write_model_files(cfg, data, result)
    log(summary_text(result.evaluation, data.summary, cfg.colours.criteria))
    if result.redshift is not None:
        log(result.redshift.evaluation.summary_line())
    for line in result.sky["coverage"].get("warnings", []):
        log(f"warning: {line}")
    return result


def estimate_sky(cfg: Config, result: TrainResult, data: LabelledSet, population: ScoredPopulation,
                 log=print) -> TrainResult:
    """Set the model's sky proportions, the figures at the sky mix and the label coverage.

    Parameters
    ----------
    cfg : Config
    result : TrainResult
        From :func:`train_labelled`; its model's priors, evaluation and ``sky`` account are replaced.
    data : LabelledSet
        The labelled set it was trained on.
    population : ScoredPopulation
        Every row a run scores (:func:`selector.jobs.train.model.score_population`).
    log : callable

    Returns
    -------
    TrainResult
        ``result``, updated.
    """
    model = result.model
    keep = result.plan.keep
    y = result.plan.y
    bins = cfg.classifier.sky_prior_bins
    lab_mags = np.full(len(y), np.nan)
    if bins is not None and band_column(bins.band) in data.table.column_names:
        lab_mags = data.table.column(band_column(bins.band)).filter(pa.array(keep)).to_numpy(
            zero_copy_only=False).astype(np.float64)
    adjustment = estimate_adjustment(cfg, model.classes, y, lab_mags, population, log=log)
    model.priors = adjustment
    expected, listed = list_expectation(adjustment, population, cfg.classifier.threshold, QUASAR)
    lab_bins = adjustment.bin_index(lab_mags)
    pop_bins = adjustment.bin_index(population.mags)
    p_sky = move_proba(result.held_out_proba, adjustment, lab_bins)[:, QUASAR]
    weights = sky_weights(adjustment, y, lab_bins, pop_bins)
    figures = sky_mix(cfg.classifier.threshold, p_sky, y == QUASAR, weights, priors=adjustment.to_card(),
                      expected_purity=None if listed == 0 else float(expected.value),
                      expected_purity_error=None if listed == 0 else float(expected.error), listed=listed,
                      scored_rows=population.rows)
    result.evaluation = dataclasses.replace(result.evaluation, sky=figures)
    coverage = {}
    if len(population.sample) >= 5 and len(y) >= 5:
        cov = label_coverage(data.X[keep], population.sample, feature_names=model.feature_names,
                             seed=cfg.project.seed)
        coverage = {"candidates_compared": int(len(population.sample)),
                    "auc_labelled_against_scored": cov.auc, "auc_null_sd": cov.auc_null_sd,
                    "ks_statistic": dict(zip(cov.feature_names, [None if not np.isfinite(v) else float(v)
                                                                  for v in cov.ks_statistic])),
                    "warnings": list(cov.warnings)}
    result.sky = {"coverage": coverage}
    return result


def written_lines(cfg: Config, result: TrainResult) -> list[str]:
    """The closing lines of ``selector train``: the files written, and how to use the model.

    Parameters
    ----------
    cfg : Config
    result : TrainResult
        With ``outputs`` set (plots included once drawn).

    Returns
    -------
    list of str
    """
    outputs = result.outputs
    shown = outputs.model
    try:
        shown = outputs.model.resolve().relative_to(Path(cfg.base_dir).resolve())
    except ValueError:
        pass
    return [f"model: {outputs.model} (card: {outputs.card.name}); evaluation: {outputs.evaluation} and "
            f"{len(outputs.plots)} plots",
            f"to score candidates with it, set classifier.model = \"{shown}\" and run `selector run`"]
