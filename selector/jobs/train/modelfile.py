"""Safe model files: a canonical skops archive, its card, and loading with every check.

Model files are skops archives checked against :data:`TRUSTED_TYPES` before anything is built
from them, next to a JSON model card holding the archive's SHA-256: a file that differs from its
card, holds any other type, is truncated or is not a model file is refused with one line.
"""

from __future__ import annotations

import hashlib
import io
import json
import platform
import zipfile
from pathlib import Path
from typing import Callable

import numpy as np
import pyarrow as pa

from selector import __version__
from selector.errors import SelectorError
from selector.jobs.train.features import feature_settings, feature_specs
from selector.jobs.train.labels import CLASSES, LabelledSet
from selector.jobs.train.model import Model, TrainOutputs, TrainResult
from selector.settings.config import MATCH_SECTIONS, Config, config_hash, plain
from selector.store.io import atomic_path, write_json, write_parquet
from selector.store.layout import EVALUATION_FILE, MODEL_FILE, PREDICTIONS_FILE, card_path, classifier_dir

__all__ = ["TRUSTED_TYPES", "archive_types", "build_bundle", "load_model", "load_scorer", "model_bytes",
           "write_model_files"]

_CARD_FORMAT = "selector-classifier-card"
_BUNDLE_FORMAT = "selector-classifier"
_FORMAT_VERSION = 1

#: Every type a model archive may hold: exactly what ``selector train`` writes (the model, its
#: binning and loss objects, the calibration maps, numpy arrays and scalars, plain containers).
#: Anything else in a file is refused before any object is built from it.
TRUSTED_TYPES = (
    "builtins.dict",
    "builtins.list",
    "builtins.str",
    "builtins.tuple",
    "numpy.float64",
    "numpy.ndarray",
    "numpy.random._generator.Generator",
    "numpy.uint64",
    "sklearn._loss._loss.CyHalfMultinomialLoss",
    "sklearn._loss.link.Interval",
    "sklearn._loss.link.MultinomialLogit",
    "sklearn._loss.loss.HalfMultinomialLoss",
    "sklearn.ensemble._hist_gradient_boosting.binning._BinMapper",
    "sklearn.ensemble._hist_gradient_boosting.gradient_boosting.HistGradientBoostingClassifier",
    "sklearn.ensemble._hist_gradient_boosting.predictor.TreePredictor",
    "sklearn.isotonic.IsotonicRegression",
    "sklearn.linear_model._logistic.LogisticRegression",
    "sklearn.preprocessing._label.LabelEncoder",
)


def archive_types(data: bytes) -> list[str]:
    """Every type named in a skops archive's schema (module.class), sorted.

    Parameters
    ----------
    data : bytes
        The archive.

    Returns
    -------
    list of str
    """
    with zipfile.ZipFile(io.BytesIO(data)) as z:
        tree = json.loads(z.read("schema.json"))
    found = set()
    stack = [tree]
    while stack:
        node = stack.pop()
        if isinstance(node, dict):
            if "__class__" in node and "__module__" in node:
                found.add(f"{node['__module__']}.{node['__class__']}")
            stack.extend(node.values())
        elif isinstance(node, list):
            stack.extend(node)
    return sorted(found)


def _canonical_archive(data: bytes) -> bytes:
    """The same archive with memory-address ids renumbered and fixed zip timestamps.

    skops names array files and shared-object ids after ``id()`` and stamps the current time on
    each member, so two dumps of one model differ; renumbering both in order of first appearance
    (which keeps every reference intact) makes equal models give equal bytes.
    """
    with zipfile.ZipFile(io.BytesIO(data)) as z:
        tree = json.loads(z.read("schema.json"))
        members = {name: z.read(name) for name in z.namelist() if name != "schema.json"}
    ids, files = {}, {}

    def walk(node):
        if isinstance(node, dict):
            out = {}
            for k, v in node.items():
                if k == "__id__" and isinstance(v, int):
                    out[k] = ids.setdefault(v, len(ids) + 1)
                elif k == "file" and isinstance(v, str) and v in members:
                    out[k] = files.setdefault(v, f"{len(files) + 1:06d}.npy")
                else:
                    out[k] = walk(v)
            return out
        if isinstance(node, list):
            return [walk(v) for v in node]
        return node

    tree = walk(tree)
    if set(files) != set(members):
        raise SelectorError("internal error: a model archive member is not referenced by its schema")
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:
        def put(name, payload):
            info = zipfile.ZipInfo(name, date_time=(1980, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            z.writestr(info, payload, compresslevel=6)

        put("schema.json", json.dumps(tree, separators=(",", ":")).encode())
        for old, new in sorted(files.items(), key=lambda kv: kv[1]):
            put(new, members[old])
    return buf.getvalue()


def _bundle(model: Model) -> dict:
    return {"format": _BUNDLE_FORMAT, "format_version": str(_FORMAT_VERSION), "classes": list(CLASSES),
            "features": list(model.feature_names), "estimator": model.estimator, "calibrators": list(model.calibrators)}


def _versions() -> dict:
    import numpy
    import scipy
    import skops
    import sklearn

    return {"selector": __version__, "scikit-learn": sklearn.__version__, "numpy": numpy.__version__,
            "scipy": scipy.__version__, "skops": skops.__version__, "python": platform.python_version()}


def model_bytes(model: Model, probe: np.ndarray) -> bytes:
    """The model as canonical archive bytes, checked to rebuild and to reproduce its predictions.

    Parameters
    ----------
    model : Model
    probe : numpy.ndarray, shape (rows, features)
        Rows whose predictions the rebuilt model must reproduce exactly.

    Returns
    -------
    bytes

    Raises
    ------
    SelectorError
        An internal error: an untrusted type inside, or predictions that differ after the round trip.
    """
    import skops.io as sio

    data = _canonical_archive(sio.dumps(_bundle(model)))
    untrusted = [t for t in archive_types(data) if t not in TRUSTED_TYPES]
    if untrusted:
        raise SelectorError(f"internal error: the model holds {untrusted[0]}, which is not in TRUSTED_TYPES")
    back = build_bundle(data, Path("(new model)"))
    if not np.array_equal(Model(back["estimator"], back["calibrators"], back["features"]).predict_proba(probe),
                          model.predict_proba(probe)):
        raise SelectorError("internal error: the written model does not reproduce the trained model's predictions")
    return data


def _card(cfg: Config, data: LabelledSet, result: TrainResult, sha256: str) -> dict:
    e = result.evaluation
    best = e.best_criterion
    return {
        "format": _CARD_FORMAT,
        "format_version": _FORMAT_VERSION,
        "model_file": MODEL_FILE,
        "model_sha256": sha256,
        "purpose": "P(quasar), P(star), P(galaxy) for sources that passed the zero-motion test; a statistical "
                   "ranking for follow-up, not a classification: spectroscopy decides",
        "classes": list(CLASSES),
        "brown_dwarfs": "counted as stars",
        "features": [{"name": f.name, "unit": f.unit, "description": f.description} for f in feature_specs(cfg)],
        "feature_settings": feature_settings(cfg),
        "missing_values": "kept as NaN; the model routes them at each split",
        "training_set": data.summary,
        "model": {"kind": "histogram gradient boosting (scikit-learn)",
                  "hyperparameters": {k: getattr(cfg.classifier, k) for k in
                                      ("max_iter", "learning_rate", "max_leaf_nodes", "min_samples_leaf",
                                       "l2_regularization", "class_weight")},
                  "calibration": f"{cfg.classifier.calibration}, one class against the rest on out-of-fold "
                                 "predictions, renormalised",
                  "seed": cfg.project.seed},
        "validation": {"folds": cfg.classifier.folds, "grouping": f"HEALPix order {data.group_order} sky regions",
                       "regions": e.folds.regions},
        "metrics": {
            "threshold": e.threshold,
            "at_threshold": {name: s.as_dict() for name, s in e.at_threshold.items()},
            "quasar_purity_at_95_percent_completeness": e.quasar_at_target.purity,
            "best_published_criterion": best,
            "best_criterion_purity_at_95_percent_completeness": e.criteria[best].at_target.purity if best else None,
            "brier": e.brier.to_dict(),
        },
        "config_hash": config_hash(cfg),
        "match_config_hash": config_hash(cfg, MATCH_SECTIONS),
        "classifier_config": plain(cfg)["classifier"],
        "versions": _versions(),
    }


def build_bundle(data: bytes, path: Path) -> dict:
    """Build the bundle from archive bytes after checking every type in it.

    Parameters
    ----------
    data : bytes
        The archive.
    path : pathlib.Path
        Named in the errors.

    Returns
    -------
    dict
        ``format``, ``format_version``, ``classes``, ``features``, ``estimator``, ``calibrators``.

    Raises
    ------
    SelectorError
        Unreadable archive, untrusted type, or contents of unexpected shape.
    """
    import skops.io as sio

    try:
        found = archive_types(data)
    except (zipfile.BadZipFile, KeyError, ValueError, EOFError, OSError) as exc:
        raise SelectorError(f"{path}: not a readable model file ({_first_line(exc)}); retrain with "
                            "`selector train`") from None
    bad = [t for t in found if t not in TRUSTED_TYPES]
    try:
        untrusted = sio.get_untrusted_types(data=data)
    except Exception as exc:  # skops raises many types for damaged archives
        raise SelectorError(f"{path}: not a readable model file ({_first_line(exc)})") from None
    bad += [t for t in untrusted if t not in TRUSTED_TYPES and t not in bad]
    if bad:
        raise SelectorError(f"{path}: refused: the model file holds the untrusted type {bad[0]}"
                            + (f" (and {len(bad) - 1} more)" if len(bad) > 1 else "")
                            + "; only files written by `selector train` are loaded")
    try:
        bundle = sio.loads(data, trusted=list(TRUSTED_TYPES))
    except Exception as exc:  # a damaged archive can fail anywhere inside skops
        raise SelectorError(f"{path}: not a readable model file ({_first_line(exc)})") from None
    _check_bundle(bundle, path)
    return bundle


def _check_bundle(bundle, path: Path) -> None:
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.isotonic import IsotonicRegression
    from sklearn.linear_model import LogisticRegression

    ok = (isinstance(bundle, dict) and bundle.get("format") == _BUNDLE_FORMAT
          and bundle.get("format_version") == str(_FORMAT_VERSION)
          and bundle.get("classes") == list(CLASSES)
          and type(bundle.get("estimator")) is HistGradientBoostingClassifier
          and isinstance(bundle.get("calibrators"), list) and len(bundle["calibrators"]) == len(CLASSES)
          and all(type(m) in (IsotonicRegression, LogisticRegression) for m in bundle["calibrators"])
          and isinstance(bundle.get("features"), list)
          and getattr(bundle["estimator"], "n_features_in_", None) == len(bundle["features"]))
    if not ok:
        raise SelectorError(f"{path}: not a model written by `selector train` (unexpected contents)")


def _first_line(exc) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def load_model(path, cfg: Config) -> Model:
    """Load a model file after checking its card, its hash, its types and its features against ``cfg``.

    Parameters
    ----------
    path : str or pathlib.Path
        The ``.skops`` file; its card lies beside it.
    cfg : Config
        The configuration whose features the model must fit.

    Returns
    -------
    Model
        With its card.

    Raises
    ------
    SelectorError
        One line naming the file: card missing or foreign, file changed since training (hash),
        untrusted type inside, unreadable or truncated archive, or features that differ from what
        this configuration provides.
    """
    path = Path(path)
    cpath = card_path(path)
    if not path.is_file():
        raise SelectorError(f"{path}: model file not found (classifier.model); train one with `selector train`")
    try:
        card = json.loads(cpath.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SelectorError(f"{cpath}: model card not found beside {path.name}; a model is loaded only with its "
                            "card") from None
    except (OSError, ValueError) as exc:
        raise SelectorError(f"{cpath}: not a readable model card ({_first_line(exc)})") from None
    if not isinstance(card, dict) or card.get("format") != _CARD_FORMAT or card.get("format_version") != _FORMAT_VERSION:
        raise SelectorError(f"{cpath}: not a model card written by `selector train`")
    data = path.read_bytes()
    if hashlib.sha256(data).hexdigest() != card.get("model_sha256"):
        raise SelectorError(f"{path}: refused: the file differs from the one its card describes (changed, truncated "
                            "or replaced since training); retrain with `selector train`")
    _check_features(card, cfg, path)
    bundle = build_bundle(data, path)
    if bundle["features"] != [f["name"] for f in card["features"]]:
        raise SelectorError(f"{path}: the model's feature list differs from its card's")
    return Model(bundle["estimator"], bundle["calibrators"], bundle["features"], card)


def _check_features(card: dict, cfg: Config, path: Path) -> None:
    try:
        have = [f["name"] for f in card["features"]]
        settings = card["feature_settings"]
    except (KeyError, TypeError):
        raise SelectorError(f"{card_path(path)}: model card without a feature list") from None
    want = [f.name for f in feature_specs(cfg)]
    missing = [n for n in have if n not in want]
    extra = [n for n in want if n not in have]
    if missing or extra:
        parts = []
        if missing:
            parts.append(f"it needs {', '.join(missing)}, which this config does not provide")
        if extra:
            parts.append(f"this config adds {', '.join(extra)}, which it was not trained on")
        raise SelectorError(f"{path}: refused: the model's features do not match this configuration ({'; '.join(parts)}); "
                            "retrain with `selector train` or use the config it was trained with")
    for key, value in feature_settings(cfg).items():
        if settings.get(key) != value:
            raise SelectorError(f"{path}: refused: trained with motion.{key} = {settings.get(key)!r}, this config has "
                                f"{value!r}; the zero-motion features would mean something else, so retrain")


_LOADED: dict = {}


def load_scorer(path, cfg: Config) -> Callable[[pa.Table], np.ndarray]:
    """A function giving P(quasar) for feature-cache rows (NaN for rows failing the zero-motion test).

    The model is read once per process and file version; the feature check against ``cfg`` runs
    on every call, so a changed config is never scored with a model that does not fit it.

    Parameters
    ----------
    path : str or pathlib.Path
        The model file.
    cfg : Config

    Returns
    -------
    callable
        ``scorer(table) -> numpy.ndarray`` of P(quasar).
    """
    p = Path(path).resolve()
    try:
        st = p.stat()
        cst = card_path(p).stat()
        key = (str(p), st.st_mtime_ns, st.st_size, cst.st_mtime_ns, cst.st_size)
    except OSError:
        key = None
    model = _LOADED.get(key) if key else None
    if model is None:
        model = load_model(p, cfg)
        if key:
            _LOADED.clear()
            _LOADED[key] = model
    else:
        _check_features(model.card, cfg, p)

    def scorer(table: pa.Table) -> np.ndarray:
        return model.score_table(table, cfg)

    return scorer


def write_model_files(cfg: Config, data: LabelledSet, result: TrainResult) -> TrainOutputs:
    """Write model, card, evaluation JSON and held-out predictions below ``classifier.output_folder``.

    The pictures of the evaluation are not drawn here (the presentation floor draws them); the
    result's ``outputs`` and its model's card are set.

    Parameters
    ----------
    cfg : Config
    data : LabelledSet
        The training set (the card's summary, and rows to check the written model with).
    result : TrainResult

    Returns
    -------
    TrainOutputs
    """
    out = classifier_dir(cfg)
    archive = model_bytes(result.model, data.X[: min(len(data.X), 2000)])
    card = _card(cfg, data, result, hashlib.sha256(archive).hexdigest())
    outputs = TrainOutputs(model=out / MODEL_FILE, card=card_path(out / MODEL_FILE), evaluation=out / EVALUATION_FILE,
                           predictions=out / PREDICTIONS_FILE, plots=[])
    with atomic_path(outputs.model) as tmp:
        tmp.write_bytes(archive)
    write_json(card, outputs.card)
    write_json(result.evaluation.to_dict(), outputs.evaluation)
    write_parquet(result.held_out, outputs.predictions)
    result.model.card = card
    result.outputs = outputs
    return outputs
