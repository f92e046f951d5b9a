"""Saving and loading sleep models without pickle: XGBoost UBJSON bytes + a JSON metadata dict.

The booster is stored with ``Booster.save_raw(raw_format="ubj")``; everything else a model needs
(feature-set version and names, the standardise + PCA arrays, threshold, hyperparameters,
library versions, the content hashes of the training nights) goes into a plain JSON-able dict.
Floats are written by Python's ``json`` (shortest repr), which reads back the same float64, so a
restored model predicts bit-identical probabilities.

Metadata keys (``format_version`` 1): ``format``, ``format_version``, ``kind``,
``participant_id``, ``threshold``, ``n_rounds``, ``params``, ``feature_set`` (``version``,
``names``, ``config``), ``descriptor_names``, ``offset_baseline``, ``projection`` (or null),
``training_nights``, ``info`` (seed, library versions, tuning summary) and ``decoding``
(:meth:`NightDecoding.to_dict() <models.decoding.fitting.NightDecoding.to_dict>`: calibrator,
decoder settings, the sleep/wake chain and the fit record; null for a model without decoding).
Metadata written before ``decoding`` existed has no such key: it reads as None, and the model
calls at ``threshold_`` as it always did.

Errors::

    NightbankError
    └── InvalidModelArtifactError   bytes or metadata are not a nightbank model
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

import xgboost as xgb

from ..decoding.calibration import InvalidCalibrationError
from ..decoding.fitting import NightDecoding
from ..decoding.hmm import InvalidHmmError
from ..errors import NightbankError
from ..features.matrix import FeatureConfig
from .classifier import Projection, SleepModel

__all__ = ["FORMAT", "FORMAT_VERSION", "InvalidModelArtifactError", "library_versions", "load_model",
           "model_from_bytes", "model_to_bytes", "save_model"]

FORMAT = "nightbank.sleep-model"
FORMAT_VERSION = 1
_BOOSTER_FILE = "booster.ubj"
_METADATA_FILE = "metadata.json"


class InvalidModelArtifactError(NightbankError):
    """Stored bytes or metadata do not describe a nightbank model this version can read."""

    code = "invalid_model_artifact"


def library_versions() -> dict[str, str]:
    """Installed versions of the libraries a model depends on."""
    out = {"xgboost": xgb.__version__}
    for name in ("scikit-learn", "numpy", "scipy", "optuna"):
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            out[name] = "unknown"
    return out


def model_to_bytes(model: SleepModel) -> tuple[bytes, dict[str, Any]]:
    """Serialise a model.

    Parameters
    ----------
    model : SleepModel

    Returns
    -------
    booster : bytes
        XGBoost UBJSON.
    metadata : dict
        JSON-able (see the module docstring).
    """
    metadata = {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "kind": model.kind_,
        "participant_id": model.participant_id_,
        "threshold": model.threshold_,
        "n_rounds": model.n_rounds_,
        "params": model.params_,
        "feature_set": {"version": model.feature_version_, "names": list(model.feature_names_),
                        "config": model.feature_config_.to_dict()},
        "descriptor_names": list(model.descriptor_names_),
        "offset_baseline": model.offset_baseline_,
        "projection": None if model.projection_ is None else model.projection_.to_dict(),
        "training_nights": list(model.training_nights_),
        "info": model.info_,
        "decoding": None if model.decoding_ is None else model.decoding_.to_dict(),
    }
    try:
        metadata = json.loads(json.dumps(metadata, allow_nan=False))
    except (TypeError, ValueError) as exc:
        raise InvalidModelArtifactError(f"model metadata is not JSON-able: {exc}") from exc
    return bytes(model.booster_.save_raw(raw_format="ubj")), metadata


def model_from_bytes(booster: bytes, metadata: Mapping[str, Any]) -> SleepModel:
    """Restore a model from :func:`model_to_bytes` output.

    Parameters
    ----------
    booster : bytes
        XGBoost UBJSON bytes.
    metadata : mapping
        The metadata dict (e.g. parsed from JSON).

    Returns
    -------
    SleepModel

    Raises
    ------
    InvalidModelArtifactError
        If the format or version is unknown, a key is missing, or XGBoost cannot read the bytes.
    """
    if metadata.get("format") != FORMAT or metadata.get("format_version") != FORMAT_VERSION:
        raise InvalidModelArtifactError(
            f"not a {FORMAT} v{FORMAT_VERSION} model: format={metadata.get('format')!r}, "
            f"version={metadata.get('format_version')!r}")
    try:
        loaded = xgb.Booster(model_file=bytearray(booster))
        features = metadata["feature_set"]
        projection = metadata["projection"]
        decoding = metadata.get("decoding")
        return SleepModel(
            kind=metadata["kind"], booster=loaded, threshold=float(metadata["threshold"]),
            feature_config=FeatureConfig.from_dict(features["config"]), feature_version=features["version"],
            feature_names=tuple(features["names"]), params=metadata["params"], n_rounds=int(metadata["n_rounds"]),
            projection=None if projection is None else Projection.from_dict(projection),
            descriptor_names=tuple(metadata["descriptor_names"]), offset_baseline=float(metadata["offset_baseline"]),
            participant_id=metadata["participant_id"],
            training_nights=tuple(metadata["training_nights"]), info=metadata["info"],
            decoding=None if decoding is None else NightDecoding.from_dict(decoding))
    except (KeyError, TypeError, ValueError, xgb.core.XGBoostError, InvalidHmmError, InvalidCalibrationError) as exc:
        raise InvalidModelArtifactError(f"cannot restore the model: {exc}") from exc


def save_model(model: SleepModel, directory: str | Path) -> Path:
    """Write ``booster.ubj`` and ``metadata.json`` into ``directory`` (created if needed).

    Returns
    -------
    Path
        The directory.
    """
    path = Path(directory)
    path.mkdir(parents=True, exist_ok=True)
    raw, metadata = model_to_bytes(model)
    (path / _BOOSTER_FILE).write_bytes(raw)
    (path / _METADATA_FILE).write_text(json.dumps(metadata, indent=1, sort_keys=True) + "\n", encoding="utf-8")
    return path


def load_model(directory: str | Path) -> SleepModel:
    """Read a model written by :func:`save_model`.

    Raises
    ------
    InvalidModelArtifactError
        If a file is missing or unreadable.
    """
    path = Path(directory)
    try:
        raw = (path / _BOOSTER_FILE).read_bytes()
        metadata = json.loads((path / _METADATA_FILE).read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise InvalidModelArtifactError(f"cannot read a model from {path}: {exc}") from exc
    return model_from_bytes(raw, metadata)
