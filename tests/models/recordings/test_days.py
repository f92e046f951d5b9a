"""Per-day rows, the sleep state for the regularity index and the recording summary."""

from __future__ import annotations

import datetime as dt
import statistics

import numpy as np
import pandas as pd
import pytest

from models import (
    NonwearInterval,
    Recording,
    SleepPeriod,
    day_rows,
    recording_summary,
    sleep_state,
)

TZ = "Europe/Oslo"


def _rec(days: int = 3) -> Recording:
    n = days * 1440
    return Recording(participant_id="P", start=pd.Timestamp("2031-05-05 12:00", tz=TZ), epoch_seconds=60,
                     counts=np.ones(n), markers=np.zeros(n, dtype=bool))


def _epoch(rec: Recording, when: str) -> int:
    return rec.epoch_at(pd.Timestamp(when, tz=TZ))


def _main(rec: Recording, day: str, bed: str, onset: str, offset: str, rise: str, source: str = "detected",
          conflicts: tuple[str, ...] = ()) -> SleepPeriod:
    return SleepPeriod("main", dt.date.fromisoformat(day), _epoch(rec, bed), _epoch(rec, rise), _epoch(rec, onset),
                       _epoch(rec, offset), source, conflicts)


def _periods(rec: Recording) -> list[SleepPeriod]:
    nap_a, nap_b = _epoch(rec, "2031-05-06 15:00"), _epoch(rec, "2031-05-06 15:45")
    return [
        _main(rec, "2031-05-05", "2031-05-05 23:00", "2031-05-05 23:20", "2031-05-06 06:40", "2031-05-06 07:00"),
        SleepPeriod("nap", dt.date(2031, 5, 6), nap_a, nap_b, nap_a, nap_b, "diary"),
        _main(rec, "2031-05-06", "2031-05-07 00:30", "2031-05-07 00:40", "2031-05-07 08:20", "2031-05-07 08:30",
              "diary", ("diary rise time 45 min from detected rest",)),
    ]


def test_rows_cover_every_day_with_times_naps_and_nonwear() -> None:
    rec = _rec()
    off = [NonwearInterval(_epoch(rec, "2031-05-07 13:00"), _epoch(rec, "2031-05-07 15:30"), "test")]
    rows = day_rows(rec, _periods(rec), nonwear=off)
    assert [r.date for r in rows] == [dt.date(2031, 5, 5), dt.date(2031, 5, 6), dt.date(2031, 5, 7)]
    first, second, third = rows
    assert first.bed_time == pd.Timestamp("2031-05-05 23:00", tz=TZ)
    assert first.sleep_onset == pd.Timestamp("2031-05-05 23:20", tz=TZ)
    assert first.mid_sleep == pd.Timestamp("2031-05-06 03:00", tz=TZ)  # halfway between 23:20 and 06:40
    assert (second.naps, second.nap_min, second.source) == (1, 45.0, "diary")
    assert second.conflicts == ("diary rise time 45 min from detected rest",)
    assert (third.source, third.bed_time, third.mid_sleep) == ("none", None, None)
    assert third.nonwear_min == 150.0 and first.nonwear_min == 0.0
    assert [r.covered_min for r in rows] == [1440.0, 1440.0, 1440.0]
    as_dict = second.to_dict()
    assert as_dict["date"] == "2031-05-06" and as_dict["mid_sleep"] == "2031-05-07T04:30:00+02:00"


def test_summary_means_and_sds_match_the_standard_library() -> None:
    rec = _rec()
    rows = day_rows(rec, _periods(rec))
    params = {dt.date(2031, 5, 5): {"tst_min": 401.0, "sol_min": 20.0},
              dt.date(2031, 5, 6): {"tst_min": 455.0, "sol_min": 9.5, "waso_min": 12.0}}
    summary = recording_summary(rows, night_parameters=params, sri=71.5, social_jetlag_h=1.5)
    # check values from Python's statistics module (sample SD, n - 1)
    assert summary.parameters["tst_min"]["mean"] == pytest.approx(statistics.mean([401.0, 455.0]))
    assert summary.parameters["tst_min"]["sd"] == pytest.approx(statistics.stdev([401.0, 455.0]))
    assert summary.parameters["waso_min"]["n"] == 1 and np.isnan(summary.parameters["waso_min"]["sd"])
    # mid-sleeps 03:00 and 04:30: mean 03:45, SD of 180 and 270 minutes after midnight
    assert summary.mid_sleep_h == pytest.approx(3.75)
    assert summary.mid_sleep_sd_min == pytest.approx(statistics.stdev([180.0, 270.0]))
    assert (summary.n_days, summary.n_main_periods, summary.n_naps) == (3, 2, 1)
    assert summary.nap_min_per_day == pytest.approx(15.0)
    assert (summary.sri, summary.social_jetlag_h, summary.n_conflicts) == (71.5, 1.5, 1)
    assert summary.wear_pct == 100.0
    assert set(summary.to_dict()) >= {"parameters", "mid_sleep_h", "sri"}


def test_mid_sleep_before_and_after_midnight_averages_without_wrapping() -> None:
    rec = _rec()
    periods = [_main(rec, "2031-05-05", "2031-05-05 21:00", "2031-05-05 21:00", "2031-05-06 02:00",
                     "2031-05-06 02:00"),  # mid-sleep 23:30
               _main(rec, "2031-05-06", "2031-05-06 22:00", "2031-05-06 22:00", "2031-05-07 03:00",
                     "2031-05-07 03:00")]  # mid-sleep 00:30
    summary = recording_summary(day_rows(rec, periods))
    assert summary.mid_sleep_h == pytest.approx(0.0)  # 23:30 and 00:30 average to midnight, not noon
    assert summary.mid_sleep_sd_min == pytest.approx(statistics.stdev([-30.0, 30.0]))


def test_sleep_state_marks_periods_and_leaves_out_offwrist() -> None:
    rec = _rec()
    periods = _periods(rec)
    off = [NonwearInterval(100, 160, "test")]
    state, valid = sleep_state(rec, periods, nonwear=off)
    expected = np.zeros(rec.n_epochs)
    for p in periods:
        expected[p.onset_epoch: p.offset_epoch] = 1.0
    np.testing.assert_array_equal(state, expected)
    assert not valid[100:160].any() and valid[:100].all() and valid[160:].all()
    calls = np.ones(rec.n_epochs)
    calls[periods[0].onset_epoch + 30: periods[0].onset_epoch + 40] = 0.0  # an awakening
    scored, _ = sleep_state(rec, periods, epoch_sleep=calls)
    assert scored.sum() == expected.sum() - 10
