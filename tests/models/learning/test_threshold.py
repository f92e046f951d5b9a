"""The decision threshold: Youden's J, with and without a sensitivity floor."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import balanced_accuracy_score, recall_score, roc_auc_score

from models.learning.threshold import binary_auc, youden_threshold


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


@pytest.mark.parametrize("seed, n, dtype, decimals", [(0, 900, np.float32, None), (1, 5000, np.float64, None),
                                                      (2, 1200, np.float32, 2), (3, 40, np.float64, 1)])
def test_binary_auc_is_scikit_learns_roc_auc_score(seed: int, n: int, dtype: type, decimals: int | None) -> None:
    # Reference: sklearn.metrics.roc_auc_score, exactly (the same number, not only close); rounded scores make ties.
    rng = np.random.default_rng(seed)
    y = (rng.random(n) < 0.8).astype(float)
    p = np.clip(0.3 * y + rng.normal(0.4, 0.25, n), 0, 1).astype(dtype)
    if decimals is not None:
        p = np.round(p, decimals)
    assert binary_auc(y, p) == roc_auc_score(y, p)


def test_binary_auc_of_a_single_class_is_nan() -> None:
    assert np.isnan(binary_auc(np.ones(5), np.linspace(0, 1, 5)))  # common practice: undefined, not 0.5
