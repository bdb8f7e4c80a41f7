"""The public face: one function per job, one call shape.

Every function takes the configuration first (a :class:`~selector.settings.config.Config`, or the path
of a TOML file), its options by keyword, a ``log`` callable for the lines it prints, and returns a
result object. ``selector`` re-exports these names, so ``import selector; selector.run(cfg)`` works;
the command line (:mod:`selector.cli`) only parses, calls them and prints.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Callable, Sequence

from selector.errors import ConfigError
from selector.jobs import ingest as ingest_job, targets as targets_job, train as train_job, tune as tune_job, weigh as weigh_job
from selector.jobs import run as run_job
from selector.present import plots, report as report_page, training_plots
from selector.settings.config import Config, load_config
from selector.store.io import remove_stale_tmp
from selector.store.layout import classifier_dir, layout_of, layout_of_run, targets_dir
from selector.store.lock import FolderLock, output_lock

Log = Callable[[str], None]

__all__ = ["Config", "ingest", "load_config", "outcomes", "report", "run", "status", "targets", "train", "tune", "weigh"]


def _config(config: Config | str | os.PathLike) -> Config:
    return config if isinstance(config, Config) else load_config(config)


def ingest(config, *, strict: bool = False, log: Log = print) -> dict:
    """Validate every row of the configured catalogues and split them into HEALPix tiles.

    Returns the ingest summary of each catalogue, by catalogue name. ``strict`` makes the
    plausibility checks errors (the previous tiles then stay in force).
    """
    return ingest_job.ingest(_config(config), log=log, strict=strict)


def run(config, *, workers: int | None = None, executor: str | None = None, scheduler: str | None = None,
        quiet: bool = False, verbose: bool = False, force: bool = False, strict: bool = False,
        log: Log = print) -> run_job.RunResult:
    """Bring the run folder up to date: cross-match, test and rank every tile, merge the ranked list.

    ``strict`` makes the plausibility checks errors (raised before the merge)."""
    config_path = None if isinstance(config, Config) else config
    return run_job.run(_config(config), workers=workers, executor=executor, scheduler=scheduler, quiet=quiet,
                       verbose=verbose, log=log, force=force, config_path=config_path, strict=strict)


def status(config, *, runs: int = 10, failed_only: bool = False) -> str:
    """A plain-text view of the run manifest."""
    return run_job.status_text(_config(config), runs=runs, failed_only=failed_only)


def _name(config) -> str | None:
    return None if isinstance(config, Config) else str(config)


def _incomplete_note(record: dict, log: Log) -> None:
    if not record.get("complete", True):
        log(f"note: the run is incomplete ({len(record.get('failed_tiles', []))} tiles failed); going ahead on the "
            "finished tiles only, as --allow-incomplete asked")


def train(config, *, allow_incomplete: bool = False, log: Log = print) -> train_job.TrainResult:
    """Train the quasar classifier on the labelled sources of the feature cache; write the model and its card.

    Also writes the evaluation's pictures beside the model (the job itself draws nothing). Refuses a
    run folder whose outputs are not one committed, complete set made with this configuration's
    matching sections (``allow_incomplete``: go ahead on the finished tiles, said in the card).
    """
    cfg = _config(config)
    with output_lock(cfg, "train", exclusive=False):
        remove_stale_tmp(classifier_dir(cfg))  # left by a killed `selector train`
        record = run_job.committed_run(layout_of(cfg), "train", cfg=cfg, config_name=_name(config),
                                       allow_incomplete=allow_incomplete)
        _incomplete_note(record, log)
        result = train_job.train(cfg, log=log, run_complete=record.get("complete", True))
        result.outputs.plots = training_plots.write_training_plots(result.evaluation, classifier_dir(cfg))
    for line in train_job.written_lines(cfg, result):
        log(line)
    return result


def tune(config: str | os.PathLike, *, settings: Sequence[str] = (), truth=None, plots_dir=None,
         write: bool = False, allow_incomplete: bool = False, log: Log = print) -> tune_job.TuneOutcome:
    """Re-apply the configuration's selection, with ``KEY=VALUE`` changes, to the run's feature cache.

    ``config`` is the path of the TOML file (the changes are applied to the file as written). The
    run's outputs must be one committed, complete set (``allow_incomplete``: go ahead, said in the
    output).
    """
    cfg = load_config(config)
    with output_lock(cfg, "tune", exclusive=False):
        record = run_job.committed_run(layout_of(cfg), "tune", cfg=cfg, config_name=str(config),
                                       allow_incomplete=allow_incomplete)
        _incomplete_note(record, log)
        out = tune_job.tune(config, settings, truth=truth, plots=plots_dir is not None, log=log)
        log(tune_job.format_outcome(out))
        if plots_dir is not None:
            data = plots.PlotData.from_evaluation(out.cache, out.after,
                                              truth_quasar=None if out.truth is None else out.truth.quasar)
            paths = plots.write_plots(data, Path(plots_dir))
            log(f"plots of the new selection: {len(paths)} PNG files in {plots_dir}")
    # the shared lock is let go first: writing runs the selection, which holds the folder alone
    if write:
        tune_job.write_results(out.after, config_path=config, log=log)
    return out


def targets(config, *, new_only: bool = False, allow_incomplete: bool = False,
            log: Log = print) -> targets_job.TargetsResult:
    """Build the follow-up target list: known objects out, observability from the site, priorities.

    The run's list must be one committed, complete set made with this configuration's matching and
    selection sections and classifier model (``allow_incomplete``: go ahead on the finished tiles;
    the list's provenance says ``complete: false``).
    """
    cfg = _config(config)
    if cfg.targets is None:
        raise ConfigError(f"{config}: no [targets] section; add one (every key is in configs/default.toml)")
    with output_lock(cfg, "targets", exclusive=False):
        remove_stale_tmp(targets_dir(cfg))  # left by a killed `selector targets`
        record = run_job.committed_run(layout_of(cfg), "targets", cfg=cfg, config_name=_name(config),
                                       allow_incomplete=allow_incomplete)
        _incomplete_note(record, log)
        return targets_job.make_targets(cfg, new_only=new_only, log=log)


def outcomes(config, file, *, log: Log = print) -> int:
    """Record follow-up outcomes (spectroscopic class, redshift) of candidates in the candidate history."""
    cfg = _config(config)
    if cfg.targets is None:
        raise ConfigError(f"{config}: no [targets] section, so there is no candidate history to record into")
    with output_lock(cfg, "outcome", exclusive=False):
        return targets_job.record_outcomes(cfg, file, log=log)


def weigh(config, file, *, log: Log = print) -> weigh_job.WeighResult:
    """Weigh the black holes of a spectroscopy file: virial masses, L_bol, Eddington ratios, accretion rates.

    ``file`` holds broad-line widths and continuum luminosities or flux densities per source (columns
    in :mod:`selector.jobs.weigh`); ``[physics]`` sets the cosmology, bolometric corrections,
    efficiencies and calibrations. Results go below ``project.output_dir/physics``.
    """
    cfg = _config(config)
    with output_lock(cfg, "weigh", exclusive=False):
        return weigh_job.weigh(cfg, file, log=log)


def report(config=None, *, run_dir=None, out=None, top: int = 50, allow_incomplete: bool = False,
           log: Log = print) -> Path:
    """Write the self-contained HTML report of a run: results first, then plots, provenance and settings.

    ``config`` (a :class:`Config` or the path of its TOML file) names the run folder below its
    ``project.output_dir`` and where the target list, the classifier and truth labels are; a run
    folder given alone as ``run_dir`` is read with the configuration recorded in it. The run must be
    one committed set; an incomplete run only with ``allow_incomplete`` (and the page says so).
    """
    if (config is None) == (run_dir is None):
        raise ConfigError("report: give the configuration or a run folder (run_dir=...), one of the two")
    cfg = None if config is None else _config(config)
    layout = layout_of(cfg) if cfg is not None else layout_of_run(run_dir)
    with FolderLock(layout.output_dir, "report", exclusive=False):
        record = run_job.committed_run(layout, "report", allow_incomplete=allow_incomplete)
        _incomplete_note(record, log)
        path = report_page.write_report(cfg, run_dir=run_dir, out=out, top=top)
    log(f"report: {path}")
    return path
