"""Every path below the output folder, built in one place.

::

    <output_dir>/
      tiles/<catalogue>/order<NN>/tile<NNNNNNNN>.parquet   ingested tiles
      tiles/<catalogue>/summary.json, rejects.parquet        ingest accounting
      tiles/<catalogue>/.spool/{tiles,ids}-<NNNNN>.arrow     scratch of an ingest in progress
      tiles/known/objects.parquet                            the known-objects catalogue (not tiled)
      run/manifest.sqlite, run/.lock, run/logs/run-<n>.log   the run's record
      run/tiles/tile<NNNNNNNN>/{features,infrared,candidates,rejects}.parquet, cutflow.json
      run/candidates.{ecsv,csv,parquet}, run/cutflow.csv, run/provenance.json
      <classifier.output_folder>/quasar_classifier.skops (+ .card.json), evaluation.json, ...
      <targets.output_folder>/targets.*, dropped.*, summary.txt, provenance.json
      <targets.history_file>                                 the candidate history
      physics/<stem>_masses.{ecsv,vot,parquet}, <stem>_rejects.ecsv   `selector weigh` of <stem>.<ending>

Modules never spell these names themselves: they ask a :class:`Layout`. A layout is built from the
output folder alone (``Layout(cfg.output_dir)``, or :func:`layout_of` for a configuration), so a run
folder can be read without its configuration.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from selector.errors import InputError

#: Per-tile files that hold the cross-match (they depend only on the match sections of the config).
FEATURE_FILES = ("features.parquet", "infrared.parquet")
#: Per-tile files that hold the selection (they also depend on the selection sections).
SELECTION_FILES = ("candidates.parquet", "rejects.parquet", "cutflow.json")
#: The merged outputs of a run, by kind.
MERGED_FILES = {"ecsv": "candidates.ecsv", "csv": "candidates.csv", "parquet": "candidates.parquet",
                "cutflow": "cutflow.csv", "provenance": "provenance.json"}
#: The classifier's files, below ``classifier.output_folder``.
MODEL_FILE = "quasar_classifier.skops"
EVALUATION_FILE = "evaluation.json"
PREDICTIONS_FILE = "held_out_predictions.parquet"
#: The demo's truth table, below the config's folder.
DEMO_TRUTH = Path("catalogues") / "truth.parquet"


def card_path(model_path: Path | str) -> Path:
    """The model card beside a model file: ``name.skops`` → ``name.card.json``."""
    model_path = Path(model_path)
    return model_path.with_name(model_path.stem + ".card.json")


def tile_name(tile: int) -> str:
    return f"tile{int(tile):08d}"


def tile_id(name: str) -> int:
    """Inverse of :func:`tile_name` for a file or folder name (``tile00001234[.parquet]``)."""
    return int(Path(name).name[4:12])


@dataclass(frozen=True)
class Layout:
    """Paths below one output folder."""

    output_dir: Path

    def __post_init__(self):
        object.__setattr__(self, "output_dir", Path(self.output_dir))

    # --- ingested tiles ------------------------------------------------------------------------
    @property
    def tiles_dir(self) -> Path:
        return self.output_dir / "tiles"

    def catalogue_dir(self, catalogue: str) -> Path:
        return self.tiles_dir / catalogue

    def order_dir(self, catalogue: str, order: int) -> Path:
        return self.catalogue_dir(catalogue) / f"order{order:02d}"

    def tile_file(self, catalogue: str, order: int, tile: int) -> Path:
        return self.order_dir(catalogue, order) / f"{tile_name(tile)}.parquet"

    def list_tiles(self, catalogue: str, order: int) -> list[int]:
        """Tile ids present on disk for a catalogue, ascending."""
        folder = self.order_dir(catalogue, order)
        if not folder.is_dir():
            return []
        return sorted(tile_id(p.name) for p in folder.glob("tile*.parquet"))

    def ingest_summary(self, catalogue: str) -> Path:
        return self.catalogue_dir(catalogue) / "summary.json"

    def ingest_rejects(self, catalogue: str) -> Path:
        return self.catalogue_dir(catalogue) / "rejects.parquet"

    def ingest_spool(self, catalogue: str) -> Path:
        """Scratch folder of an ingest in progress (removed when it ends)."""
        return self.catalogue_dir(catalogue) / ".spool"

    def ingest_spool_file(self, catalogue: str, part: str, number: int) -> Path:
        """The ``number``-th spilled file of a part (``tiles`` or ``ids``) of an ingest in progress."""
        return self.ingest_spool(catalogue) / f"{part}-{number:05d}.arrow"

    @property
    def known_objects(self) -> Path:
        return self.catalogue_dir("known") / "objects.parquet"

    # --- the run -------------------------------------------------------------------------------
    @property
    def run_dir(self) -> Path:
        return self.output_dir / "run"

    @property
    def manifest(self) -> Path:
        return self.run_dir / "manifest.sqlite"

    @property
    def run_lock(self) -> Path:
        return self.run_dir / ".lock"

    def run_log(self, run_id: int) -> Path:
        return self.run_dir / "logs" / f"run-{run_id}.log"

    @property
    def run_tiles_dir(self) -> Path:
        return self.run_dir / "tiles"

    def tile_output_dir(self, tile: int) -> Path:
        return self.run_tiles_dir / tile_name(tile)

    def tile_output(self, tile: int, name: str) -> Path:
        """One of :data:`FEATURE_FILES` or :data:`SELECTION_FILES` of a tile."""
        return self.tile_output_dir(tile) / name

    def features(self, tile: int) -> Path:
        return self.tile_output(tile, "features.parquet")

    def tile_candidates(self, tile: int) -> Path:
        return self.tile_output(tile, "candidates.parquet")

    def tile_cutflow(self, tile: int) -> Path:
        return self.tile_output(tile, "cutflow.json")

    def run_tiles(self) -> list[int]:
        """Tiles with an output folder, ascending."""
        root = self.run_tiles_dir
        if not root.is_dir():
            return []
        return sorted(tile_id(p.name) for p in root.glob("tile*") if p.is_dir())

    def merged(self, kind: str) -> Path:
        """A merged output of the run: one of :data:`MERGED_FILES`' kinds."""
        return self.run_dir / MERGED_FILES[kind]

    @property
    def candidates(self) -> Path:
        return self.merged("parquet")

    @property
    def provenance(self) -> Path:
        return self.merged("provenance")

    @property
    def report(self) -> Path:
        return self.run_dir / "report.html"


def layout_of(cfg) -> Layout:
    """The layout below a configuration's ``project.output_dir``."""
    return Layout(cfg.output_dir)


def classifier_dir(cfg) -> Path:
    return cfg.output_dir / cfg.classifier.output_folder


def model_file(cfg) -> Path:
    """Where ``selector train`` writes the model for this configuration."""
    return classifier_dir(cfg) / MODEL_FILE


def targets_dir(cfg) -> Path:
    return cfg.output_dir / cfg.targets.output_folder


def history_file(cfg) -> Path:
    return cfg.output_dir / cfg.targets.history_file


def demo_truth(cfg) -> Path:
    """The truth table the demo writes beside its configuration."""
    return Path(cfg.base_dir) / DEMO_TRUTH


# --- physics after spectroscopy (`selector weigh`) -----------------------------------------------

#: Folder below the output folder for the black-hole masses of ``selector weigh``.
WEIGH_FOLDER = "physics"
#: Files ``selector weigh`` writes for one spectroscopy file, by kind; ``{stem}`` is that file's name
#: without its ending, so weighing several files keeps each one's results.
WEIGH_FILES = {"ecsv": "{stem}_masses.ecsv", "votable": "{stem}_masses.vot", "parquet": "{stem}_masses.parquet",
               "rejects": "{stem}_rejects.ecsv"}


def weigh_dir(cfg) -> Path:
    """``<output_dir>/physics``: where ``selector weigh`` writes."""
    return cfg.output_dir / WEIGH_FOLDER


def weigh_outputs(cfg, spectra_file: Path | str) -> dict[str, Path]:
    """The files ``selector weigh`` writes for ``spectra_file``, by kind (see :data:`WEIGH_FILES`)."""
    name = Path(spectra_file).name
    if name.lower().endswith(".gz"):
        name = name[:-3]
    stem = Path(name).stem
    return {kind: weigh_dir(cfg) / pattern.format(stem=stem) for kind, pattern in WEIGH_FILES.items()}

# --- the follow-up lists (below targets_dir) -------------------------------------------------------

#: Ending of the target list in each of its formats.
TARGET_LIST_ENDINGS = {"ecsv": "ecsv", "csv": "csv", "votable": "vot", "fits": "fits"}
#: The other files of ``selector targets``, by kind.
TARGETS_FILES = {"dropped": "dropped.ecsv", "nights": "nights.ecsv", "provenance": "provenance.json",
                 "known_rejects": "known_rejects.ecsv"}


def target_list(cfg, fmt: str, *, new_only: bool = False) -> Path:
    """The target list in one format: ``targets.<ending>``, or ``targets_new.<ending>`` for new candidates only."""
    return targets_dir(cfg) / f"{'targets_new' if new_only else 'targets'}.{TARGET_LIST_ENDINGS[fmt]}"


def targets_summary(cfg, *, new_only: bool = False) -> Path:
    """The plain-text summary beside the target list."""
    return targets_dir(cfg) / ("summary_new.txt" if new_only else "summary.txt")


def targets_file(cfg, kind: str) -> Path:
    """One of :data:`TARGETS_FILES` of ``selector targets``."""
    return targets_dir(cfg) / TARGETS_FILES[kind]


def layout_of_run(run_dir: Path | str) -> Layout:
    """The layout of the output folder that holds the run folder ``run_dir``, so a run can be read
    from its folder alone.

    A run folder is always ``<output_dir>/run`` (:attr:`Layout.run_dir`); a folder of another name is
    refused rather than quietly read beside a sibling ``run``.
    """
    run_dir = Path(run_dir).resolve()
    layout = Layout(run_dir.parent)
    if layout.run_dir != run_dir:
        raise InputError(f"{run_dir}: not a run folder (`selector run` writes its results, "
                         f"{MERGED_FILES['provenance']} among them, to <output_dir>/{layout.run_dir.name})")
    return layout


#: The pictures of a classifier's evaluation, below ``classifier.output_folder``, in drawing order.
TRAINING_PLOT_FILES = ("threshold_curves.png", "confusion_matrix.png", "calibration.png", "permutation_importance.png",
                       "criteria_comparison.png")
