"""Saving and loading models: UBJSON + JSON only, identical predictions, also in a fresh process."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import xgboost as xgb

from models.features.matrix import FeatureConfig, FeatureSetMismatchError
from models.features.source import night_features
from models.learning.artifacts import (
    InvalidModelArtifactError,
    load_model,
    model_from_bytes,
    model_to_bytes,
    save_model,
)
from models.learning.classifier import Projection, SleepModel
from models.learning.config import TrainingConfig
from models.learning.pooled import train_pooled
from models.nights.json_io import night_to_json
from models.nights.night import Night
from models.simulation.simulator import CohortSpec, simulate_cohort

ROOT = Path(__file__).resolve().parents[3]


@pytest.fixture(scope="module")
def nights() -> list[Night]:
    sims = simulate_cohort(CohortSpec(n_participants=4, nights_min=2, nights_max=2, labelled_share=1.0,
                                      few_labels_participants=0, artefacts=False), seed=41)
    return [s.night for s in sims]


@pytest.fixture(scope="module")
def personal_with_pca(nights) -> SleepModel:
    """A personal-kind model with a standardise + PCA step, built from real components."""
    config = FeatureConfig()
    mine = [n for n in nights if n.participant_id == nights[0].participant_id]
    feats = [night_features(n, config) for n in mine]
    X = np.vstack([f.values[slice(*n.in_bed)] for f, n in zip(feats, mine, strict=True)])
    y = np.concatenate([n.reference_sleep()[slice(*n.in_bed)] for n in mine])
    projection = Projection.fit(X, variance=0.95)
    booster = xgb.train({"objective": "binary:logistic", "tree_method": "hist", "max_depth": 3, "nthread": 1},
                        xgb.DMatrix(projection.transform(X), y), 20)
    return SleepModel(kind="personal", booster=booster, threshold=0.61, feature_config=config,
                      feature_version=feats[0].version, feature_names=feats[0].names, params={"max_depth": 3},
                      n_rounds=20, projection=projection, participant_id=nights[0].participant_id,
                      training_nights=tuple(n.content_hash for n in mine))


@pytest.fixture(scope="module")
def pooled_model(nights) -> SleepModel:
    by: dict[str, list[Night]] = {}
    for n in nights:
        by.setdefault(n.participant_id, []).append(n)
    return train_pooled(by, config=TrainingConfig(pooled_folds=2, max_rounds=40)).model


@pytest.mark.parametrize("which", ["personal_with_pca", "pooled_model"])
def test_round_trip_gives_identical_predictions(which: str, request: pytest.FixtureRequest, nights) -> None:
    model: SleepModel = request.getfixturevalue(which)
    raw, metadata = model_to_bytes(model)
    assert isinstance(raw, bytes) and raw[:1] == b"{"  # UBJSON object, not a pickle stream
    assert json.loads(json.dumps(metadata)) == metadata  # plain JSON
    restored = model_from_bytes(raw, metadata)
    for night in nights[:3]:
        np.testing.assert_array_equal(restored.predict_proba(night, offset=-0.4),
                                      model.predict_proba(night, offset=-0.4))
        np.testing.assert_array_equal(restored.predict(night), model.predict(night))
    assert restored.threshold_ == model.threshold_ and restored.params_ == model.params_
    assert restored.feature_version_ == model.feature_version_ and restored.kind_ == model.kind_
    assert restored.training_nights_ == model.training_nights_
    assert model_to_bytes(restored) == (raw, metadata)


def test_model_loads_in_a_fresh_process_with_identical_predictions(personal_with_pca, nights, tmp_path) -> None:
    save_model(personal_with_pca, tmp_path / "model")
    night_file = tmp_path / "night.json"
    night_file.write_text(json.dumps(night_to_json(nights[1])))
    script = (
        "import json, sys\n"
        "from models.learning.artifacts import load_model\n"
        "from models.nights.formats import read_night\n"
        "model = load_model(sys.argv[1])\n"
        "p = model.predict_proba(read_night(sys.argv[2]))\n"
        "print(json.dumps([float(v).hex() for v in p]))\n")
    out = subprocess.run([sys.executable, "-c", script, str(tmp_path / "model"), str(night_file)], cwd=ROOT,
                         capture_output=True, text=True, check=True, timeout=300)
    fresh = np.array([float.fromhex(v) for v in json.loads(out.stdout)])
    np.testing.assert_array_equal(fresh, personal_with_pca.predict_proba(nights[1]))
    assert load_model(tmp_path / "model").threshold_ == personal_with_pca.threshold_


def test_model_refuses_features_of_another_feature_set(personal_with_pca, nights) -> None:
    raw, metadata = model_to_bytes(personal_with_pca)
    metadata["feature_set"]["version"] = "fs0-0000000000000000-30s"
    with pytest.raises(FeatureSetMismatchError) as info:
        model_from_bytes(raw, metadata).predict_proba(nights[0])
    assert info.value.code == "feature_set_mismatch"
    minute = nights[0]
    sixty = Night(minute.participant_id, minute.start, 60, minute.counts.reshape(-1, 2).sum(axis=1)
                  if minute.n_epochs % 2 == 0 else minute.counts[:-1].reshape(-1, 2).sum(axis=1))
    with pytest.raises(FeatureSetMismatchError, match="version"):
        personal_with_pca.predict(sixty)


def test_pooled_model_needs_its_descriptors(pooled_model, nights) -> None:
    with pytest.raises(FeatureSetMismatchError, match="descriptors"):
        pooled_model.predict_proba(nights[0], descriptors={"participant_counts_q90": 1.0})


@pytest.mark.parametrize("change", [{"format": "something-else"}, {"format_version": 99}])
def test_unknown_formats_are_refused(personal_with_pca, change: dict) -> None:
    raw, metadata = model_to_bytes(personal_with_pca)
    with pytest.raises(InvalidModelArtifactError) as info:
        model_from_bytes(raw, metadata | change)
    assert info.value.code == "invalid_model_artifact"


def test_corrupt_bytes_and_missing_files_are_refused(personal_with_pca, tmp_path) -> None:
    raw, metadata = model_to_bytes(personal_with_pca)
    with pytest.raises(InvalidModelArtifactError):
        model_from_bytes(raw[: len(raw) // 3], metadata)
    with pytest.raises(InvalidModelArtifactError):
        load_model(tmp_path / "nothing-here")
