"""Centred-window machinery: geometry in minutes, truncation at the ends, masked statistics."""

from __future__ import annotations

import numpy as np
import pytest

from models.features.windows import (
    CentredWindows,
    half_width_epochs,
    rolling_mean_var,
    window_bounds,
    window_counts,
)


def _counts(n: int, seed: int, *, missing: bool = True) -> np.ndarray:
    """Sleep-like counts: mostly zeros, ties, a few bursts; optional missing epochs (NaN)."""
    rng = np.random.default_rng(seed)
    x = rng.poisson(4, n) * (rng.random(n) < 0.35) + rng.poisson(80, n) * (rng.random(n) < 0.03)
    x = x.astype(float)
    if missing:
        x[rng.choice(n, size=n // 15, replace=False)] = np.nan
    return x


def _window(x: np.ndarray, i: int, h: int) -> np.ndarray:
    """Observed values of the truncated window around epoch i (plain slicing)."""
    w = x[max(0, i - h):i + h + 1]
    return w[~np.isnan(w)]


@pytest.mark.parametrize(("minutes", "epoch_seconds", "n_epochs"), [
    (10, 30, 21), (30, 30, 61), (60, 30, 121), (90, 30, 181),  # the default windows at 30 s
    (10, 15, 41), (90, 15, 361), (10, 60, 11), (90, 60, 91),
])
def test_half_width_epochs_spans_the_same_minutes(minutes, epoch_seconds, n_epochs):
    # hand computation: span of (n_epochs - 1) epochs = minutes
    assert 2 * half_width_epochs(minutes, epoch_seconds) + 1 == n_epochs


def test_window_bounds_truncate_at_the_ends():
    lo, hi = window_bounds(5, 2)
    assert lo.tolist() == [0, 0, 0, 1, 2]
    assert hi.tolist() == [2, 3, 4, 4, 4]


def test_window_counts_equal_plain_sums():
    mask = _counts(300, 1) > 0
    counts = window_counts(mask, 7)
    assert counts.tolist() == [int(mask[max(0, i - 7):i + 8].sum()) for i in range(300)]


@pytest.mark.parametrize("h", [1, 10, 30])
def test_centred_windows_statistics_match_numpy(h):
    x = np.log1p(_counts(250, 2))
    w = CentredWindows(x, h)
    for i in range(0, 250, 7):
        obs = _window(x, i, h)
        assert w.n_observed[i] == obs.size
        if obs.size == 0:
            assert np.isnan(w.mean[i])
            continue
        # numpy is the reference: mean, population variance, min, max, percentiles ('linear')
        np.testing.assert_allclose(w.mean[i], np.mean(obs), rtol=1e-12, atol=1e-14)
        np.testing.assert_allclose(w.variance(ddof=0)[i], np.var(obs), rtol=1e-10, atol=1e-14)
        assert w.minimum[i] == obs.min() and w.maximum[i] == obs.max()
        for q in (0.0, 0.1, 0.25, 0.5, 0.75, 0.9, 1.0):
            np.testing.assert_allclose(w.quantile(q)[i], np.percentile(obs, 100 * q), rtol=1e-12, atol=1e-14)


def test_centred_windows_constant_rows_have_exact_zero_deviation():
    w = CentredWindows(np.full(40, np.log1p(7.0)), 5)
    assert w.is_constant.all()
    assert np.all(w.deviations == 0.0) and np.all(w.variance(ddof=1) == 0.0)


def test_centred_windows_all_missing_window_is_nan():
    x = np.zeros(30)
    x[10:25] = np.nan
    w = CentredWindows(x, 2)
    assert w.n_observed[17] == 0 and np.isnan(w.mean[17]) and np.isnan(w.quantile(0.5)[17])
    assert not w.is_constant[17]


def test_rolling_mean_var_matches_numpy_with_missing_values():
    x = _counts(120, 3)
    mean, var = rolling_mean_var(x, 10)
    assert mean.shape == var.shape == (111,)
    for i in range(111):
        obs = x[i:i + 10][~np.isnan(x[i:i + 10])]
        # numpy reference: mean, sample variance (ddof=1) of the observed values
        np.testing.assert_allclose(mean[i], obs.mean() if obs.size else np.nan, rtol=1e-12)
        np.testing.assert_allclose(var[i], obs.var(ddof=1) if obs.size > 1 else np.nan, rtol=1e-10, atol=1e-12)
