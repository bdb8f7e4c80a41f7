"""The merged list's redshifts and luminosities: spectroscopic redshifts win, the labelled quasars compare.

The tiles give every candidate a photometric redshift and the luminosities at it
(:func:`selector.core.candidate_physics.candidate_columns`). Before the merged list is ranked:

1. a spectroscopic redshift replaces the photometric one where known (``z_source = spec``): a
   follow-up outcome of a quasar with a redshift (by identifier) first, then the nearest known
   object within ``classifier.known_radius_arcsec`` that is a quasar (through
   ``classifier.class_map``) with a redshift; those rows' luminosities are recomputed;
2. candidates more luminous than every labelled quasar of the model (the luminosity reference
   written by ``selector train``, computed under the run's ``[physics]``) are marked
   ``beyond_labelled_luminosity``.

The redshift sources' fingerprints enter the run's provenance (:func:`redshift_sources`), so a new
outcome or a re-ingested known-objects catalogue redoes the merge.
"""

from __future__ import annotations

import json
from typing import NamedTuple

import numpy as np
import pyarrow as pa

from selector.core.candidate_physics import (Redshifts, add_columns, adopt_spectroscopic, beyond_labelled,
                                             luminosity_columns, photometric_bands)
from selector.core.crossmatch import nearest_within, pairs_within
from selector.jobs.train import load_reference
from selector.jobs.train.labels import QUASAR, map_classes
from selector.settings.config import Config
from selector.store.history import training_labels
from selector.store.io import file_sha256, read_parquet
from selector.store.keys import model_path, table_digest
from selector.store.layout import card_path, layout_of, redshift_reference

__all__ = ["Finisher", "MergedPhysics", "finish_physics", "finisher", "labelled_luminosities", "redshift_sources",
           "spectroscopic_redshifts"]


class MergedPhysics(NamedTuple):
    """What the merge did to the luminosity columns.

    Attributes
    ----------
    spectroscopic : int
        Candidates whose redshift is spectroscopic.
    beyond_labelled : int
        Candidates more luminous than every labelled quasar.
    labelled_lbol_max_erg_s : float
        The most luminous labelled quasar (NaN without a reference).
    labelled : pyarrow.Table or None
        The labelled quasars' ``redshift`` and ``lbol_erg_s`` under the run's ``[physics]``.
    redshift_evaluation : dict or None
        The held-out figures of the redshift model, from its card.
    """

    spectroscopic: int
    beyond_labelled: int
    labelled_lbol_max_erg_s: float
    labelled: pa.Table | None
    redshift_evaluation: dict | None

    def record(self, order: str) -> dict:
        """The summary as recorded in the run's provenance (``luminosities``)."""
        return {"spectroscopic_redshifts": self.spectroscopic, "beyond_labelled_luminosity": self.beyond_labelled,
                "labelled_lbol_max_erg_s": self.labelled_lbol_max_erg_s, "ranking_order": order,
                "redshift_evaluation": self.redshift_evaluation}


def _known_with_redshift(cfg: Config):
    if cfg.known is None or "redshift" not in cfg.known.columns:
        return None
    path = layout_of(cfg).known_objects
    return path if path.is_file() else None


def redshift_sources(cfg: Config) -> dict | None:
    """Fingerprints of the spectroscopic redshifts the merge reads (None without a model).

    Returns
    -------
    dict or None
        ``known_objects_sha256`` (the ingested known objects, when they carry redshifts) and
        ``outcomes_digest`` (the recorded follow-up outcomes), each None when absent.
    """
    if not cfg.classifier.model:
        return None
    known = _known_with_redshift(cfg)
    outcomes = training_labels(cfg)
    ref = redshift_reference(model_path(cfg))
    return {"known_objects_sha256": file_sha256(known) if known else None,
            "outcomes_digest": table_digest(outcomes) if outcomes.num_rows else None,
            "labelled_quasars_sha256": file_sha256(ref) if ref.is_file() else None}


class _Spectra(NamedTuple):
    """The spectroscopic redshifts the merge can adopt, read once."""

    known_ra_deg: np.ndarray
    known_dec_deg: np.ndarray
    known_z: np.ndarray
    outcome_z: dict


def _spectra(cfg: Config) -> _Spectra:
    """Known quasars with a redshift (positions) and quasar outcomes with a redshift (by id as text)."""
    ra = dec = kz = np.zeros(0)
    known = _known_with_redshift(cfg)
    if known is not None:
        t = read_parquet(known, columns=["ra_deg", "dec_deg", "known_class", "redshift"])
        label, _ = map_classes(t.column("known_class"), cfg.classifier.class_map)
        z = t.column("redshift").to_numpy(zero_copy_only=False).astype(np.float64)
        with np.errstate(invalid="ignore"):
            use = np.flatnonzero((label == QUASAR) & np.isfinite(z) & (z > 0.0))
        ra = t.column("ra_deg").to_numpy(zero_copy_only=False).astype(np.float64)[use]
        dec = t.column("dec_deg").to_numpy(zero_copy_only=False).astype(np.float64)[use]
        kz = z[use]
    by_id = {}
    outcomes = training_labels(cfg)
    if outcomes.num_rows:
        oz = outcomes.column("redshift").to_numpy(zero_copy_only=False).astype(np.float64)
        quasar = np.asarray(outcomes.column("label").to_pylist(), dtype=object) == "quasar"
        with np.errstate(invalid="ignore"):
            ok = quasar & np.isfinite(oz) & (oz > 0.0)
        by_id = dict(zip(np.asarray(outcomes.column("astro_id").to_pylist(), dtype=object)[ok].astype(str), oz[ok]))
    return _Spectra(ra, dec, kz, by_id)


def spectroscopic_redshifts(cfg: Config, candidates: pa.Table, spectra: _Spectra | None = None) -> np.ndarray:
    """Spectroscopic redshift per candidate, NaN where none: quasar outcomes first, then known quasars.

    Parameters
    ----------
    cfg : Config
    candidates : pyarrow.Table
        ``astro_id``, ``ra_deg``, ``dec_deg``.
    spectra : optional
        The redshift sources, read once by the caller (read here when not given).

    Returns
    -------
    numpy.ndarray of float64
    """
    spectra = _spectra(cfg) if spectra is None else spectra
    n = candidates.num_rows
    z = np.full(n, np.nan)
    if len(spectra.known_z) and n:
        pairs = pairs_within(candidates.column("ra_deg").to_numpy(zero_copy_only=False),
                             candidates.column("dec_deg").to_numpy(zero_copy_only=False), spectra.known_ra_deg,
                             spectra.known_dec_deg, cfg.classifier.known_radius_arcsec, workers=1)
        nearest = nearest_within(pairs, n)
        hit = nearest.index_b >= 0
        z[hit] = spectra.known_z[nearest.index_b[hit]]
    if spectra.outcome_z and n:
        ids = np.asarray(candidates.column("astro_id").to_pylist(), dtype=object).astype(str)
        found = np.array([spectra.outcome_z.get(i, np.nan) for i in ids], np.float64)
        z = np.where(np.isfinite(found), found, z)
    return z


def labelled_luminosities(cfg: Config, reference: pa.Table) -> np.ndarray:
    """Bolometric luminosities of the labelled quasars at their spectroscopic redshifts, under ``[physics]``."""
    z = reference.column("redshift").to_numpy(zero_copy_only=False).astype(np.float64)
    cols = luminosity_columns(reference, Redshifts(z, z, z, np.full(len(z), "spec")),
                              bands=photometric_bands(cfg), physics=cfg.physics)
    return cols["lbol_erg_s"]


class Finisher:
    """Applied to each tile's candidates before the merge ranks them: spectroscopic redshifts, the flag.

    Build it with :func:`finisher`; :meth:`apply` every part; :meth:`summary` at the end.
    """

    def __init__(self, cfg: Config):
        self.cfg = cfg
        self.spectra = _spectra(cfg)
        path = model_path(cfg)
        reference = load_reference(path) if path is not None else None
        self.labelled_lbol = labelled_luminosities(cfg, reference) if reference is not None else np.zeros(0)
        self.labelled = None if reference is None else pa.table({"redshift": reference.column("redshift"),
                                                                  "lbol_erg_s": pa.array(self.labelled_lbol)})
        self.evaluation = None
        if path is not None:
            card = json.loads(card_path(path).read_text(encoding="utf-8"))
            self.evaluation = (card.get("redshift") or {}).get("evaluation")
        self.spectroscopic = 0
        self.beyond = 0

    def apply(self, part: pa.Table) -> pa.Table:
        """The part with spectroscopic redshifts adopted and ``beyond_labelled_luminosity`` set."""
        if "z_phot" not in part.column_names or part.num_rows == 0:
            return part
        table = adopt_spectroscopic(part, spectroscopic_redshifts(self.cfg, part, self.spectra), self.cfg)
        lbol = table.column("lbol_erg_s").to_numpy(zero_copy_only=False).astype(np.float64)
        beyond = beyond_labelled(lbol, self.labelled_lbol)
        self.spectroscopic += int(np.sum(np.asarray(table.column("z_source").to_pylist(), dtype=object) == "spec"))
        self.beyond += int(beyond.sum())
        return add_columns(table, {"beyond_labelled_luminosity": beyond})

    def summary(self) -> MergedPhysics:
        finite = self.labelled_lbol[np.isfinite(self.labelled_lbol)]
        return MergedPhysics(self.spectroscopic, self.beyond, float(finite.max()) if finite.size else float("nan"),
                             self.labelled, self.evaluation)


def finisher(cfg: Config) -> Finisher | None:
    """The merge's :class:`Finisher`, or None when the run has no model (so no redshifts)."""
    return Finisher(cfg) if cfg.classifier.model else None


def finish_physics(cfg: Config, candidates: pa.Table) -> tuple[pa.Table, MergedPhysics | None]:
    """Spectroscopic redshifts and the labelled-luminosity flag on a whole candidate table at once.

    Returns
    -------
    table : pyarrow.Table
    summary : MergedPhysics or None
        None when the candidates carry no redshifts (no model, or a model without a redshift part).
    """
    if "z_phot" not in candidates.column_names:
        return candidates, None
    f = Finisher(cfg)
    return f.apply(candidates), f.summary()
