"""Window summary statistics against numpy/scipy and the check values of feature-references.md §2."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats as st

from models.features.summaries import SUMMARY_STATISTICS, window_shares, window_summaries
from models.features.windows import CentredWindows

# feature-references.md §2 inputs (exact)
X30 = np.array([0, 0, 3, 12, 0, 0, 0, 45, 80, 2, 0, 0, 0, 0, 7, 0, 0, 1, 0, 0, 150, 90, 10, 0, 0, 0, 0, 0, 0, 4],
               dtype=float)


def _x181() -> np.ndarray:
    rng = np.random.default_rng(7)
    x = rng.poisson(3, 181).astype(float)
    x[::10] *= 20
    return x


def _whole(x: np.ndarray) -> dict[str, float]:
    """Statistics of the whole series: a window wider than the series covers all of it."""
    return {k: float(v[0]) for k, v in window_summaries(CentredWindows(x, x.size)).items()}


@pytest.mark.parametrize(("x", "expected"), [
    # feature-references.md §2 check values (numpy 2.4.6 / scipy 1.17.1), 10 significant digits
    (X30, {"mean": 13.46666667, "sd": 33.61917442, "median": 0, "min": 0, "max": 150, "p10": 0, "p25": 0,
           "p75": 3.75, "p90": 48.5, "skew": 2.86608552, "kurt": 7.517752609}),
    (_x181(), {"mean": 9.61878453, "sd": 21.84357955, "median": 3, "min": 0, "max": 120, "p10": 1, "p25": 2,
               "p75": 5, "p90": 20, "skew": 3.470902769, "kurt": 11.77579281}),
])
def test_window_summaries_check_values(x, expected):
    got = _whole(x)
    for name, value in expected.items():
        assert got[name] == pytest.approx(value, rel=1e-8, abs=1e-12), name


def test_window_summaries_rolling_edge_check_values():
    # feature-references.md §2 "rolling edge check" (pandas rolling(21, center=True, min_periods=1))
    rng = np.random.default_rng(2024)
    x = np.concatenate([rng.poisson(150, 150), rng.poisson(20, 700) * (rng.random(700) < 0.15),
                        rng.poisson(120, 150)]).astype(float)
    assert x.sum() == 42736 and (x == 0).sum() == 587
    s = window_summaries(CentredWindows(x, 10))
    assert s["mean"][0] == pytest.approx(144.727273, abs=1e-6)
    assert s["p90"][0] == pytest.approx(156.0)
    assert s["mean"][500] == pytest.approx(0.952381, abs=1e-6)
    assert s["p90"][500] == 0.0


@pytest.mark.parametrize("h", [3, 10, 30])
def test_window_summaries_match_scipy_on_every_window(h):
    rng = np.random.default_rng(h)
    x = np.log1p(rng.poisson(3, 200) * (rng.random(200) < 0.4) + rng.poisson(60, 200) * (rng.random(200) < 0.05))
    x[[5, 6, 7, 90, 150]] = np.nan
    s = window_summaries(CentredWindows(x, h))
    for i in range(200):
        w = x[max(0, i - h):i + h + 1]
        w = w[~np.isnan(w)]
        ref = {"mean": np.mean(w), "sd": np.std(w), "min": w.min(), "max": w.max(),
               "p10": np.percentile(w, 10), "p25": np.percentile(w, 25), "median": np.median(w),
               "p75": np.percentile(w, 75), "p90": np.percentile(w, 90)}
        if w.min() < w.max():  # scipy defaults: bias=True, Fisher kurtosis
            ref |= {"skew": st.skew(w), "kurt": st.kurtosis(w)}
        else:
            ref |= {"skew": np.nan, "kurt": np.nan}
        for name in SUMMARY_STATISTICS:
            np.testing.assert_allclose(s[name][i], ref[name], rtol=1e-9, atol=1e-12, err_msg=f"{name} at {i}")


@pytest.mark.filterwarnings("error")
@pytest.mark.parametrize("value", [0.0, 5.0])
def test_window_summaries_constant_windows_defined_without_warnings(value):
    s = window_summaries(CentredWindows(np.full(50, value), 10))
    assert np.all(s["sd"] == 0.0) and np.all(s["mean"] == value) and np.all(s["p90"] == value)
    assert np.isnan(s["skew"]).all() and np.isnan(s["kurt"]).all()


def test_window_shares_by_hand():
    x = np.array([0.0, 0, 30, np.nan, 5, 0, 100])
    s = window_shares(x, 1, movement_level=20.0)
    # epoch 3: window {30, NaN, 5}: 2 observed of 3, no zero, one movement (30 > 20)
    assert s["coverage"][3] == pytest.approx(2 / 3)
    assert s["zero_share"][3] == 0.0 and s["move_share"][3] == 0.5
    # epoch 0: truncated window {0, 0}: coverage 2/3, all zero
    assert s["coverage"][0] == pytest.approx(2 / 3) and s["zero_share"][0] == 1.0
    # a count equal to the level is not a movement
    assert window_shares(np.array([20.0]), 1, movement_level=20.0)["move_share"][0] == 0.0
