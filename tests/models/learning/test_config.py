"""Training configuration: range checks and the JSON form."""

from __future__ import annotations

import json

import pytest

from models.learning.config import InvalidTrainingConfigError, TrainingConfig


@pytest.mark.parametrize("field, value", [("n_trials", 0), ("min_personal_nights", 2), ("pooled_folds", 1),
                                          ("choice_policy", "accuracy"), ("movement_time", "maybe"),
                                          ("pooled_validation_share", 1.0), ("pooled_params", {"depth": 3}),
                                          ("min_sensitivity", 1.5), ("pooled_max_rows", 10)])
def test_config_rejects_out_of_range_values(field: str, value: object) -> None:
    with pytest.raises(InvalidTrainingConfigError, match=field) as info:
        TrainingConfig(**{field: value})
    assert info.value.code == "invalid_training_config"


def test_config_defaults_and_json_form() -> None:
    config = TrainingConfig()
    assert (config.n_trials, config.min_personal_nights, config.seed, config.n_jobs, config.pooled_folds,
            config.choice_policy) == (30, 3, 0, 1, 5, "balanced_accuracy")
    assert json.loads(json.dumps(config.to_dict()))["features"] == config.features.to_dict()
