"""Scaled per-night intervals: the split-conformal rank (Lei, G'Sell, Rinaldo, Tibshirani & Wasserman
2018, "Distribution-free predictive inference for regression", from memory), the scale it gives on
Gaussian errors against scipy's normal quantile, coverage of new exchangeable nights, and the
interval arithmetic written out by hand."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from models.decoding.hmm import InvalidHmmError
from models.decoding.interval_scaling import (
    conformal_scale,
    covered,
    inner_scales,
    posterior_sides,
    required_scale,
    scaled_intervals,
)


def test_conformal_scale_is_the_ceil_n_plus_one_level_ranked_score() -> None:
    scores = np.arange(19, 0, -1, dtype=float)  # 19 nights, scores 1..19 in any order
    assert conformal_scale(scores, 0.9) == 18.0  # rank ceil(20 * 0.9) = 18 (Lei et al. 2018)
    assert conformal_scale([3.0, 1.0, np.nan, 2.0], 0.9) == 3.0  # rank 5 > n = 3: the largest score
    assert conformal_scale([np.nan], 0.9) == 1.0  # no inner night: the posterior as it is
    with pytest.raises(InvalidHmmError, match="level"):
        conformal_scale([1.0], 1.0)


def test_gaussian_errors_give_the_normal_quantile_and_cover_new_nights() -> None:
    """Errors ~ N(0, sigma) around the decoded value with posterior sides of sigma on every night: the
    conformal scale tends to the 95 % normal quantile (scipy.stats.norm), and new nights are covered
    at about the level (exchangeable nights)."""
    rng = np.random.default_rng(11)
    sigma = rng.uniform(5.0, 30.0, 4000)
    truth = 400.0 + rng.normal(0.0, sigma)
    sides = [(400.0 - s, 400.0, 400.0 + s) for s in sigma]
    scores = [required_scale(400.0, sd, t, step=0.5) for sd, t in zip(sides[:2000], truth[:2000], strict=True)]
    scale = conformal_scale(scores, 0.9)
    assert scale == pytest.approx(stats.norm.ppf(0.95), abs=0.08)
    inside = [400.0 - scale * s <= t <= 400.0 + scale * s for s, t in zip(sigma[2000:], truth[2000:], strict=True)]
    assert 0.88 <= np.mean(inside) <= 0.92


def test_scaled_interval_is_centred_on_the_decoded_value_and_rounded_outwards() -> None:
    samples = {"tst_min": np.array([300.0, 310.0, 320.0, 330.0, 340.0, 350.0, 360.0, 370.0, 380.0, 390.0]),
               "awakenings": np.array([2, 3, 3, 3, 4, 4, 4, 5, 5, 6], dtype=float),
               "sol_min": np.full(10, np.nan)}
    low, median, high = posterior_sides(samples["tst_min"], 0.9)
    q = np.quantile(samples["tst_min"], [0.05, 0.5, 0.95], method="inverted_cdf")  # numpy's inverse CDF
    assert (low, median, high) == tuple(q)
    iv = scaled_intervals(samples, {"tst_min": 342.0, "awakenings": 1.0}, {"tst_min": 1.5, "awakenings": 2.0},
                          level=0.9, epoch_seconds=30, in_bed_epochs=1000)
    # by hand: TST sides 340 - 300 = 40 and 390 - 340 = 50 minutes, times 1.5, around 342, to whole half-minutes
    assert iv["tst_min"] == [342.0 - 60.0, 342.0 + 75.0]
    # awakenings: sides 4 - 2 = 2 and 6 - 4 = 2, times 2 around 1 = [-3, 5], clipped at 0
    assert iv["awakenings"] == [0.0, 5.0]
    assert all(math.isnan(v) for v in iv["sol_min"])
    # in-bed time bounds TST: 800 epochs of 30 s = 400 min
    wide = scaled_intervals(samples, {"tst_min": 342.0}, {"tst_min": 10.0}, level=0.9, epoch_seconds=30,
                            in_bed_epochs=800)
    assert wide["tst_min"] == [0.0, 400.0]
    assert covered(iv, {"tst_min": 282.0, "awakenings": 6.0, "sol_min": None}) == {
        "tst_min": 1.0, "awakenings": 0.0, "sol_min": pytest.approx(np.nan, nan_ok=True)}


def test_required_scale_puts_the_reference_on_the_interval_edge() -> None:
    rng = np.random.default_rng(2)
    draws = rng.normal(200.0, 10.0, 300)
    sides = posterior_sides(draws, 0.9)
    for truth in (150.0, 205.0, 260.0):
        s = required_scale(210.0, sides, truth, step=0.5)
        iv = scaled_intervals({"waso_min": draws}, {"waso_min": 210.0}, {"waso_min": s}, level=0.9,
                              epoch_seconds=30, in_bed_epochs=2000)["waso_min"]
        assert iv[0] <= truth <= iv[1]
        assert min(truth - iv[0], iv[1] - truth) <= 0.5  # on the edge up to the outward rounding
    samples = [{"waso_min": draws}] * 3
    scales = inner_scales(samples, [{"waso_min": 210.0}] * 3, [{"waso_min": t} for t in (150.0, 205.0, None)],
                          level=0.9, epoch_seconds=30, in_bed_epochs=[2000] * 3)
    assert scales["waso_min"] == pytest.approx(max(required_scale(210.0, sides, t, 0.5) for t in (150.0, 205.0)))
