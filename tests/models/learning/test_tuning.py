"""Hyperparameter search pieces: the search space, booster parameters, the Youden threshold."""

from __future__ import annotations

import numpy as np
import optuna
import pytest
from sklearn.metrics import balanced_accuracy_score, recall_score

from models.learning.training import TrainingConfig
from models.learning.tuning import PCA_CHOICES, WARM_START, booster_params, suggest_hyperparameters, youden_threshold


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


def test_youden_threshold_maximises_balanced_accuracy() -> None:
    # Reference: scikit-learn balanced_accuracy_score over every candidate threshold.
    rng = np.random.default_rng(0)
    y = (rng.random(500) < 0.85).astype(float)
    p = np.clip(0.6 * y + rng.normal(0.2, 0.25, 500), 0, 1)
    t = youden_threshold(y, p)
    best = max(balanced_accuracy_score(y, (p >= c).astype(int)) for c in np.unique(p))
    assert balanced_accuracy_score(y, (p >= t).astype(int)) == pytest.approx(best)
    assert t in p


def test_youden_threshold_with_a_sensitivity_floor() -> None:
    # Reference: the same brute force over thresholds whose sensitivity (sklearn recall_score) reaches 0.95.
    rng = np.random.default_rng(1)
    y = (rng.random(800) < 0.85).astype(float)
    p = np.clip(0.5 * y + rng.normal(0.25, 0.25, 800), 0, 1)
    t = youden_threshold(y, p, min_sensitivity=0.95)
    allowed = [c for c in np.unique(p) if recall_score(y, (p >= c).astype(int)) >= 0.95]
    best = max(balanced_accuracy_score(y, (p >= c).astype(int)) for c in allowed)
    assert recall_score(y, (p >= t).astype(int)) >= 0.95
    assert balanced_accuracy_score(y, (p >= t).astype(int)) == pytest.approx(best)
    assert t <= youden_threshold(y, p)


def test_youden_threshold_with_one_class_is_one_half() -> None:
    assert youden_threshold(np.ones(5), np.linspace(0, 1, 5)) == 0.5
