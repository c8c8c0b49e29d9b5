"""Saving and loading a model folder: skops archive, JSON card, trusted types only."""

from __future__ import annotations

import importlib
import json
import os
import warnings
from datetime import UTC, datetime
from importlib.metadata import PackageNotFoundError
from importlib.metadata import version as _dist_version
from pathlib import Path

import numpy as np

from topoclass._files import file_sha256
from topoclass.errors import ModelFileError
from topoclass.model.folds import plain_value
from topoclass.model.pipeline import CLASSIFIERS
from topoclass.model.trained import TrainedModel

MODEL_FILE = "model.skops"


CARD_FILE = "card.json"


REPORT_FILE = "cv_report.md"


CARD_FORMAT = 1


# Libraries whose *classes* (and numpy ufuncs) may be rebuilt from a model file. Their functions
# are not trusted: a function stored in, e.g., a FunctionTransformer would run at scoring time.
_TRUSTED_LIBRARIES = ("sklearn", "numpy", "scipy")


_DENIED_SUBPACKAGES = ("numpy.testing", "numpy.f2py", "numpy.distutils", "scipy._lib")


_OWN_PREFIX = "topoclass."


class ModelVersionWarning(UserWarning):
    """A model file was written by another version of topoclass or scikit-learn."""


def save_model(model: TrainedModel, directory: str | Path, *,
               extra_card: dict | None = None) -> Path:
    """Write ``model.skops``, ``card.json`` and ``cv_report.md`` into ``directory``.

    Parameters
    ----------
    model : TrainedModel
    directory : path
        Created if missing; existing files of these names are replaced.
    extra_card : dict or None
        More JSON-ready entries for the card, e.g. ``{"label_sheet": "labels.csv",
        "label_sheet_sha256": "…"}``; they may not replace the card's own keys.

    Returns
    -------
    Path of the model folder.
    """
    import skops.io as sio

    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    path = directory / MODEL_FILE
    tmp = directory / (MODEL_FILE + ".tmp")
    sio.dump(model, tmp)
    os.replace(tmp, path)  # never leave a half-written model under the real name
    card = {
        "format": CARD_FORMAT,
        "created_utc": datetime.now(UTC).isoformat(timespec="seconds"),
        "classes": [plain_value(c) for c in model.classes],
        "class_counts": dict(model.class_counts),
        "feature_set": model.feature_set_name,
        "classifier": model.classifier,
        "classifier_description": CLASSIFIERS.get(model.classifier, ""),
        "calibration": {"method": model.calibration, "reason": model.calibration_reason},
        "novelty": {"method": "Mahalanobis distance, Ledoit-Wolf covariance, scaled features",
                    "quantile": model.novelty.quantile, "margin": model.novelty.margin,
                    "threshold": model.novelty.threshold_,
                    "design_rate": model.novelty.design_rate_,
                    "ranges": None if model.range_check is None else {
                        name: [float(lo), float(hi)] for name, lo, hi in zip(
                            model.range_check.names_, model.range_check.low_,
                            model.range_check.high_, strict=True)},
                    "range_tolerance": None if model.range_check is None
                    else model.range_check.tolerance},
        "review_band": None if model.review_band is None else jsonable(
            model.review_band.describe()),
        "doubt": None if model.doubt is None else jsonable(model.doubt.describe()),
        "density_check": None if model.density_check is None else {
            "method": "local outlier factor of the standardised order measures with psi4",
            "measures": model.density_check.names_,
            "threshold": model.density_check.threshold_},
        "settings": jsonable(model.settings),
        "cv": jsonable(model.cv_report.summary()),
        "versions": package_versions(),
        "model_file": MODEL_FILE,
        "sha256": file_sha256(path),
    }
    if extra_card:
        clash = sorted(set(extra_card) & set(card))
        if clash:
            raise ValueError(f"extra_card may not replace card entries {clash}")
        card.update(jsonable(extra_card))
    (directory / CARD_FILE).write_text(json.dumps(card, indent=2) + "\n",
                                       encoding="utf-8")
    title = f"Cross-validation of {model.feature_set_name} + {model.classifier}"
    (directory / REPORT_FILE).write_text(model.cv_report.to_markdown(title), encoding="utf-8")
    return directory


def load_model(directory: str | Path) -> TrainedModel:
    """Load a model folder written by :func:`save_model`, refusing anything unexpected.

    Checks, in order: the folder and ``card.json`` exist; the card's ``sha256`` matches
    ``model.skops``; the file is a skops archive whose types are all on the allow-list (our own
    ``topoclass.*`` types, and classes or ufuncs of scikit-learn, numpy and scipy — no other
    callables). Nothing from the file is run before these checks pass; pickle is never used.

    Warns with :class:`ModelVersionWarning` when the card records another topoclass or
    scikit-learn version than the one running.

    Raises
    ------
    ModelFileError
        Naming the file and what to do.
    """
    import skops.io as sio

    directory = Path(directory)
    card_path = directory / CARD_FILE
    if not directory.is_dir():
        raise ModelFileError(f"model folder {directory} does not exist; train one with "
                             f"`topoclass train` or give the right folder")
    if not card_path.is_file():
        raise ModelFileError(f"{card_path} is missing; this is not a topoclass model folder "
                             f"(retrain with `topoclass train`)")
    try:
        card = json.loads(card_path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ModelFileError(f"{card_path} is not valid JSON ({exc}); restore the folder or "
                             f"retrain with `topoclass train`") from None
    if not isinstance(card, dict):
        raise ModelFileError(f"{card_path} is not a model card; retrain with `topoclass train`")
    if card.get("format", 0) > CARD_FORMAT:
        raise ModelFileError(f"{card_path} has card format {card.get('format')}, newer than "
                             f"this topoclass reads ({CARD_FORMAT}); upgrade topoclass")
    name = card.get("model_file")
    if name != MODEL_FILE:
        raise ModelFileError(f"{card_path} names model file {name!r}, expected {MODEL_FILE!r}; "
                             f"retrain with `topoclass train`")
    path = directory / MODEL_FILE
    if not path.is_file():
        raise ModelFileError(f"{path} is missing; restore the model folder or retrain")
    if file_sha256(path) != card.get("sha256"):
        raise ModelFileError(f"{path} does not match the sha256 in {card_path}: the file was "
                             f"changed or replaced; restore the original folder or retrain "
                             f"with `topoclass train`")
    _warn_versions(card, card_path)
    try:
        untrusted = sio.get_untrusted_types(file=path)
    except Exception as exc:  # a pickle or other non-zip file lands here
        raise ModelFileError(f"{path} is not a valid skops model file ({type(exc).__name__}: "
                             f"{exc}); nothing was loaded; retrain with `topoclass train`"
                             ) from None
    refused = [t for t in untrusted if not _is_allowed_type(t)]
    if refused:
        raise ModelFileError(f"{path} contains types topoclass does not trust: "
                             f"{', '.join(refused)}; nothing was loaded; retrain with "
                             f"`topoclass train` from trusted code")
    try:
        model = sio.load(path, trusted=list(untrusted))
    except Exception as exc:
        raise ModelFileError(f"{path} cannot be loaded faithfully by this installation "
                             f"({type(exc).__name__}: {exc}); retrain with `topoclass train`"
                             ) from None
    if not isinstance(model, TrainedModel):
        raise ModelFileError(f"{path} holds a {type(model).__name__}, not a topoclass model; "
                             f"retrain with `topoclass train`")
    return model


def package_versions() -> dict:
    """Versions of topoclass and the libraries a model depends on (None if not installed)."""
    import topoclass

    out: dict[str, str | None] = {"topoclass": topoclass.__version__}
    for dist in ("numpy", "scipy", "scikit-learn", "skops", "ripser", "persim"):
        try:
            out[dist] = _dist_version(dist)
        except PackageNotFoundError:
            out[dist] = None
    return out


def _is_allowed_type(name: str) -> bool:
    """Our own types, and classes or ufuncs (not other callables) of the trusted libraries."""
    if name.startswith(_OWN_PREFIX):
        return True
    if name.split(".")[0] not in _TRUSTED_LIBRARIES:
        return False
    if any(name == d or name.startswith(d + ".") for d in _DENIED_SUBPACKAGES):
        return False
    obj = _resolve(name)
    return isinstance(obj, type) or isinstance(obj, np.ufunc)


def _resolve(name: str):
    """The object a dotted name refers to, importing only modules of the trusted libraries."""
    parts = name.split(".")
    for cut in range(len(parts) - 1, 0, -1):
        try:
            obj = importlib.import_module(".".join(parts[:cut]))
        except ImportError:
            continue
        try:
            for attr in parts[cut:]:
                obj = getattr(obj, attr)
        except AttributeError:
            return None
        return obj
    return None


def _warn_versions(card: dict, card_path: Path) -> None:
    import sklearn

    import topoclass

    saved = card.get("versions") or {}
    for dist, running in (("scikit-learn", sklearn.__version__),
                          ("topoclass", topoclass.__version__)):
        written = saved.get(dist)
        if written != running:
            warnings.warn(
                f"{card_path}: model written with {dist} {written}, running {dist} {running}; "
                f"predictions may differ — re-validate with `topoclass validate` or retrain",
                ModelVersionWarning, stacklevel=3,
            )


def jsonable(obj):
    """Plain JSON types (numpy scalars and arrays converted; dict keys as strings)."""
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return jsonable(obj.tolist())
    if isinstance(obj, np.generic):
        return obj.item()
    return obj
