"""Generations of ingested tiles: written beside the one in force, switched in one atomic step.

An ingest writes every catalogue into a new folder ``tiles/g<NNNNNN>`` (:func:`new_generation`),
makes every file and folder of it durable, and only then replaces the pointer ``tiles/current``
with ``os.replace`` (:func:`commit_generation`). A kill or a full disk at any moment before that
rename leaves the previous generation in force, whole; the interrupted generation is removed when
the next ingest starts (:func:`clean_leftovers`).

Older generations are removed as soon as the new one is in force: every command that reads tiles
holds the output folder's lock (:mod:`selector.store.lock`), and an ingest holds it alone, so no
process can be reading them; runs record the content digest of the generation they read, never
its files. Keeping one previous generation would double the disk the tiles take (at 10⁹ rows,
the largest thing in the folder) for a rollback nothing offers.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

from selector.store.io import file_sha256, sync_files, write_text
from selector.store.keys import digest
from selector.store.layout import LEGACY_CATALOGUES, Layout, generation_name, generations


def fsync_dir(folder: Path) -> None:
    """Make a folder's entries (renames, new files) durable."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass  # some file systems cannot sync a folder; the files themselves are synced
    finally:
        os.close(fd)


def sync_tree(folder: Path) -> None:
    """Make every file below ``folder`` durable (:func:`~selector.store.io.sync_files`), then every
    folder, deepest first."""
    dirs, files = [], []
    for root, _, names in os.walk(folder):
        dirs.append(root)
        files.extend(os.path.join(root, name) for name in names)
    sync_files(files)
    for root in reversed(dirs):
        fsync_dir(Path(root))


def clean_leftovers(layout: Layout) -> list[str]:
    """Remove generations not in force (an interrupted ingest's, or old ones whose removal was cut
    short) and temporary files of a pointer write cut short; returns what was removed."""
    root = layout.tiles_root
    current = layout.current_generation()
    removed = []
    for name in generations(root):
        if name != current:
            shutil.rmtree(root / name, ignore_errors=True)
            removed.append(name)
    for tmp in root.glob(".*.tmp") if root.is_dir() else []:
        tmp.unlink(missing_ok=True)
        removed.append(tmp.name)
    return removed


def new_generation(layout: Layout) -> Layout:
    """Clean the leftovers and make the folder of the next generation; its layout, pinned to it."""
    clean_leftovers(layout)
    present = generations(layout.tiles_root)
    number = max([int(name[1:]) for name in present], default=0) + 1
    name = generation_name(number)
    layout.generation_dir(name).mkdir(parents=True)
    return layout.at(name)


def commit_generation(layout: Layout, new: Layout) -> None:
    """Make ``new`` durable, point ``tiles/current`` at it atomically, then remove the older tiles."""
    folder = new.generation_dir(new.generation)
    sync_tree(folder)
    fsync_dir(layout.tiles_root)
    write_text(new.generation + "\n", layout.current_pointer)
    fsync_dir(layout.tiles_root)
    for name in generations(layout.tiles_root):
        if name != new.generation:
            shutil.rmtree(layout.tiles_root / name, ignore_errors=True)
    for name in LEGACY_CATALOGUES:  # tiles of a version before generations: superseded now
        legacy = layout.tiles_root / name
        if legacy.is_dir():
            shutil.rmtree(legacy, ignore_errors=True)


def carry_over(source: Layout, target: Layout, catalogue: str) -> bool:
    """Hard-link (or copy) one catalogue's files from the generation in force into a new one.

    Used when an ingest rewrites only some catalogues: the new generation must still be whole.
    Returns False when the source has no such catalogue.
    """
    src = source.catalogue_dir(catalogue)
    if not src.is_dir():
        return False
    dst = target.catalogue_dir(catalogue)
    for root, dirs, files in os.walk(src):
        dirs[:] = [d for d in dirs if not d.startswith(".")]
        rel = Path(root).relative_to(src)
        (dst / rel).mkdir(parents=True, exist_ok=True)
        for name in files:
            if name.startswith("."):
                continue
            try:
                os.link(Path(root) / name, dst / rel / name)
            except OSError:
                shutil.copy2(Path(root) / name, dst / rel / name)
    return True


def generation_digest(layout: Layout, catalogues=("astrometric", "infrared", "known")) -> str | None:
    """A digest of what a generation holds (its ingest summaries), for provenance.

    Two ingests of the same inputs with the same settings give the same digest, whatever the
    generation folders are called, so a result's bytes do not depend on how often one re-ingested.
    """
    parts = {}
    for kind in catalogues:
        path = layout.ingest_summary(kind)
        if path.is_file():
            parts[kind] = file_sha256(path)
    return digest("generation", parts) if parts else None
