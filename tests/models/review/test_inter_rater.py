"""Inter-rater summary: per-night kappa against scikit-learn's cohen_kappa_score, parameter differences
against models.scoring.parameters.sleep_parameters (the study's one definition), mean and SD against numpy."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import cohen_kappa_score

from models.review.inter_rater import inter_rater_summary
from models.scoring.parameters import sleep_parameters


def _pairs(seed: int, n_nights: int) -> list[tuple[np.ndarray, np.ndarray]]:
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n_nights):
        a = (rng.random(300) < 0.75).astype(float)
        b = a.copy()
        flip = rng.random(300) < rng.uniform(0.05, 0.3)
        b[flip] = 1 - b[flip]
        out.append((a, b))
    return out


def test_kappa_per_night_matches_scikit_learn() -> None:
    pairs = _pairs(11, 5)
    got = inter_rater_summary(pairs, epoch_seconds=30)
    want = [cohen_kappa_score(a, b) for a, b in pairs]  # scikit-learn reference
    assert got["n_nights"] == 5
    assert got["kappa_per_night"] == pytest.approx(want)
    assert got["kappa_mean"] == pytest.approx(np.mean(want))


def test_parameter_differences_follow_sleep_parameters() -> None:
    pairs = _pairs(12, 4)
    got = inter_rater_summary(pairs, epoch_seconds=30)["parameter_differences"]
    for name in ("tst_min", "waso_min", "sol_min", "awakenings", "sleep_efficiency_pct"):
        d = np.array([getattr(sleep_parameters(b, 30), name) - getattr(sleep_parameters(a, 30), name)
                      for a, b in pairs])
        assert got[name]["mean"] == pytest.approx(d.mean())
        assert got[name]["sd"] == pytest.approx(d.std(ddof=1))
        assert got[name]["mean_abs"] == pytest.approx(np.abs(d).mean())


def test_no_pairs_gives_nan_figures() -> None:
    got = inter_rater_summary([], epoch_seconds=30)
    assert got["n_nights"] == 0 and np.isnan(got["kappa_mean"])
    assert np.isnan(got["parameter_differences"]["tst_min"]["mean"])
