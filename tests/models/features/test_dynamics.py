"""Shift, lumpiness, stability, flat-spot, crossing and autocorrelation features.

References: R tsfeatures 1.1.1 check values (feature-references.md §2), statsmodels 0.15 ``acf``,
pandas 3.1 ``cut``. Per-window loops use small re-statements of the R definitions that are
themselves checked against the R values first.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from statsmodels.tsa.stattools import acf

from models.features.dynamics import (
    crossing_points,
    flat_spots,
    lag1_autocorrelation,
    lumpiness,
    max_level_shift,
    max_var_shift,
    stability,
)
from models.features.windows import CentredWindows

X30 = np.array([0, 0, 3, 12, 0, 0, 0, 45, 80, 2, 0, 0, 0, 0, 7, 0, 0, 1, 0, 0, 150, 90, 10, 0, 0, 0, 0, 0, 0, 4],
               dtype=float)  # feature-references.md §2


def _x181() -> np.ndarray:
    rng = np.random.default_rng(7)  # feature-references.md §2
    x = rng.poisson(3, 181).astype(float)
    x[::10] *= 20
    return x


X181 = _x181()


def _whole(x: np.ndarray) -> CentredWindows:
    return CentredWindows(x, x.size)  # every window covers the whole series


# ---- re-statements of the R definitions (tsfeatures 1.1.1), for per-window loops ----------

def _r_max_shift(x: np.ndarray, width: int, *, var: bool) -> float:
    """R max_level_shift / max_var_shift on a NaN-free window; NaN where R returns 0 (no pairs)."""
    if x.size < 2 * width:
        return np.nan
    tiles = np.lib.stride_tricks.sliding_window_view(x, width)
    stat = tiles.var(axis=1, ddof=1) if var else tiles.mean(axis=1)
    return float(np.max(np.abs(stat[width:] - stat[:-width])))


def _r_tiles(x: np.ndarray, width: int, *, lump: bool) -> float:
    """R lumpiness / stability: standardise (unless constant), full tiles from the first point."""
    if x.size < 2 * width:
        return np.nan
    sd = x.std(ddof=1)
    z = (x - x.mean()) / sd if sd > 0 else x
    tiles = z[:(x.size // width) * width].reshape(-1, width)
    return float((tiles.var(axis=1, ddof=1) if lump else tiles.mean(axis=1)).var(ddof=1))


def _r_crossing_points(x: np.ndarray) -> float:
    below = x <= np.median(x)
    return float(np.sum(below[1:] != below[:-1]))


def _pandas_flat_spots(x: np.ndarray) -> float:
    labels = pd.cut(x, bins=10, labels=False)  # the Python tsfeatures port's binning
    runs = np.diff(np.flatnonzero(np.diff(np.r_[np.nan, labels, np.nan]) != 0))
    return float(runs.max())


def _windows(x: np.ndarray, h: int):
    for i in range(x.size):
        yield i, x[max(0, i - h):i + h + 1]


# ---- R check values -----------------------------------------------------------------------

@pytest.mark.parametrize(("x", "width", "expected"), [
    # R max_level_shift(x, width) on raw x; R's 0 for "no pairs" is NaN here
    (X30, 10, 24.6), (X30, 5, 50.0), (X30, 20, np.nan), (X181, 10, 9.3), (X181, 5, 25.0), (X181, 20, 7.6),
])
def test_max_level_shift_r_check_values(x, width, expected):
    np.testing.assert_allclose(max_level_shift(_whole(x), width=width)[0], expected, rtol=1e-9)
    np.testing.assert_allclose(_r_max_shift(x, width, var=False), expected, rtol=1e-9)


@pytest.mark.parametrize(("x", "width", "expected"), [
    # R max_var_shift(x, width) on raw x
    (X30, 10, 2711.777778), (X30, 5, 4736.4), (X30, 20, np.nan),
    (X181, 10, 1258.077778), (X181, 5, 2807.2), (X181, 20, 916.5263158),
])
def test_max_var_shift_r_check_values(x, width, expected):
    np.testing.assert_allclose(max_var_shift(_whole(x), width=width)[0], expected, rtol=1e-9)
    np.testing.assert_allclose(_r_max_shift(x, width, var=True), expected, rtol=1e-9)


@pytest.mark.parametrize(("x", "level", "var"), [(X30, 0.7194265055, 2.31929906), (X181, 0.4245766491, 2.622127494)])
def test_shifts_on_scaled_series_r_check_values(x, level, var):
    z = (x - x.mean()) / x.std(ddof=1)  # R scalets()
    assert max_level_shift(_whole(z), width=10)[0] == pytest.approx(level, rel=1e-9)
    assert max_var_shift(_whole(z), width=10)[0] == pytest.approx(var, rel=1e-8)


@pytest.mark.parametrize(("x", "width", "lump", "stab"), [
    # R lumpiness(x, width) / stability(x, width); R's 0 for fewer than 2 tiles is NaN here
    (X30, 10, 1.418465168, 0.1297385827), (X30, 5, 2.430202573, 0.3538577934), (X30, 20, np.nan, np.nan),
    (X181, 10, 0.8793892731, 0.01910417703), (X181, 5, 2.837439905, 0.1324277455),
    (X181, 20, 0.3942121157, 0.01191370865),
])
def test_lumpiness_stability_r_check_values(x, width, lump, stab):
    np.testing.assert_allclose(lumpiness(_whole(x), width=width)[0], lump, rtol=1e-9)
    np.testing.assert_allclose(stability(_whole(x), width=width)[0], stab, rtol=1e-9)
    np.testing.assert_allclose(_r_tiles(x, width, lump=True), lump, rtol=1e-9)
    np.testing.assert_allclose(_r_tiles(x, width, lump=False), stab, rtol=1e-9)


@pytest.mark.parametrize(("x", "crossings", "flat"), [(X30, 11, 11), (X181, 88, 9)])
def test_crossing_points_and_flat_spots_r_check_values(x, crossings, flat):
    # R crossing_points / flat_spots (= Python port); X30 has values on bin edges (45, 90)
    assert crossing_points(_whole(x))[0] == crossings == _r_crossing_points(x)
    assert flat_spots(_whole(x))[0] == flat == _pandas_flat_spots(x)


@pytest.mark.parametrize(("x", "expected"), [(X30, 0.3724248215), (X181, -0.08591898333)])
def test_lag1_autocorrelation_check_values(x, expected):
    assert lag1_autocorrelation(_whole(x))[0] == pytest.approx(expected, rel=1e-9)


# ---- every window, including truncated ones at the ends ------------------------------------

def _log_counts(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = rng.poisson(2, n) * (rng.random(n) < 0.3) + rng.poisson(90, n) * (rng.random(n) < 0.05)
    x[n // 2:n // 2 + 35] = 0
    return np.log1p(x.astype(float))


@pytest.mark.parametrize("h", [10, 30])
def test_window_features_equal_references_on_every_window(h):
    x = _log_counts(200, h)
    w = CentredWindows(x, h)
    got = {
        "level": max_level_shift(w, width=10), "var": max_var_shift(w, width=10),
        "lump": lumpiness(w, width=10), "stab": stability(w, width=10),
        "cross": crossing_points(w), "flat": flat_spots(w), "acf1": lag1_autocorrelation(w),
    }
    for i, win in _windows(x, h):
        constant = win.min() == win.max()
        ref = {
            "level": _r_max_shift(win, 10, var=False), "var": _r_max_shift(win, 10, var=True),
            "lump": _r_tiles(win, 10, lump=True), "stab": _r_tiles(win, 10, lump=False),
            "cross": _r_crossing_points(win), "flat": _pandas_flat_spots(win) if not constant else win.size,
            # statsmodels 0.15 acf(adjusted=False, fft=False) = R acf; undefined for a constant window
            "acf1": np.nan if constant else acf(win, nlags=1, fft=False, adjusted=False)[1],
        }
        for name, value in ref.items():
            np.testing.assert_allclose(got[name][i], value, rtol=1e-9, atol=1e-12, err_msg=f"{name} at {i}")


def test_missing_epochs_are_skipped_not_zero():
    x = np.log1p(np.array([5, 0, 0, 0, 0, 0, 0, 7, 0, 0, 30, 0], dtype=float))
    gap = x.copy()
    gap[3] = np.nan  # filled with 0 instead, epochs 1..6 would be one still run of 6
    w = CentredWindows(gap, gap.size)
    obs = gap[~np.isnan(gap)]
    # crossings: pairs with a missing epoch are skipped (R sum(na.rm = TRUE))
    below = gap <= np.median(obs)
    pairs = ~np.isnan(gap[1:]) & ~np.isnan(gap[:-1])
    assert crossing_points(w)[0] == np.sum((below[1:] != below[:-1]) & pairs)
    # flat spots: runs are broken at the gap; the zero run 4..6 (3 epochs) is the longest
    assert flat_spots(w)[0] == 3.0
    assert flat_spots(CentredWindows(x, x.size))[0] == 6.0
    # lag-1 autocorrelation: pairs with a missing epoch leave the sums; statsmodels 0.15
    # acf(missing="conservative") removes NaN from the mean and from the cross-products the same way
    ref = acf(gap, nlags=1, fft=False, adjusted=False, missing="conservative")[1]
    assert lag1_autocorrelation(w)[0] == pytest.approx(ref, rel=1e-12)


@pytest.mark.parametrize("h", [3, 10, 30])
def test_runs_and_crossings_on_a_restless_series_with_gaps(h):
    # a restless start and end around quiet epochs, with a gap: window minima, maxima and medians
    # change from one window to the next, and runs are cut at window edges and at the gap
    rng = np.random.default_rng(40 + h)
    counts = np.concatenate([rng.poisson(150, 60), rng.poisson(4, 80) * (rng.random(80) < 0.3),
                             rng.poisson(120, 60)]).astype(float)
    counts[100:107] = np.nan
    x = np.log1p(counts)
    w = CentredWindows(x, h)
    cross, flat = crossing_points(w), flat_spots(w)
    for i, win in _windows(x, h):
        obs = ~np.isnan(win)
        if not obs.any():
            assert np.isnan(cross[i]) and np.isnan(flat[i])
            continue
        below = win <= np.median(win[obs])  # R crossing_points, pairs with a missing epoch skipped
        assert cross[i] == np.sum((below[1:] != below[:-1]) & obs[1:] & obs[:-1]), f"crossings at {i}"
        # pandas cut (the Python port's binning) on each observed stretch; a missing epoch ends a run
        low, high = win[obs].min(), win[obs].max()
        stretches = np.split(win, np.flatnonzero(~obs))
        longest = 0.0
        for part in stretches:
            part = part[~np.isnan(part)]
            if part.size and high > low:
                labels = pd.cut(np.r_[low, high, part], bins=10, labels=False)[2:]
                runs = np.diff(np.flatnonzero(np.diff(np.r_[np.nan, labels, np.nan]) != 0))
                longest = max(longest, float(runs.max()))
            elif part.size:
                longest = max(longest, float(part.size))
        assert flat[i] == longest, f"flat spots at {i}"


@pytest.mark.filterwarnings("error")
@pytest.mark.parametrize("value", [0.0, 2.5])
def test_constant_windows_have_defined_values_without_warnings(value):
    w = CentredWindows(np.full(90, value), 30)
    assert np.all(max_level_shift(w, width=10)[20:70] == 0.0)
    assert np.all(max_var_shift(w, width=10)[20:70] == 0.0)
    assert np.all(lumpiness(w, width=10) == 0.0) and np.all(stability(w, width=10) == 0.0)
    assert np.all(crossing_points(w) == 0.0)
    assert np.all(flat_spots(w) == w.n_observed)  # R and the Python port: n for a constant series
    assert np.isnan(lag1_autocorrelation(w)).all()
