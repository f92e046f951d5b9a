"""Sleep Regularity Index, mid-sleep, clock-time means and social jetlag against the published formulas and scipy."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from models import clock_mean_h, clock_sd_h, mid_sleep, sleep_regularity_index, social_jetlag_h

SIX_HOURS = 21_600  # an "epoch" of 6 h: M = 4 epochs per day keeps the hand counts short


def _phillips(days: np.ndarray) -> float:
    """Phillips et al. 2017 (Sci Rep 7:3216), the double sum as published: -100 + 200/(M(N-1)) sum_j sum_i delta."""
    n_days, m = days.shape
    total = sum(int(days[j, i] == days[j + 1, i]) for j in range(n_days - 1) for i in range(m))
    return -100 + 200 / (m * (n_days - 1)) * total


def test_perfectly_regular_days_give_100() -> None:
    # Phillips et al. 2017: every pair 24 h apart agrees, so the sum is M(N-1) and SRI = -100 + 200 = 100
    day = np.r_[np.ones(16 * 60), np.zeros(8 * 60)]  # 1-min epochs: asleep 00:00-16:00 (any fixed pattern)
    assert sleep_regularity_index(np.tile(day, 3), epoch_seconds=60) == pytest.approx(100.0)


def test_exactly_alternating_days_give_minus_100() -> None:
    # Phillips et al. 2017: no pair agrees, the sum is 0 and SRI = -100
    day = np.r_[np.ones(8 * 120), np.zeros(16 * 120)]  # 30-s epochs
    series = np.concatenate([day, 1 - day, day])
    assert sleep_regularity_index(series, epoch_seconds=30) == pytest.approx(-100.0)


def test_hand_counted_three_days() -> None:
    days = np.array([[1, 1, 0, 0], [1, 0, 0, 0], [1, 0, 0, 1]])
    # counted by hand: day 1 vs 2 agree at i = 0, 2, 3; day 2 vs 3 at i = 0, 1, 2: 6 of M(N-1) = 8 pairs,
    # SRI = -100 + 200 * 6 / 8 = 50 (Phillips et al. 2017)
    assert sleep_regularity_index(days.ravel(), epoch_seconds=SIX_HOURS) == pytest.approx(50.0)
    assert _phillips(days) == pytest.approx(50.0)


def test_invalid_epochs_leave_their_pairs_out() -> None:
    days = np.array([[1, 1, 0, 0], [1, 0, 0, 0], [1, 0, 0, 1]], dtype=float)
    valid = np.ones(days.shape, dtype=bool)
    valid[1, 1] = False  # off-wrist: both pairs through day 2, epoch 1 are left out
    # hand count over the 6 remaining pairs: 1-2 agree at 0, 2, 3; 2-3 agree at 0, 2 -> 5 of 6;
    # SRI = -100 + 200 * 5 / 6 (Phillips et al. 2017, normalised by the valid pairs)
    got = sleep_regularity_index(days.ravel(), epoch_seconds=SIX_HOURS, valid=valid.ravel())
    assert got == pytest.approx(-100 + 200 * 5 / 6)
    # a NaN state counts as invalid as well
    days[1, 1] = np.nan
    assert sleep_regularity_index(days.ravel(), epoch_seconds=SIX_HOURS) == pytest.approx(got)


def test_random_week_matches_the_published_double_sum() -> None:
    rng = np.random.default_rng(3216)
    days = (rng.random((7, 96)) < 0.4).astype(float)  # 15-min epochs
    assert sleep_regularity_index(days.ravel(), epoch_seconds=900) == pytest.approx(_phillips(days))


def test_too_short_or_all_invalid_is_nan_and_bad_values_are_refused() -> None:
    assert math.isnan(sleep_regularity_index(np.ones(4), epoch_seconds=SIX_HOURS))  # one day: no pair
    assert math.isnan(sleep_regularity_index(np.ones(8), epoch_seconds=SIX_HOURS, valid=np.zeros(8, dtype=bool)))
    with pytest.raises(ValueError, match="divide a day"):
        sleep_regularity_index(np.ones(10), epoch_seconds=7)
    with pytest.raises(ValueError, match="1 \\(sleep\\), 0"):
        sleep_regularity_index(np.full(10, 2.0), epoch_seconds=SIX_HOURS)
    with pytest.raises(ValueError, match="valid has 3"):
        sleep_regularity_index(np.ones(10), epoch_seconds=SIX_HOURS, valid=[True] * 3)


def test_mid_sleep_is_halfway_across_midnight() -> None:
    onset = pd.Timestamp("2031-03-02T23:10:00+01:00")
    offset = pd.Timestamp("2031-03-03T06:50:00+01:00")
    assert mid_sleep(onset, offset) == pd.Timestamp("2031-03-03T03:00:00+01:00")  # 23:10 + 7 h 40 min / 2
    with pytest.raises(ValueError, match="before onset"):
        mid_sleep(offset, onset)


def test_clock_mean_and_sd_are_circular_as_in_scipy() -> None:
    times = [pd.Timestamp(t) for t in ("2031-03-02T23:20:00+01:00", "2031-03-04T00:40:00+01:00",
                                       "2031-03-05T01:30:00+01:00", None)]
    hours = np.array([23 + 20 / 60, 40 / 60, 1.5])
    assert clock_mean_h(times) == pytest.approx(stats.circmean(hours, high=24, low=0))
    assert clock_sd_h(times) == pytest.approx(stats.circstd(hours, high=24, low=0))
    assert math.isnan(clock_mean_h([None]))


def test_social_jetlag_across_midnight() -> None:
    # Wittmann et al. 2006: |MSF - MSW|. Work-day mid-sleeps 23:30 and 00:30 average to 00:00 on the clock
    # (an arithmetic mean of 23.5 h and 0.5 h would give 12:00); free days 02:00 and 03:00 -> 02:30
    mids = [pd.Timestamp(t) for t in ("2031-03-02T23:30:00+01:00", "2031-03-04T00:30:00+01:00",
                                      "2031-03-06T02:00:00+01:00", "2031-03-07T03:00:00+01:00")]
    free = [False, False, True, True]
    assert social_jetlag_h(mids, free) == pytest.approx(2.5)
    # the short way round the clock: free 23:00 and work 01:00 are 2 h apart, not 22 h
    two = [pd.Timestamp("2031-03-02T01:00:00+01:00"), pd.Timestamp("2031-03-07T23:00:00+01:00")]
    assert social_jetlag_h(two, [False, True]) == pytest.approx(2.0)


def test_clock_times_are_wall_clock_times_on_a_day_the_clocks_change() -> None:
    # Europe/Berlin moves from 02:00 to 03:00 on 2031-03-30 (EU rule: last Sunday of March, from memory);
    # 04:00 on the wall is 3 h after midnight, but its clock time is 4 h
    spring = pd.Timestamp("2031-03-30 04:00").tz_localize("Europe/Berlin")
    assert (spring - spring.normalize()) == pd.Timedelta(hours=3)
    assert clock_mean_h([spring]) == pytest.approx(4.0)
    plain = pd.Timestamp("2031-03-23 02:00").tz_localize("Europe/Berlin")
    assert social_jetlag_h([plain, spring], [False, True]) == pytest.approx(2.0)


def test_social_jetlag_without_free_days_is_nan() -> None:
    mids = [pd.Timestamp("2031-03-02T03:00:00+01:00"), None]
    assert math.isnan(social_jetlag_h(mids, [False, True]))
    with pytest.raises(ValueError, match="free_day_mask"):
        social_jetlag_h(mids, [False])
