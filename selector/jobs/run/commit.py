"""The merged outputs of a run as one committed set, and the check every reader makes.

The merge writes its files one by one (each atomically); on its own that lets a kill between two of
them leave a new list beside an old provenance. So the merge is wrapped:

1. :func:`withdraw` removes the commit record before the first merged file is rewritten, so from
   then on no reader accepts the folder;
2. the merge writes its files (:func:`~selector.jobs.run.merge.merge`);
3. :func:`commit` writes ``run/commit.json`` last, atomically: the size and SHA-256 of every merged
   file, whether the run was complete (and which tiles failed), the configuration hashes per
   section, the classifier model's digest and the generation of tiles read.

Readers (``targets``, ``tune``, ``train``, ``report``) call :func:`committed_run`: it refuses a
folder without a record (a merge cut short, or never run), a file whose bytes differ from the
record (a mixture), an incomplete run unless allowed, and a configuration whose relevant sections
differ from those the outputs were made with, each with one line. The record holds no times: a
resumed run ends with the same bytes as an uninterrupted one.
"""

from __future__ import annotations

import json

from selector import __version__
from selector.errors import SelectorError
from selector.settings.config import MATCH_SECTIONS, SELECTION_SECTIONS, Config, config_hash
from selector.store.generations import fsync_dir
from selector.store.io import file_sha256, write_json
from selector.store.keys import model_sha
from selector.store.layout import MERGED_FILES, Layout

#: What each reader needs to equal the run's configuration.
NEEDS = {
    "targets": MATCH_SECTIONS + SELECTION_SECTIONS,  # the list itself
    "tune": MATCH_SECTIONS,                          # the feature cache (the selection is what it changes)
    "train": MATCH_SECTIONS,                         # the feature cache
    "report": (),                                    # reads the run folder alone
}


def section_hashes(cfg: Config) -> dict[str, str]:
    """The hash of each section the merged outputs depend on."""
    return {name: config_hash(cfg, (name,)) for name in MATCH_SECTIONS + SELECTION_SECTIONS}


def withdraw(layout: Layout) -> None:
    """Remove the commit record before a merge rewrites anything (readers refuse the folder until
    :func:`commit`)."""
    path = layout.commit_record
    if path.exists():
        path.unlink()
        fsync_dir(path.parent)


def commit(cfg: Config, layout: Layout, prov: dict, *, merge_key: str) -> dict:
    """Write the commit record of the merged outputs just written; returns it.

    Parameters
    ----------
    cfg : Config
    layout : Layout
    prov : dict
        The provenance the merge wrote (with ``complete`` and ``failed_tiles``).
    merge_key : str
        The digest of what went into the merge, so a resumed run can tell the set is current.
    """
    files = {}
    for kind in MERGED_FILES:
        path = layout.merged(kind)
        files[path.name] = {"bytes": path.stat().st_size, "sha256": file_sha256(path)}
    record = {
        "files": files,
        "complete": bool(prov.get("complete", True)),
        "failed_tiles": list(prov.get("failed_tiles", [])),
        "sections": section_hashes(cfg),
        "config_hash": prov.get("config_hash"),
        "classifier_model_sha256": prov.get("classifier_model_sha256"),
        "tiles_generation": prov.get("tiles_generation"),
        "merge_key": merge_key,
        "selector_version": __version__,
    }
    write_json(record, layout.commit_record)
    fsync_dir(layout.commit_record.parent)
    return record


def read_record(layout: Layout) -> dict | None:
    """The commit record, or None when there is none (a merge cut short, or no run yet)."""
    try:
        return json.loads(layout.commit_record.read_text(encoding="utf-8"))
    except FileNotFoundError:
        return None
    except (OSError, ValueError):
        raise SelectorError(f"{layout.commit_record}: damaged; run `selector run --config ...` again") from None


def committed_run(layout: Layout, command: str, *, cfg: Config | None = None, config_name: str | None = None,
                  allow_incomplete: bool = False) -> dict:
    """Check that the run folder holds one committed set fit for ``command``; returns its record.

    Parameters
    ----------
    layout : Layout
    command : {"targets", "tune", "train", "report"}
        The reader; decides which configuration sections must equal the run's (:data:`NEEDS`).
    cfg : Config, optional
        The reader's configuration (``report`` has none).
    config_name : str, optional
        The configuration file, for the advice.
    allow_incomplete : bool
        Go ahead on a run whose failed tiles are missing from the outputs.

    Raises
    ------
    SelectorError
        One line: no committed set, a file that is not the committed one, an incomplete run, or a
        configuration that differs from the run's.
    """
    where = f"--config {config_name}" if config_name else "--config ..."
    record = read_record(layout)
    if record is None:
        if layout.provenance.exists() or layout.candidates.exists():
            raise SelectorError(f"{layout.run_dir}: the run's merge did not finish (no {layout.commit_record.name}), so "
                                f"its outputs may mix two runs; run `selector run {where}` again")
        raise SelectorError(f"{layout.run_dir}: no finished run; run `selector run {where}` first")
    for name, want in sorted(record.get("files", {}).items()):
        path = layout.run_dir / name
        try:
            size = path.stat().st_size
            same = size == want["bytes"] and file_sha256(path) == want["sha256"]
        except FileNotFoundError:
            raise SelectorError(f"{path}: missing from the run's committed outputs; run `selector run {where}` "
                                "again") from None
        if not same:
            raise SelectorError(f"{path}: not the file the run committed (changed or replaced since); run "
                                f"`selector run {where}` again")
    if not record.get("complete", True) and not allow_incomplete:
        failed = record.get("failed_tiles", [])
        shown = ", ".join(str(t) for t in failed[:5]) + (f" and {len(failed) - 5} more" if len(failed) > 5 else "")
        raise SelectorError(f"{layout.run_dir}: the run is incomplete ({len(failed)} tiles failed: {shown}); fix them "
                            f"and run `selector run {where}` again, or pass --allow-incomplete to `selector {command}` "
                            "to use the finished tiles only")
    if cfg is not None:
        _check_config(cfg, record, command, where)
    return record


def _check_config(cfg: Config, record: dict, command: str, where: str) -> None:
    recorded = record.get("sections", {})
    now = section_hashes(cfg)
    differ = [s for s in NEEDS[command] if recorded.get(s) != now[s]]
    if differ:
        sections = ", ".join(f"[{s}]" for s in differ)
        raise SelectorError(f"{cfg.output_dir}: the run there was made with other {sections} settings than {where[9:]} "
                            f"gives (another configuration sharing the folder, or changed since); run `selector run "
                            f"{where}` first, or point project.output_dir elsewhere")
    if command == "targets" and record.get("classifier_model_sha256") != model_sha(cfg):
        raise SelectorError(f"{cfg.output_dir}: the run there was scored with another classifier model than "
                            f"classifier.model = {cfg.classifier.model!r} gives; run `selector run {where}` first")

