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
from selector.core.calibration import OneVsRestCalibrator
from selector.core.novelty import NoveltyModel
from selector.core.selection import ModelScores
from selector.jobs.train.features import feature_settings, feature_specs
from selector.jobs.train.labels import CLASSES, LabelledSet
from selector.jobs.train.model import Model, TrainOutputs, TrainResult
from selector.jobs.train.redshift import RedshiftModel, redshift_predictor
from selector.jobs.train.sky import PriorAdjustment
from selector.settings.config import MATCH_SECTIONS, Config, config_hash, plain
from selector.store.io import atomic_path, file_sha256, read_parquet, write_json, write_parquet
from selector.store.layout import (EVALUATION_FILE, MODEL_FILE, PREDICTIONS_FILE, REDSHIFT_PREDICTIONS_FILE,
                                   REDSHIFT_REFERENCE_FILE, card_path, classifier_dir, redshift_reference)

__all__ = ["TRUSTED_TYPES", "archive_types", "build_bundle", "load_model", "load_redshifts", "load_reference",
           "load_scorer", "model_bytes", "model_from_bundle", "read_card", "write_model_files"]

_CARD_FORMAT = "selector-classifier-card"
_BUNDLE_FORMAT = "selector-classifier"
_FORMAT_VERSION = 2

#: Every type a model archive may hold: exactly what ``selector train`` writes (the boosting model,
#: its binning and loss objects, the photometric-redshift part's quantile regressors with their
#: pinball loss, numpy arrays and scalars, plain containers). The calibration maps,
#: the sky adjustment and the novelty model are stored as plain numpy arrays, never as objects of
#: their own. Anything else in a file is refused before any object is built from it.
TRUSTED_TYPES = (
    "builtins.dict",
    "builtins.list",
    "builtins.str",
    "builtins.tuple",
    "numpy.ndarray",
    "numpy.random._generator.Generator",
    "numpy.uint64",
    "sklearn._loss._loss.CyHalfBinomialLoss",
    "sklearn._loss._loss.CyHalfMultinomialLoss",
    "sklearn._loss._loss.CyPinballLoss",
    "sklearn._loss.link.IdentityLink",
    "sklearn._loss.link.LogitLink",
    "sklearn._loss.link.Interval",
    "sklearn._loss.link.MultinomialLogit",
    "sklearn._loss.loss.HalfBinomialLoss",
    "sklearn._loss.loss.HalfMultinomialLoss",
    "sklearn._loss.loss.PinballLoss",
    "sklearn.ensemble._hist_gradient_boosting.binning._BinMapper",
    "sklearn.ensemble._hist_gradient_boosting.gradient_boosting.HistGradientBoostingClassifier",
    "sklearn.ensemble._hist_gradient_boosting.gradient_boosting.HistGradientBoostingRegressor",
    "sklearn.ensemble._hist_gradient_boosting.predictor.TreePredictor",
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


def _calibration_arrays(cal: OneVsRestCalibrator) -> dict:
    d = cal.to_dict()
    return {"method": np.array(d["method"], dtype=str), "min_slope": np.array(d["min_slope"]),
            "l2": np.array(d["l2"]), "abc": np.array([[m["a"], m["b"], m["c"]] for m in d["maps"]], np.float64)}


def _calibration_from_arrays(a: dict) -> OneVsRestCalibrator:
    method, min_slope, l2 = str(a["method"]), float(a["min_slope"]), float(a["l2"])
    maps = [{"method": method, "a": float(r[0]), "b": float(r[1]), "c": float(r[2]), "min_slope": min_slope, "l2": l2}
            for r in np.asarray(a["abc"], np.float64)]
    return OneVsRestCalibrator.from_dict({"method": method, "min_slope": min_slope, "l2": l2, "maps": maps})


def _bundle(model: Model) -> dict:
    """The archive's content: named estimators and named groups of plain arrays (room for more of each)."""
    return {"format": _BUNDLE_FORMAT, "format_version": str(_FORMAT_VERSION), "classes": list(model.classes),
            "features": list(model.feature_names),
            "estimators": {"classifier": model.estimator,
                           **({} if model.redshift is None else model.redshift.named_estimators())},
            "arrays": {"calibration": _calibration_arrays(model.calibration),
                       "sky_priors": model.priors.to_arrays(),
                       "novelty": model.novelty.to_arrays()}}


def model_from_bundle(bundle: dict, card: dict | None = None) -> Model:
    """The :class:`Model` a checked bundle holds (see :func:`build_bundle`)."""
    arrays = bundle["arrays"]
    return Model(bundle["estimators"]["classifier"], _calibration_from_arrays(arrays["calibration"]),
                 bundle["features"], bundle["classes"], priors=PriorAdjustment.from_arrays(arrays["sky_priors"]),
                 novelty=NoveltyModel.from_arrays(arrays["novelty"]), card=card,
                 redshift=RedshiftModel.from_named(bundle["estimators"], bundle["features"]))


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
    back = model_from_bundle(build_bundle(data, Path("(new model)")))
    if not all(np.array_equal(a, b, equal_nan=True) for a, b in zip(back.scores(probe), model.scores(probe))):
        raise SelectorError("internal error: the written model does not reproduce the trained model's predictions")
    if (back.redshift is None) != (model.redshift is None) or (model.redshift is not None and not np.array_equal(
            np.stack(back.redshift.predict(probe)), np.stack(model.redshift.predict(probe)))):
        raise SelectorError("internal error: the written model does not reproduce the trained model's redshifts")
    return data


def _redshift_card(result: TrainResult, reference_sha256: str | None) -> dict | None:
    if result.redshift is None:
        return None
    return {"kind": "quantile gradient boosting (scikit-learn), percentiles 16, 50, 84 sorted per row; the "
                    "classifier's features; quasars with spectroscopic redshifts only",
            "evaluation": result.redshift.evaluation.to_dict(),
            "reference_file": REDSHIFT_REFERENCE_FILE, "reference_sha256": reference_sha256}


def _card(cfg: Config, data: LabelledSet, result: TrainResult, sha256: str,
          reference_sha256: str | None = None) -> dict:
    e = result.evaluation
    best = e.best_criterion
    return {
        "format": _CARD_FORMAT,
        "format_version": _FORMAT_VERSION,
        "model_file": MODEL_FILE,
        "model_sha256": sha256,
        "purpose": "P(" + "), P(".join(result.model.classes) + ") for sources that passed the zero-motion test, "
                   "on the sky and at the labelled mix; a statistical ranking for follow-up, not a classification: "
                   "spectroscopy decides",
        "classes": list(result.model.classes),
        "classes_merged_or_dropped": list(result.plan.messages) if result.plan else [],
        "brown_dwarfs": "counted as stars",
        "features": [{"name": f.name, "unit": f.unit, "description": f.description} for f in feature_specs(cfg)],
        "feature_settings": feature_settings(cfg),
        "missing_values": "kept as NaN; the model routes them at each split",
        "training_set": data.summary,
        "model": {"kind": "histogram gradient boosting (scikit-learn)",
                  "hyperparameters": {k: getattr(cfg.classifier, k) for k in
                                      ("max_iter", "learning_rate", "max_leaf_nodes", "min_samples_leaf",
                                       "l2_regularization", "class_weight")},
                  "calibration": {
                      "maps": f"{cfg.classifier.calibration} (strictly increasing: distinct scores keep distinct "
                              "probabilities), one class against the rest, renormalised",
                      "scheme": "cross-fitted: the held-out probabilities of a fold come from a fold model that did "
                                "not see it and a map fitted on the other folds' out-of-fold predictions only; the "
                                "final map is fitted on all out-of-fold predictions and applied to the final model, "
                                "which is fitted on every labelled source",
                      "class_mix": "the boosting model is fitted with class_weight = "
                                   f"{cfg.classifier.class_weight!r}, so its raw probabilities refer to "
                                   + ("a uniform class mix" if cfg.classifier.class_weight == "balanced"
                                      else "the labels' class mix")
                                   + "; the maps are fitted on unweighted labels, so the calibrated probabilities "
                                     "(p_quasar_labelled_mix) refer to the labels' class frequencies, the "
                                     "'labelled_mix' below"},
                  "seed": cfg.project.seed},
        "sky_priors": {**result.model.priors.to_card(),
                       "population": "every usable feature-cache source that passes the zero-motion test under the "
                                     "[motion] settings of training (the sources a run scores), over every tile",
                       "motion_at_training": {"parallax_snr_max": cfg.motion.parallax_snr_max,
                                              "pm_pvalue_min": cfg.motion.pm_pvalue_min},
                       "how_applied": "a run moves each probability by the fixed factors sky/labelled_mix of its "
                                      "bin: p_quasar = P(quasar) on the sky (Saerens, Latinne & Decaestecker 2002, "
                                      "Neural Computation 14, 21); labelled sources entered the estimate with their "
                                      "held-out probabilities; `selector train` estimates them again"},
        "novelty": {"distance": "distance to the k-th nearest labelled source in features standardised by the "
                                "labelled median and interquartile range, over the labelled sources' median of the "
                                "same (1 = typical); missing values take the labelled median",
                    "k": cfg.classifier.novelty_neighbours,
                    "flag": f"beyond_training: distance above the labelled sources' {cfg.classifier.novelty_quantile} "
                            "quantile of it; it never removes a candidate",
                    "threshold": float(result.model.novelty.threshold)},
        "label_coverage": result.sky.get("coverage", {}),
        "validation": {"folds": cfg.classifier.folds, "grouping": f"HEALPix order {data.group_order} sky regions",
                       "regions": e.folds.regions},
        "metrics": {
            "threshold": e.threshold,
            "at_threshold": {name: s.as_dict() for name, s in e.at_threshold.items()},
            "quasar_purity_at_95_percent_completeness": e.quasar_at_target.purity,
            "best_published_criterion": best,
            "best_criterion_purity_at_95_percent_completeness": e.criteria[best].at_target.purity if best else None,
            "brier": e.brier.to_dict(),
            "held_out_quasar_at_threshold_labelled_mix": e.at_threshold["quasar"].as_dict(),
            "held_out_quasar_at_threshold_sky_mix": e.sky.at_threshold if e.sky else None,
            "default_list_expected_purity_on_the_sky": (
                {"value": e.sky.expected_purity, "error": e.sky.expected_purity_error, "listed": e.sky.listed,
                 "meaning": "mean P(quasar) on the sky over the list a run with this model and config makes"}
                if e.sky else None),
        },
        "redshift": _redshift_card(result, reference_sha256),
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
        ``format``, ``format_version``, ``classes``, ``features``, ``estimators`` (named fitted models),
        ``arrays`` (named groups of numpy arrays: ``calibration``, ``sky_priors``, ``novelty``).

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

    def arrays(group, keys):
        return isinstance(group, dict) and all(isinstance(group.get(k), np.ndarray) for k in keys)

    try:
        classes = bundle.get("classes")
        est = bundle["estimators"]["classifier"]
        groups = bundle["arrays"]
        ok = (isinstance(bundle, dict) and bundle.get("format") == _BUNDLE_FORMAT
              and bundle.get("format_version") == str(_FORMAT_VERSION)
              and isinstance(classes, list) and len(classes) >= 2 and classes[0] == "quasar"
              and all(c in CLASSES for c in classes)
              and type(est) is HistGradientBoostingClassifier and len(est.classes_) == len(classes)
              and isinstance(bundle.get("features"), list)
              and getattr(est, "n_features_in_", None) == len(bundle["features"])
              and arrays(groups["calibration"], ("method", "min_slope", "l2", "abc"))
              and groups["calibration"]["abc"].shape == (len(classes), 3)
              and arrays(groups["sky_priors"], ("classes", "train", "sky", "band", "edges_mag"))
              and groups["sky_priors"]["sky"].shape[-1] == len(classes)
              and arrays(groups["novelty"], ("center", "scale", "reference"))
              and RedshiftModel.named_ok(bundle["estimators"], len(bundle["features"])))
    except (KeyError, TypeError, AttributeError):
        ok = False
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
    try:
        model = model_from_bundle(bundle, card)
    except Exception as exc:  # numbers of the wrong shape surface anywhere in the rebuilding
        raise SelectorError(f"{path}: not a model written by `selector train` ({_first_line(exc)})") from None
    _check_sky_settings(model, cfg, path)
    return model


def read_card(model_path) -> dict | None:
    """The model card beside a model file, or None when it is missing or unreadable (for display only).

    Parameters
    ----------
    model_path : str or pathlib.Path

    Returns
    -------
    dict or None
    """
    try:
        card = json.loads(card_path(Path(model_path)).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return card if isinstance(card, dict) and card.get("format") == _CARD_FORMAT else None


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
    want_settings = feature_settings(cfg)
    for key in sorted(set(want_settings) | ({"extinction"} & set(settings))):
        value = want_settings.get(key)
        if settings.get(key) != value:
            where = "physics.extinction (with the ebv role)" if key == "extinction" else f"motion.{key}"
            raise SelectorError(f"{path}: refused: trained with {where} = {settings.get(key)!r}, this config has "
                                f"{value!r}; the features would mean something else, so retrain")


def _check_sky_settings(model: Model, cfg: Config, path: Path) -> None:
    """Refuse a model whose sky proportions were set by other ``[classifier]`` sky settings than ``cfg``'s."""
    c = cfg.classifier
    pri = model.priors
    if c.sky_priors is not None:
        want = {k: v for k, v in c.sky_priors.items() if k in model.classes}
        total = sum(want.values())
        have = dict(zip(model.classes, pri.sky[0].tolist())) if pri.method == "config" else None
        same = have is not None and total > 0 and all(
            abs(have.get(k, 0.0) - want.get(k, 0.0) / total) <= 1e-12 for k in model.classes)
        if not same:
            raise SelectorError(f"{path}: refused: its sky proportions were not set by this config's "
                                "classifier.sky_priors; run `selector train` again (the model stores them)")
        return
    bins = c.sky_prior_bins
    edges = np.asarray(bins.edges_mag, np.float64) if bins is not None else np.zeros(0)
    if pri.method != "em" or (bins.band if bins else "") != pri.band or not np.array_equal(edges, pri.edges_mag):
        raise SelectorError(f"{path}: refused: its sky proportions were estimated with other classifier.sky_priors / "
                            "classifier.sky_prior_bins settings than this config's; run `selector train` again")


_LOADED: dict = {}


def _loaded(path, cfg: Config) -> Model:
    """The model of ``path``, read once per process and file version, checked against ``cfg`` on every call."""
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
        _check_sky_settings(model, cfg, p)
    return model


def load_redshifts(path, cfg: Config):
    """A function giving photometric redshifts of candidate rows, or None when the model has no redshift part.

    Parameters
    ----------
    path : str or pathlib.Path
        The model file.
    cfg : Config

    Returns
    -------
    callable or None
        ``predict(table) -> selector.core.candidate_physics.Redshifts``.
    """
    model = _loaded(path, cfg)
    return None if model.redshift is None else redshift_predictor(model.redshift, cfg)


def load_reference(path) -> pa.Table | None:
    """The labelled quasars (id, redshift, photometry) written beside a model with a redshift part.

    Parameters
    ----------
    path : str or pathlib.Path
        The model file; its card names the reference and its SHA-256.

    Returns
    -------
    pyarrow.Table or None
        None when the model has no redshift part.

    Raises
    ------
    SelectorError
        The card is unreadable, or the reference is missing or differs from the one the card describes.
    """
    cpath = card_path(Path(path))
    card = read_card(path)
    if card is None:
        raise SelectorError(f"{cpath}: not a readable model card; retrain with `selector train`")
    part = card.get("redshift")
    if not part:
        return None
    ref = redshift_reference(Path(path))
    if not ref.is_file() or file_sha256(ref) != part.get("reference_sha256"):
        raise SelectorError(f"{ref}: missing, or not the labelled-quasar reference the model card {cpath.name} "
                            "describes; retrain with `selector train`")
    return read_parquet(ref)


def load_scorer(path, cfg: Config) -> Callable[[pa.Table], ModelScores]:
    """A function giving the model's scores of feature-cache rows (NaN for rows failing the zero-motion test).

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
        ``scorer(table) -> ModelScores``: P(quasar) on the sky and at the labelled mix, the sky
        log-odds, the novelty distance and the beyond-training flag.
    """
    model = _loaded(path, cfg)

    def scorer(table: pa.Table) -> ModelScores:
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
    reference_sha = None
    if result.redshift is not None:
        write_parquet(result.redshift.reference, out / REDSHIFT_REFERENCE_FILE)
        write_parquet(result.redshift.held_out, out / REDSHIFT_PREDICTIONS_FILE)
        reference_sha = file_sha256(out / REDSHIFT_REFERENCE_FILE)
    card = _card(cfg, data, result, hashlib.sha256(archive).hexdigest(), reference_sha)
    outputs = TrainOutputs(model=out / MODEL_FILE, card=card_path(out / MODEL_FILE), evaluation=out / EVALUATION_FILE,
                           predictions=out / PREDICTIONS_FILE, plots=[])
    with atomic_path(outputs.model) as tmp:
        tmp.write_bytes(archive)
    write_json(card, outputs.card)
    evaluation = result.evaluation.to_dict()
    if result.redshift is not None:
        evaluation["redshift"] = result.redshift.evaluation.to_dict()
    write_json(evaluation, outputs.evaluation)
    write_parquet(result.held_out, outputs.predictions)
    result.model.card = card
    result.outputs = outputs
    return outputs
