"""Non-wear: the Choi et al. 2011 zero-count rule on constructed counts, and the wrist context."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from models import (
    NonwearConfig,
    NonwearInterval,
    Recording,
    choi_candidates,
    detect_nonwear,
    nonwear_mask,
)

# Choi L, Liu Z, Matthews CE, Buchowski MS. Validation of accelerometer wear and nonwear time
# classification algorithm. Med Sci Sports Exerc 2011;43(2):357-364 (definition from memory):
# per-minute counts; non-wear = at least 90 consecutive minutes of zero counts, allowing
# interruptions of up to 2 min of non-zero counts when the 30 min before and after are zero.


def _minutes(*parts: tuple[int, float]) -> np.ndarray:
    """A per-minute series from (length_min, value) parts."""
    return np.concatenate([np.full(n, float(v)) for n, v in parts])


def test_ninety_zero_minutes_are_a_period_eighty_nine_are_not() -> None:
    assert choi_candidates(_minutes((10, 50), (90, 0), (10, 50)), 60) == [(10, 100)]
    assert choi_candidates(_minutes((10, 50), (89, 0), (10, 50)), 60) == []


def test_two_minute_interruption_inside_thirty_zero_minutes_is_allowed() -> None:
    series = _minutes((5, 80), (50, 0), (2, 40), (50, 0), (5, 80))
    assert choi_candidates(series, 60) == [(5, 107)]  # 102 min including the interruption


def test_three_minute_interruption_splits_the_run() -> None:
    series = _minutes((5, 80), (50, 0), (3, 40), (50, 0), (5, 80))
    assert choi_candidates(series, 60) == []  # 50 + 50 min, neither reaches 90


def test_interruption_needs_thirty_zero_minutes_on_both_sides() -> None:
    # 29 zero minutes before the spike: not allowed, and the 80 after are too short alone
    assert choi_candidates(_minutes((5, 80), (29, 0), (1, 9), (80, 0), (5, 80)), 60) == []
    # 30 before and 60 after: allowed (30 + 1 + 60 = 91 min)
    assert choi_candidates(_minutes((5, 80), (30, 0), (1, 9), (60, 0), (5, 80)), 60) == [(5, 96)]
    # 30 after is needed too: 65 zero, spike, 29 zero -> the 65 alone is too short
    assert choi_candidates(_minutes((5, 80), (65, 0), (1, 9), (29, 0), (5, 80)), 60) == []


def test_shorter_epochs_give_the_same_period_in_time() -> None:
    series = _minutes((5, 80), (50, 0), (2, 40), (50, 0), (5, 80))
    for epoch_seconds in (15, 30):
        k = 60 // epoch_seconds
        epochs = np.repeat(series, k) / k  # each minute's counts spread over its epochs
        found = choi_candidates(epochs, epoch_seconds)
        assert [(a / k, b / k) for a, b in found] == [(5, 107)]


def test_missing_epochs_count_as_zero() -> None:
    series = _minutes((10, 50), (45, 0), (45, np.nan), (10, 50))
    assert choi_candidates(series, 60) == [(10, 100)]


# ---- wrist context ---------------------------------------------------------------------------

def _recording(days: int = 3, epoch_seconds: int = 60, seed: int = 1) -> tuple[Recording, np.ndarray]:
    """Days of activity (Poisson 150 per minute) and nights 23:00-07:00 of sparse small movement (5 %)."""
    rng = np.random.default_rng(seed)
    start = pd.Timestamp("2031-05-05 12:00", tz="Europe/Oslo")
    n = days * 86400 // epoch_seconds
    times = pd.date_range(start, periods=n, freq=f"{epoch_seconds}s")
    night = np.asarray((times.hour >= 23) | (times.hour < 7))
    counts = np.where(night, np.where(rng.random(n) < 0.05, rng.poisson(6, n), 0), rng.poisson(150, n))
    return Recording(participant_id="P", start=start, epoch_seconds=epoch_seconds, counts=counts.astype(float),
                     markers=np.zeros(n, dtype=bool)), night


def _at(rec: Recording, when: str) -> int:
    return rec.epoch_at(pd.Timestamp(when, tz="Europe/Oslo"))


def _with(rec: Recording, a: int, b: int, values: np.ndarray) -> Recording:
    counts = rec.counts.copy()
    counts[a:b] = values
    return Recording(participant_id=rec.participant_id, start=rec.start, epoch_seconds=rec.epoch_seconds,
                     counts=counts, markers=rec.markers)


def _overlapping(intervals: list[NonwearInterval], a: int, b: int) -> list[NonwearInterval]:
    return [iv for iv in intervals if iv.start_epoch < b and a < iv.end_epoch]


def test_still_sleep_stretch_with_sparse_small_counts_is_not_nonwear() -> None:
    rec, _ = _recording()
    a, b = _at(rec, "2031-05-06 01:00"), _at(rec, "2031-05-06 02:40")  # 100 min
    still = np.zeros(b - a)
    still[[33, 67]] = 4.0  # two single small movements, 33 min apart (Choi lets them through)
    rec = _with(rec, a, b, still)
    rec = _with(rec, a - 31, a, np.zeros(31))  # zero minutes run up to it, as still sleep does
    assert any(x <= a and b <= y for x, y in choi_candidates(rec.counts, 60))  # Choi alone calls it non-wear
    assert _overlapping(detect_nonwear(rec), a, b) == []


def test_three_hour_daytime_zero_run_is_nonwear() -> None:
    rec, _ = _recording()
    a, b = _at(rec, "2031-05-06 13:00"), _at(rec, "2031-05-06 16:00")
    found = _overlapping(detect_nonwear(_with(rec, a, b, np.zeros(b - a))), a, b)
    assert [(iv.start_epoch, iv.end_epoch) for iv in found] == [(a, b)]
    assert "out of rest" in found[0].reason and "between active stretches" in found[0].reason


def test_night_removal_between_active_stretches_is_nonwear_and_needs_both() -> None:
    rec, _ = _recording()
    a, b = _at(rec, "2031-05-06 02:00"), _at(rec, "2031-05-06 04:30")  # 150 min, inside the rest hours
    awake = np.full(10, 180.0)
    removed = _with(_with(_with(rec, a, b, np.zeros(b - a)), a - 10, a, awake), b, b + 10, awake)
    found = _overlapping(detect_nonwear(removed), a, b)
    assert [(iv.start_epoch, iv.end_epoch) for iv in found] == [(a, b)] and "at rest" in found[0].reason
    one_side = _with(_with(rec, a, b, np.zeros(b - a)), a - 10, a, awake)  # woke, but slept on after
    assert _overlapping(detect_nonwear(one_side), a, b) == []
    longer = _with(rec, a - 60, b + 60, np.zeros(b - a + 120))  # 270 min: beyond still sleep
    assert len(_overlapping(detect_nonwear(longer), a, b)) == 1


def test_given_rest_intervals_demand_more_evidence() -> None:
    rec, _ = _recording()
    a, b = _at(rec, "2031-05-06 13:00"), _at(rec, "2031-05-06 15:00")
    zeros = _with(rec, a, b, np.zeros(b - a))
    zeros = _with(zeros, b, b + 10, np.where(np.arange(10) % 3 == 0, 5.0, 0.0))  # drifting off to sleep after
    assert len(_overlapping(detect_nonwear(zeros), a, b)) == 1  # by day one awake side is enough
    assert _overlapping(detect_nonwear(zeros, rest=[(a - 30, b + 120)]), a, b) == []


@pytest.mark.parametrize("long_minutes", [120.0, 240.0])
def test_long_threshold_is_a_setting(long_minutes: float) -> None:
    rec, _ = _recording()
    a, b = _at(rec, "2031-05-06 01:00"), _at(rec, "2031-05-06 04:00")  # 180 min of zeros in the night
    found = _overlapping(detect_nonwear(_with(rec, a, b, np.zeros(b - a)),
                                        config=NonwearConfig(long_minutes=long_minutes)), a, b)
    assert len(found) == (1 if long_minutes <= 180 else 0)


def test_mask_marks_exactly_the_intervals() -> None:
    mask = nonwear_mask(10, [NonwearInterval(2, 4, "x"), NonwearInterval(7, 12, "y")])
    assert np.flatnonzero(mask).tolist() == [2, 3, 7, 8, 9]


def test_simulated_offwrist_found_and_sleep_left_alone() -> None:
    from models.simulation.recordings import RecordingSpec, simulate_recordings

    sims = simulate_recordings(RecordingSpec(n_participants=3, n_days=14, offwrist_rate=0.4), seed=11)
    long_total = long_found = sleep_total = sleep_flagged = 0
    for sim in sims:
        mask = nonwear_mask(sim.recording.n_epochs, detect_nonwear(sim.recording))
        for a, b, _ in sim.nonwear:
            if b - a >= 180:  # the Choi rule's 90 min at 30-s epochs
                long_total += b - a
                long_found += int(mask[a:b].sum())
        sleep_total += int(sim.sleep.sum())
        sleep_flagged += int((sim.sleep & mask).sum())
    assert long_total > 0
    assert long_found / long_total >= 0.95  # recall goal on the simulator's ground truth
    assert sleep_flagged / sleep_total <= 0.01


# ---- devices with a noise floor (our design: the floor read from the recording's own counts) -------------

def _floored(rec: Recording, offset: float, seed: int = 2) -> Recording:
    """The same recording on a device adding 1-3 counts of noise to every epoch, plus a constant offset."""
    rng = np.random.default_rng(seed)
    return Recording(participant_id="P", start=rec.start, epoch_seconds=rec.epoch_seconds, markers=rec.markers,
                     counts=rec.counts + rng.integers(1, 4, rec.n_epochs) + offset)


@pytest.mark.parametrize(("offset", "top"), [(0.0, 3.0), (5.0, 8.0)])
def test_floor_level_is_the_top_of_the_noise(offset: float, top: float) -> None:
    from models.recordings._runs import floor_level

    rec, _ = _recording()
    # by hand from the definition: the most frequent whole count is in 1-3 (+ offset), and each value up to 3
    # (+ offset) is about as frequent; the activity's Poisson(150) counts lie far above
    assert floor_level(_floored(rec, offset).counts) == top
    assert floor_level(rec.counts) == 0.0  # a third of the epochs are exactly zero: no floor


@pytest.mark.parametrize("offset", [0.0, 5.0])
def test_offwrist_on_a_noise_floor_device(offset: float) -> None:
    rec, _ = _recording()
    a, b = _at(rec, "2031-05-06 13:00"), _at(rec, "2031-05-06 16:00")  # 3 h off the wrist by day
    c, d = _at(rec, "2031-05-07 02:00"), _at(rec, "2031-05-07 04:30")  # 150 min taken off in the night
    off = _with(_with(rec, a, b, np.zeros(b - a)), c, d, np.zeros(d - c))
    off = _with(_with(off, c - 10, c, np.full(10, 180.0)), d, d + 10, np.full(10, 180.0))
    noisy = _floored(off, offset)
    assert choi_candidates(noisy.counts, 60) == []  # Choi's rule alone needs exact zeros
    found = detect_nonwear(noisy)
    assert [(iv.start_epoch, iv.end_epoch) for iv in _overlapping(found, a, b)] == [(a, b)]
    assert [(iv.start_epoch, iv.end_epoch) for iv in _overlapping(found, c, d)] == [(c, d)]
    assert "device's floor" in found[0].reason
    night = nonwear_mask(noisy.n_epochs, found) & _recording()[1]
    assert night.sum() == d - c  # still sleep on the floor with its sparse twitches is left alone


def test_simulated_noise_floor_devices_offwrist_found_and_sleep_left_alone() -> None:
    from models.simulation.recordings import RecordingSpec, simulate_recordings

    spec = RecordingSpec(n_participants=3, n_days=14, offwrist_rate=0.4, noise_floor_rate=1.0, noise_offset_rate=0.5,
                         bed_offwrist_rate=0.15, bed_wake_minutes=(10.0, 60.0))
    long_total = long_found = sleep_total = sleep_flagged = 0
    for sim in simulate_recordings(spec, seed=12):
        assert sim.recording.counts.min() >= 1
        mask = nonwear_mask(sim.recording.n_epochs, detect_nonwear(sim.recording))
        for a, b, _ in sim.nonwear:
            if b - a >= 180:
                long_total += b - a
                long_found += int(mask[a:b].sum())
        sleep_total += int(sim.sleep.sum())
        sleep_flagged += int((sim.sleep & mask).sum())
    assert long_total > 0
    assert long_found / long_total >= 0.95  # recall goal on the simulator's ground truth
    assert sleep_flagged / sleep_total <= 0.01
