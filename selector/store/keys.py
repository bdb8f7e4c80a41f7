"""The keys that say whether a stored result is still valid: configuration hashes, model digests, table digests.

A tile's outputs record the keys they were made from; a run compares them with the keys of the
current configuration and inputs to decide what to redo. Every key is built here.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
import pyarrow as pa
from selector import __version__
from selector.settings.config import MATCH_SECTIONS, SELECTION_SECTIONS, Config, config_hash, plain
from selector.errors import SelectorError
from selector.store.io import file_sha256
from selector.store.layout import card_path


def digest(*parts) -> str:
    return hashlib.sha256(json.dumps(parts, sort_keys=True, separators=(",", ":")).encode()).hexdigest()


#: Keys of ``[physics]`` that change a run's candidates (their luminosities, with a redshift model);
#: the others (the virial calibrations) serve ``selector weigh`` only.
RUN_PHYSICS_KEYS = ("cosmology", "h0_km_s_mpc", "omega_m", "alpha_nu", "bolometric_corrections", "efficiency_range",
                    "extinction")


def result_config(cfg: Config) -> dict:
    """The configuration as recorded with results: every section except ``[run]``, and of ``[physics]``
    only the keys that change a run's candidates (:data:`RUN_PHYSICS_KEYS`).

    How a run is executed (workers, executor, progress) never changes its results, so it is kept
    out of the hash and the record; the same selection run locally or on a cluster gives the same
    bytes. The virial calibrations are read only after spectroscopy (``selector weigh``, which
    records its own hash of ``[physics]``), so changing them leaves a run alone.
    """
    data = plain(cfg)
    data.pop("run", None)
    physics = data.pop("physics", {})
    data["physics"] = {k: physics[k] for k in RUN_PHYSICS_KEYS if k in physics}
    return data


def run_physics_hash(cfg: Config) -> str:
    """Digest of the ``[physics]`` keys that change a run's candidates."""
    return digest(result_config(cfg)["physics"])


def model_path(cfg: Config) -> Path | None:
    return cfg.path(cfg.classifier.model) if cfg.classifier.model else None


def model_sha(cfg: Config) -> str | None:
    path = model_path(cfg)
    if path is None:
        return None
    if not path.is_file():
        raise SelectorError(f"classifier.model = {cfg.classifier.model!r}: no such file ({path}); train one with "
                            "`selector train` or remove the key")
    return file_sha256(path)


def model_key(cfg: Config, sha: str | None) -> str | None:
    """The model file's digest, with its card's when there is one (the card is read when scoring)."""
    if sha is None:
        return None
    card = card_path(model_path(cfg))
    return digest(sha, file_sha256(card)) if card.is_file() else sha


def match_key(cfg: Config) -> str:
    """What a tile's feature cache depends on besides its input rows."""
    return digest("match", config_hash(cfg, MATCH_SECTIONS), __version__)


def selection_key(cfg: Config, model_key: str | None) -> str:
    """What a tile's selection depends on besides its feature cache."""
    return digest("selection", config_hash(cfg, SELECTION_SECTIONS), model_key, run_physics_hash(cfg), __version__)


def table_digest(table: pa.Table) -> str:
    """SHA-256 of a table's columns, types, field metadata and values (schema metadata ignored)."""
    t = table.replace_schema_metadata(None).combine_chunks()
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, t.schema) as writer:
        writer.write_table(t)
    return hashlib.sha256(sink.getvalue()).hexdigest()[:32]


def combined_digest(items: dict) -> str:
    return hashlib.sha256("".join(f"{k}={v or '-'}\n" for k, v in sorted(items.items())).encode()).hexdigest()
