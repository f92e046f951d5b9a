"""Hyperparameter search pieces: the search space and booster parameters."""

from __future__ import annotations

import numpy as np
import optuna
import pytest

from models.learning.config import TrainingConfig
from models.learning.tuning import PCA_CHOICES, WARM_START, booster_params, suggest_hyperparameters


def test_search_space_accepts_the_warm_start_configuration() -> None:
    # Optuna's FixedTrial runs the suggest calls against fixed values (and rejects values outside a range).
    assert suggest_hyperparameters(optuna.trial.FixedTrial(dict(WARM_START))) == dict(WARM_START)
    assert WARM_START["pca_variance"] in PCA_CHOICES


def test_search_space_rejects_out_of_range_values() -> None:
    with pytest.raises(ValueError):
        suggest_hyperparameters(optuna.trial.FixedTrial(dict(WARM_START) | {"pca_variance": 0.5}))


@pytest.mark.parametrize("class_balance, expected", [(0.0, 1.0), (1.0, 20 / 80), (0.5, (20 / 80) ** 0.5)])
def test_class_weight_interpolates_between_none_and_balanced(class_balance: float, expected: float) -> None:
    y = np.array([1.0] * 80 + [0.0] * 20)  # sleep is the positive, majority class
    params = booster_params(dict(WARM_START) | {"class_balance": class_balance}, y=y, config=TrainingConfig(), seed=3)
    assert params["scale_pos_weight"] == pytest.approx(expected)  # hand computation
    assert params["tree_method"] == "hist" and params["objective"] == "binary:logistic" and params["seed"] == 3
