"""Sleep periods: hand-made recordings with known bed, sleep and rise times; anchors; the simulator's truth."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from models import (
    DiaryDay,
    NonwearInterval,
    Recording,
    SleepPeriod,
    find_periods,
    nonwear_mask,
    period_night,
)

TZ = "Europe/Oslo"


def _t(text: str) -> pd.Timestamp:
    return pd.Timestamp(text, tz=TZ)


def _made(seed: int = 3) -> Recording:
    """Three days at 60-s epochs: active days, in bed 23:00-07:00 with 20 min quiet wake at both ends,
    a 40-min nap on 2031-05-06 at 15:00 (after 5 quiet minutes) and a 15-min doze on 2031-05-05 at 16:00."""
    rng = np.random.default_rng(seed)
    start = _t("2031-05-05 12:00")
    times = pd.date_range(start, periods=3 * 1440, freq="60s")
    minute = np.asarray(times.hour * 60 + times.minute)
    day = np.asarray(times.normalize().day)
    counts = rng.poisson(150, times.size).astype(float)
    quiet = ((minute >= 23 * 60) & (minute < 23 * 60 + 20)) | ((minute >= 6 * 60 + 40) & (minute < 7 * 60)) \
        | ((day == 6) & (minute >= 14 * 60 + 55) & (minute < 15 * 60)) \
        | ((day == 6) & (minute >= 15 * 60 + 40) & (minute < 15 * 60 + 43))
    asleep = ((minute >= 23 * 60 + 20) | (minute < 6 * 60 + 40)) | ((day == 6) & (minute >= 15 * 60)
                                                                     & (minute < 15 * 60 + 40)) \
        | ((day == 5) & (minute >= 16 * 60) & (minute < 16 * 60 + 15))
    # per minute: quiet wake moves in half of them, sleep in 6 % (a third and 3 % of 30-s epochs, about)
    counts[quiet] = np.where(rng.random(quiet.sum()) < 0.5, rng.poisson(8, quiet.sum()), 0)
    counts[asleep] = np.where(rng.random(asleep.sum()) < 0.06, rng.poisson(5, asleep.sum()), 0)
    return Recording(participant_id="P-07", start=start, epoch_seconds=60, counts=counts,
                     markers=np.zeros(times.size, dtype=bool), source_name="made.csv")


def _mains(periods: list[SleepPeriod]) -> dict[dt.date, SleepPeriod]:
    return {p.day: p for p in periods if p.kind == "main"}


def _minutes_off(rec: Recording, epoch: int, when: str) -> float:
    return abs(epoch - rec.epoch_at(_t(when))) * rec.epoch_seconds / 60


def test_detection_finds_each_night_and_the_nap_but_not_the_doze() -> None:
    rec = _made()
    periods = find_periods(rec, nonwear=[])
    mains = _mains(periods)
    assert sorted(mains) == [dt.date(2031, 5, 5), dt.date(2031, 5, 6), dt.date(2031, 5, 7)]
    for day, p in mains.items():
        evening, morning = day.isoformat(), (day + dt.timedelta(days=1)).isoformat()
        assert p.source == "detected" and p.conflicts == ()
        assert _minutes_off(rec, p.start_epoch, f"{evening} 23:00") <= 3  # in bed
        assert _minutes_off(rec, p.end_epoch, f"{morning} 07:00") <= 3
        assert _minutes_off(rec, p.onset_epoch, f"{evening} 23:20") <= 10  # sleep, within the 10-min window's reach
        assert _minutes_off(rec, p.offset_epoch, f"{morning} 06:40") <= 10
        assert p.start_epoch <= p.onset_epoch < p.offset_epoch <= p.end_epoch
    naps = [p for p in periods if p.kind == "nap"]
    assert [p.day for p in naps] == [dt.date(2031, 5, 6)]  # the 15-min doze is under the 20-min minimum
    # inside the nap and at least the minimum long (two movements a few minutes apart can delay its onset)
    assert rec.epoch_at(_t("2031-05-06 14:55")) <= naps[0].onset_epoch
    assert naps[0].offset_epoch <= rec.epoch_at(_t("2031-05-06 15:45"))
    assert naps[0].offset_epoch - naps[0].onset_epoch >= 20


def test_diary_confirms_within_tolerance_and_reports_a_far_bed_time() -> None:
    rec = _made()
    detected = _mains(find_periods(rec, nonwear=[]))
    diary = [DiaryDay(dt.date(2031, 5, 5), _t("2031-05-05 23:10"), _t("2031-05-06 07:05")),
             DiaryDay(dt.date(2031, 5, 6), _t("2031-05-06 21:50"), _t("2031-05-07 07:00"))]
    mains = _mains(find_periods(rec, diary=diary, nonwear=[]))
    first = mains[dt.date(2031, 5, 5)]
    assert first.source == "diary" and first.conflicts == ()
    assert first.start_epoch == rec.epoch_at(_t("2031-05-05 23:10"))  # the diary's bed time
    assert first.end_epoch == rec.epoch_at(_t("2031-05-06 07:05"))
    assert first.onset_epoch == detected[dt.date(2031, 5, 5)].onset_epoch
    second = mains[dt.date(2031, 5, 6)]
    gap = detected[dt.date(2031, 5, 6)].start_epoch - rec.epoch_at(_t("2031-05-06 21:50"))
    assert 65 <= gap <= 75
    assert second.conflicts == (f"diary bed time {gap} min from detected rest",)
    assert second.start_epoch == detected[dt.date(2031, 5, 6)].start_epoch  # detection kept for the bed time
    assert mains[dt.date(2031, 5, 7)].source == "detected"  # no diary that day


def test_diary_only_day_and_a_diary_nap_without_sleep() -> None:
    rec = _made()
    counts = rec.counts.copy()
    night = slice(rec.epoch_at(_t("2031-05-06 22:00")), rec.epoch_at(_t("2031-05-07 08:00")))
    counts[night] = np.nan  # the device recorded nothing that night
    gappy = Recording(participant_id="P-07", start=rec.start, epoch_seconds=60, counts=counts, markers=rec.markers)
    diary = [DiaryDay(dt.date(2031, 5, 6), _t("2031-05-06 23:00"), _t("2031-05-07 07:00"),
                      naps=((_t("2031-05-06 18:00"), _t("2031-05-06 18:30")),))]
    mains = _mains(find_periods(gappy, diary=diary, nonwear=[]))
    assert dt.date(2031, 5, 6) not in mains  # no sleep to find inside the diary's interval either
    mains = _mains(find_periods(rec, diary=diary, nonwear=[]))
    assert mains[dt.date(2031, 5, 6)].conflicts == ("diary nap 18:00-18:30 without detected sleep",)


def test_marker_sets_the_bed_time() -> None:
    rec = _made()
    markers = np.zeros(rec.n_epochs, dtype=bool)
    markers[rec.epoch_at(_t("2031-05-07 22:52"))] = True
    marked = Recording(participant_id="P-07", start=rec.start, epoch_seconds=60, counts=rec.counts, markers=markers)
    p = _mains(find_periods(marked, nonwear=[]))[dt.date(2031, 5, 7)]
    assert p.source == "marker" and p.start_epoch == rec.epoch_at(_t("2031-05-07 22:52"))


def test_model_probability_decides_the_sleep_calls() -> None:
    rec = _made()
    p_sleep = np.zeros(rec.n_epochs)
    a, b = rec.epoch_at(_t("2031-05-06 01:00")), rec.epoch_at(_t("2031-05-06 05:00"))
    p_sleep[a:b] = 0.9
    mains = _mains(find_periods(rec, nonwear=[], p_sleep=p_sleep))
    assert list(mains) == [dt.date(2031, 5, 5)]  # the other nights have no sleep by the model
    assert (mains[dt.date(2031, 5, 5)].onset_epoch, mains[dt.date(2031, 5, 5)].offset_epoch) == (a, b)
    with pytest.raises(ValueError):
        find_periods(rec, p_sleep=p_sleep[:-1])


def test_period_night_is_a_view_of_the_rest_interval() -> None:
    rec = _made()
    periods = find_periods(rec, nonwear=[])
    main = _mains(periods)[dt.date(2031, 5, 6)]
    off = [NonwearInterval(main.start_epoch + 10, main.start_epoch + 20, "test")]
    night = period_night(rec, main, nonwear_mask=nonwear_mask(rec.n_epochs, off))
    assert night.n_epochs == main.end_epoch - main.start_epoch
    assert night.start == rec.time_at(main.start_epoch) and night.lights_on == rec.time_at(main.end_epoch)
    assert night.in_bed == (0, night.n_epochs)
    assert np.isnan(night.counts[10:20]).all()
    np.testing.assert_array_equal(night.counts[20:], rec.counts[main.start_epoch + 20: main.end_epoch])
    assert night.label == "P-07-2031-05-06"
    again = period_night(rec, main, nonwear_mask=nonwear_mask(rec.n_epochs, off))
    assert again.night_id == night.night_id
    other = period_night(rec, _mains(periods)[dt.date(2031, 5, 5)])
    assert other.night_id != night.night_id


def test_simulated_onset_and_offset_near_the_truth() -> None:
    from models.simulation.recordings import RecordingSpec, simulate_recordings

    errors = []
    for sim in simulate_recordings(RecordingSpec(n_participants=2, n_days=14), seed=5):
        mains = _mains(find_periods(sim.recording, diary=sim.diary))
        for day in sim.days:
            if day.observable:
                p = mains[day.date]
                errors += [abs(p.onset_epoch - day.onset_epoch) / 2, abs(p.offset_epoch - day.offset_epoch) / 2]
    assert np.median(errors) <= 10.0  # minutes, the goal against the simulator's ground truth


def test_epoch_length_adaptation_on_simulated_recordings() -> None:
    from models import recording_to_epoch
    from models.simulation.recordings import RecordingSpec, simulate_recordings

    (sim,) = simulate_recordings(RecordingSpec(n_participants=1, n_days=10, offwrist_rate=0.0), seed=8)
    rec = sim.recording
    truth = [d for d in sim.days if d.observable]
    # 60 s: summed pairs (the same movement seen in minutes); errors in minutes against the truth
    minute = recording_to_epoch(rec, 60)
    mains = _mains(find_periods(minute, nonwear=[]))
    errors = [abs(mains[d.date].onset_epoch - d.onset_epoch / 2) for d in truth] + \
             [abs(mains[d.date].offset_epoch - d.offset_epoch / 2) for d in truth]
    assert np.median(errors) <= 10.0
    # 15 s: each 30-s count put in the first half; summing back gives the recording itself
    halves = np.zeros(2 * rec.n_epochs)
    halves[::2] = rec.counts
    quarter = Recording(participant_id="P", start=rec.start, epoch_seconds=15, counts=halves,
                        markers=np.repeat(rec.markers, 2))
    assert recording_to_epoch(quarter, 30).content_hash() == rec.content_hash()
    fine = _mains(find_periods(quarter, nonwear=[]))
    coarse = _mains(find_periods(rec, nonwear=[]))
    assert sorted(fine) == sorted(coarse)
    for day, p in coarse.items():  # the same times, up to one 30-s epoch of window centring
        assert abs(fine[day].onset_epoch - 2 * p.onset_epoch) <= 2
        assert abs(fine[day].offset_epoch - 2 * p.offset_epoch) <= 2


def test_a_device_with_a_noise_floor_gives_the_same_periods() -> None:
    rec = _made()
    rng = np.random.default_rng(4)
    noisy = Recording(participant_id="P-07", start=rec.start, epoch_seconds=60, markers=rec.markers,
                      counts=rec.counts + rng.integers(1, 4, rec.n_epochs))  # never zero: 1-3 counts of noise
    mains = _mains(find_periods(noisy, nonwear=[]))
    assert sorted(mains) == [dt.date(2031, 5, 5), dt.date(2031, 5, 6), dt.date(2031, 5, 7)]
    for day, p in mains.items():  # the made times, as without the noise
        evening, morning = day.isoformat(), (day + dt.timedelta(days=1)).isoformat()
        assert _minutes_off(rec, p.onset_epoch, f"{evening} 23:20") <= 10
        assert _minutes_off(rec, p.offset_epoch, f"{morning} 06:40") <= 10


def test_hard_simulated_variants_onset_apart_from_bed_time() -> None:
    from models.simulation.recordings import RecordingSpec, simulate_recordings

    spec = RecordingSpec(n_participants=2, n_days=14, bed_wake_minutes=(10.0, 60.0), morning_still_minutes=(5.0, 30.0),
                         gradual_minutes=45.0, noise_floor_rate=1.0, noise_offset_rate=0.5, diary_shift_rate=0.3)
    errors: dict[bool, list[float]] = {False: [], True: []}
    bed_errors: dict[bool, list[float]] = {False: [], True: []}
    latency: list[float] = []
    for sim in simulate_recordings(spec, seed=31):
        for with_diary in (False, True):
            mains = _mains(find_periods(sim.recording, diary=sim.diary if with_diary else None))
            for day in sim.days:
                if day.observable:
                    p = mains[day.date]
                    errors[with_diary] += [abs(p.onset_epoch - day.onset_epoch) / 2,
                                           abs(p.offset_epoch - day.offset_epoch) / 2]
                    bed_errors[with_diary].append(abs(p.start_epoch - day.bed_epoch) / 2)
                    latency.append((p.onset_epoch - p.start_epoch) / 2)
    assert np.median(errors[True]) <= 10.0 and np.median(errors[False]) <= 15.0  # minutes, the goals
    assert np.median(latency) >= 10  # quiet wake in bed: sleep onset well after the rest start
    assert np.mean(bed_errors[True]) < np.mean(bed_errors[False])  # the diary's bed time helps the rest start


def test_diary_bed_time_bounds_the_onset_search() -> None:
    from models import PeriodConfig

    rec = _made()
    day = dt.date(2031, 5, 5)
    base = _mains(find_periods(rec, nonwear=[]))[day]
    # a diary bed time (23:45) after the detected sleep onset, within a 60-min tolerance of the detected rest
    # start: with no slack, sleep onset is the first persistent sleep after the bed time written down
    diary = [DiaryDay(date=day, bed_time=_t("2031-05-05 23:45"), rise_time=_t("2031-05-06 07:00"))]
    config = PeriodConfig(diary_slack_minutes=0.0, diary_tolerance_minutes=60.0)
    p = _mains(find_periods(rec, nonwear=[], diary=diary, config=config))[day]
    assert p.source == "diary" and p.start_epoch == rec.epoch_at(_t("2031-05-05 23:45"))
    assert p.onset_epoch >= p.start_epoch > base.onset_epoch


@pytest.mark.parametrize(("pattern", "taken"), [([200.0, 200.0, 200.0, 0.0, 0.0, 0.0], True), ([200.0] * 6, False)])
def test_diary_bed_time_before_detected_rest_across_quiet_wake(pattern: list[float], taken: bool) -> None:
    rec = _made()
    a, b = rec.epoch_at(_t("2031-05-05 22:10")), rec.epoch_at(_t("2031-05-05 23:00"))
    counts = rec.counts.copy()
    counts[a:b] = np.resize(pattern, b - a)  # half the minutes move (in bed, awake) or all (sitting up)
    made = Recording(participant_id="P", start=rec.start, epoch_seconds=60, counts=counts, markers=rec.markers)
    day = dt.date(2031, 5, 5)
    detected = _mains(find_periods(made, nonwear=[]))[day]
    assert detected.start_epoch >= b - 10  # the rolling median stays high over the 3-in-6 pattern (its edge aside)
    assert detected.start_epoch - rec.epoch_at(_t("2031-05-05 22:15")) > 30  # beyond the diary tolerance
    diary = [DiaryDay(date=day, bed_time=_t("2031-05-05 22:15"), rise_time=_t("2031-05-06 07:00"))]
    p = _mains(find_periods(made, nonwear=[], diary=diary))[day]
    assert (p.start_epoch == rec.epoch_at(_t("2031-05-05 22:15"))) is taken
    assert any("diary bed time" in c for c in p.conflicts) is not taken
