"""Every path below the output folder, built in one place.

::

    <output_dir>/
      .lock                                                  the folder's lock (store/lock.py)
      tiles/current                                          name of the generation in force
      tiles/<gen>/<catalogue>/order<NN>/tile<NNNNNNNN>.parquet   ingested tiles, one generation
      tiles/<gen>/<catalogue>/summary.json, rejects.parquet  ingest accounting
      tiles/<gen>/<catalogue>/.spool/{tiles,ids}-<NNNNN>.arrow   scratch of an ingest in progress
      tiles/<gen>/known/objects.parquet                      the known-objects catalogue (not tiled)
      run/manifest.sqlite, run/logs/run-<n>.log              the run's record
      run/commit.json                                        the record of the committed merged set
      run/tiles/tile<NNNNNNNN>/{features,infrared,chance,candidates,rejects}.parquet, cutflow.json
      run/candidates.{ecsv,csv,parquet}, run/cutflow.csv, run/provenance.json
      <classifier.output_folder>/quasar_classifier.skops (+ .card.json), evaluation.json, ...
      <targets.output_folder>/targets.{ecsv,csv,vot,fits,txt} (compact), targets_full.*, dropped.ecsv,
                             nights.ecsv, summary.txt, provenance.json (targets_new* with --new-only)
      <targets.history_file>                                 the candidate history
      physics/<stem>_masses.{ecsv,vot,parquet}, <stem>_rejects.ecsv   `selector weigh` of <stem>.<ending>

Modules never spell these names themselves: they ask a :class:`Layout`. A layout is built from the
output folder alone (``Layout(cfg.output_dir)``, or :func:`layout_of` for a configuration), so a run
folder can be read without its configuration.

**Generations.** Each ingest writes a whole new generation of tiles (``tiles/g000007/…``) beside the
one in force and then replaces the small pointer file ``tiles/current`` in one atomic rename, so a
reader sees either the old tiles or the new ones, never a mixture. A layout without a pinned
``generation`` follows the pointer (re-read whenever the pointer file changes); :meth:`Layout.pinned`
fixes the one in force. Without a pointer (nothing ingested yet, or tiles of an older version) the
tiles folder itself is read.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass
from pathlib import Path

from selector.errors import InputError

#: Per-tile files that hold the cross-match (they depend only on the match sections of the config).
FEATURE_FILES = ("features.parquet", "infrared.parquet", "chance.parquet")
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


def _order_name(order: int) -> str:
    return f"order{int(order):02d}"


def tile_rel_path(catalogue: str, order: int, tile: int) -> str:
    """A tile file's path below the tiles folder of its generation, with ``/``: how manifests name inputs."""
    return f"{catalogue}/{_order_name(order)}/{tile_name(tile)}.parquet"


def tile_id(name: str) -> int:
    """Inverse of :func:`tile_name` for a file or folder name (``tile00001234[.parquet]``)."""
    return int(Path(name).name[4:12])


@dataclass(frozen=True)
class Layout:
    """Paths below one output folder."""

    output_dir: Path
    generation: str | None = None

    def __post_init__(self):
        object.__setattr__(self, "output_dir", Path(self.output_dir))

    # --- ingested tiles ------------------------------------------------------------------------
    @property
    def tiles_root(self) -> Path:
        """The folder holding every generation of tiles and the ``current`` pointer."""
        return self.output_dir / "tiles"

    @property
    def current_pointer(self) -> Path:
        """The file naming the generation in force (replaced atomically by ingest)."""
        return self.tiles_root / CURRENT_POINTER

    def current_generation(self) -> str:
        """The generation the pointer names; ``""`` when there is no pointer (see the module notes)."""
        return current_generation(self.tiles_root)

    def pinned(self) -> "Layout":
        """This layout fixed to the generation in force now."""
        return Layout(self.output_dir, self.current_generation() if self.generation is None else self.generation)

    def at(self, generation: str) -> "Layout":
        """This layout fixed to ``generation``."""
        return Layout(self.output_dir, generation)

    def generation_dir(self, generation: str) -> Path:
        return self.tiles_root / generation if generation else self.tiles_root

    @property
    def tiles_dir(self) -> Path:
        """The tiles of this layout's generation (the one in force when none is pinned)."""
        gen = self.current_generation() if self.generation is None else self.generation
        return self.generation_dir(gen)

    @property
    def lock_file(self) -> Path:
        """The output folder's lock (:mod:`selector.store.lock`)."""
        return self.output_dir / ".lock"

    def catalogue_dir(self, catalogue: str) -> Path:
        return self.tiles_dir / catalogue

    def order_dir(self, catalogue: str, order: int) -> Path:
        return self.catalogue_dir(catalogue) / _order_name(order)

    def tile_file(self, catalogue: str, order: int, tile: int) -> Path:
        return self.tiles_dir / tile_rel_path(catalogue, order, tile)

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

    @property
    def commit_record(self) -> Path:
        """Written last by a merge: which merged files make the set, and what they were made from."""
        return self.run_dir / COMMIT_FILE


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


# --- generations of ingested tiles (see the module notes) -------------------------------------------

#: The pointer file below ``tiles/`` naming the generation in force.
CURRENT_POINTER = "current"
#: How a generation folder is named: ``g`` and six digits, counting up.
GENERATION_PATTERN = re.compile(r"^g\d{6}$")
#: The catalogue folders of tiles written before generations existed (read when there is no pointer).
LEGACY_CATALOGUES = ("astrometric", "infrared", "known")

# pointer file → ((inode, size, mtime), generation): re-read only when the file changes
_POINTER_CACHE: dict[Path, tuple[tuple, str]] = {}


def generation_name(number: int) -> str:
    return f"g{int(number):06d}"


def current_generation(tiles_root: Path) -> str:
    """The generation named by ``tiles_root/current``; ``""`` when there is none.

    The pointer is replaced by a rename, so a changed file has a new inode: the stat says when to
    read it again, and a long-lived process (a Dask worker) never keeps a stale generation.

    Raises
    ------
    InputError
        When the pointer is damaged or names a generation that is not there.
    """
    pointer = Path(tiles_root) / CURRENT_POINTER
    try:
        st = os.stat(pointer)
    except FileNotFoundError:
        return ""
    except OSError as exc:
        raise InputError(f"{pointer}: cannot read ({exc.strerror}); check the output folder") from None
    key = (st.st_ino, st.st_size, st.st_mtime_ns)
    cached = _POINTER_CACHE.get(pointer)
    if cached and cached[0] == key:
        return cached[1]
    try:
        name = pointer.read_text(encoding="ascii").strip()
    except (OSError, ValueError):
        name = ""
    if not GENERATION_PATTERN.match(name) or not (pointer.parent / name).is_dir():
        raise InputError(f"{pointer}: damaged or names a missing generation ({name[:40]!r}); run `selector ingest "
                         "--config ...` again")
    _POINTER_CACHE[pointer] = (key, name)
    return name


def generations(tiles_root: Path) -> list[str]:
    """Generation folders present below ``tiles_root``, oldest first."""
    root = Path(tiles_root)
    if not root.is_dir():
        return []
    return sorted(p.name for p in root.iterdir() if p.is_dir() and GENERATION_PATTERN.match(p.name))


#: The commit record of a run's merged outputs, below the run folder (see ``jobs/run/commit.py``).
COMMIT_FILE = "commit.json"


# --- the follow-up lists for a telescope (below targets_dir) -------------------------------------
# ``target_list`` is the compact list; beside it the full table and the compact list as plain text.

def target_full_list(cfg, fmt: str, *, new_only: bool = False) -> Path:
    """The full target list (every column) in one format: ``targets_full.<ending>`` (``targets_new_full.<ending>``)."""
    return targets_dir(cfg) / f"{'targets_new' if new_only else 'targets'}_full.{TARGET_LIST_ENDINGS[fmt]}"


def target_text_list(cfg, *, new_only: bool = False) -> Path:
    """The compact list as plain fixed-width text: ``targets.txt`` (``targets_new.txt``)."""
    return targets_dir(cfg) / f"{'targets_new' if new_only else 'targets'}.txt"


def merge_spool(layout: Layout) -> Path:
    """Scratch folder of a merge in progress: sorted runs of candidates (removed when it ends)."""
    return layout.run_dir / ".merge-spool"


#: Pictures of a classifier's figures at the sky's class mix, below the classifier's output folder:
#: quasar completeness and purity at the labelled and at the sky mix, and the reliability diagram
#: after the prior adjustment.
SKY_PLOT_FILES = ("sky_mix_curves.png", "reliability_on_the_sky.png")


#: A tile's chance pairs of shifted positions (one of :data:`FEATURE_FILES`), and the key of its Parquet
#: metadata that holds how many shifted sources took part.
CHANCE_FILE = "chance.parquet"
CHANCE_SOURCES_KEY = "chance_sources"


def chance_file(layout: Layout, tile: int) -> Path:
    """The chance pairs of a tile's shifted-position match."""
    return layout.tile_output(tile, CHANCE_FILE)


#: The photometric-redshift part of a model, below ``classifier.output_folder``: the labelled quasars
#: with their redshifts and photometry (the luminosity reference), and the held-out redshift predictions.
REDSHIFT_REFERENCE_FILE = "labelled_quasars.parquet"
REDSHIFT_PREDICTIONS_FILE = "held_out_redshifts.parquet"


def redshift_reference(model_path: Path) -> Path:
    """The labelled-quasar reference beside a model file."""
    return Path(model_path).parent / REDSHIFT_REFERENCE_FILE


#: The labelled quasars' redshifts and luminosities under the run's ``[physics]``, in the run folder
#: (written by the merge when the model has a redshift part), so the report needs the run folder only.
LABELLED_LUMINOSITIES_FILE = "labelled_quasars.parquet"


def labelled_luminosities(layout: Layout) -> Path:
    """The labelled quasars' redshifts and luminosities beside a run's merged list."""
    return layout.run_dir / LABELLED_LUMINOSITIES_FILE
