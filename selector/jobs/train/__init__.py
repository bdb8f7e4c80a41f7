"""``selector train``: the quasar classifier, from the feature cache to a safe model file.

``selector train`` learns P(quasar), P(star) and P(galaxy) from the feature cache written by
``selector run``; ``selector run`` with ``classifier.model`` set scores every source that passed the
zero-motion test with it (:func:`load_scorer`) and ranks the candidates by P(quasar).

The parts, in the order they depend on each other:

* :mod:`~selector.jobs.train.features`: the model inputs of feature-cache rows;
* :mod:`~selector.jobs.train.labels`: label sources matched against the feature cache;
* :mod:`~selector.jobs.train.evaluation`: the held-out figures, a :class:`TrainingEvaluation`;
* :mod:`~selector.jobs.train.model`: folds, the estimator, calibration, :func:`train_labelled`;
* :mod:`~selector.jobs.train.modelfile`: the model archive, its card, :func:`load_model`.

The job writes the model, its card, ``evaluation.json`` and the held-out predictions; the
evaluation's pictures belong to the presentation floor
(:func:`selector.present.training_plots.write_training_plots`), which the public
:func:`selector.api.train` calls after this job.
"""

from __future__ import annotations

from pathlib import Path

from selector.jobs.train.evaluation import COMPLETENESS_TARGET, TrainingEvaluation, purity_at_completeness, summary_text
from selector.jobs.train.features import FeatureSpec, feature_matrix, feature_specs
from selector.jobs.train.labels import CLASSES, LabelledSet, collect_labelled
from selector.jobs.train.model import Model, TrainOutputs, TrainResult, grouped_folds, train_labelled
from selector.jobs.train.modelfile import TRUSTED_TYPES, load_model, load_scorer, write_model_files
from selector.settings.config import Config

__all__ = [
    "CLASSES",
    "COMPLETENESS_TARGET",
    "TRUSTED_TYPES",
    "FeatureSpec",
    "LabelledSet",
    "Model",
    "TrainOutputs",
    "TrainResult",
    "TrainingEvaluation",
    "collect_labelled",
    "feature_matrix",
    "feature_specs",
    "grouped_folds",
    "load_model",
    "load_scorer",
    "purity_at_completeness",
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
    write_model_files(cfg, data, result)
    log(summary_text(result.evaluation, data.summary, cfg.colours.criteria))
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
