"""Simulated continuous recordings: determinism, consistency of the ground truth, diaries and PSG nights."""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
import pandas as pd
import pytest

from models import read_diary, read_recording, recording_to_json
from models.simulation import CohortSpec, simulate_cohort
from models.simulation.recordings import RecordingSpec, SimulatedRecording, simulate_recordings

SPEC = RecordingSpec(n_participants=2, n_days=14)


@pytest.fixture(scope="module")
def sims() -> list[SimulatedRecording]:
    return simulate_recordings(SPEC, seed=321)


def test_same_seed_same_recordings_other_seed_other(sims: list[SimulatedRecording]) -> None:
    again = simulate_recordings(SPEC, seed=321)
    for a, b in zip(sims, again, strict=True):
        assert a.recording.content_hash() == b.recording.content_hash()
        assert a.diary_csv == b.diary_csv and a.days == b.days and a.nonwear == b.nonwear
        assert [p.to_json() for p in a.psg] == [p.to_json() for p in b.psg]
    other = simulate_recordings(SPEC, seed=322)
    assert other[0].recording.content_hash() != sims[0].recording.content_hash()


def test_night_cohorts_are_unchanged_by_recording_simulation() -> None:
    before = [s.night.content_hash for s in simulate_cohort(CohortSpec(n_participants=3), seed=5)]
    simulate_recordings(SPEC, seed=1)
    after = [s.night.content_hash for s in simulate_cohort(CohortSpec(n_participants=3), seed=5)]
    assert before == after


def test_recording_spans_the_days_and_reads_back(sims: list[SimulatedRecording]) -> None:
    rec = sims[0].recording
    assert rec.source_name.startswith("simulated-")
    assert rec.start == pd.Timestamp("2031-05-05 12:00", tz="Europe/Oslo")
    assert rec.end == pd.Timestamp("2031-05-19 12:00", tz="Europe/Oslo")
    assert read_recording(json.dumps(recording_to_json(rec)).encode(), fmt="json").content_hash() == rec.content_hash()


def test_ground_truth_is_consistent(sims: list[SimulatedRecording]) -> None:
    for sim in sims:
        rec = sim.recording
        assert [d.date for d in sim.days] == [dt.date(2031, 5, 5) + dt.timedelta(days=k) for k in range(14)]
        for day in sim.days:
            assert day.bed_epoch <= day.onset_epoch < day.offset_epoch <= day.rise_epoch
            hours = (rec.time_at(day.bed_epoch) - pd.Timestamp(day.date.isoformat(), tz="Europe/Oslo")).total_seconds()
            assert 20 * 3600 <= hours <= 28 * 3600  # bed in the evening or after midnight
            assert sim.sleep[day.onset_epoch] or not day.observable or any(
                a <= day.onset_epoch < b for a, b, _ in sim.nonwear)
            for a, b in day.naps:
                assert sim.sleep[a:b].mean() > 0.5 or any(x < b and a < y for x, y, _ in sim.nonwear)
        for a, b, kind in sim.nonwear:
            assert (rec.counts[a:b] == 0).all() and not sim.sleep[a:b].any() and not rec.markers[a:b].any()
            assert kind in ("day", "evening", "morning", "night", "short")
        assert rec.markers.any()
        free = [d.free_day for d in sim.days]
        assert free == [(d.date + dt.timedelta(days=1)).weekday() >= 5 for d in sim.days]


def test_diary_has_blanks_errors_and_reads_like_the_truth(sims: list[SimulatedRecording]) -> None:
    sim = sims[0]
    assert read_diary(sim.diary_csv.encode(), tz="Europe/Oslo") == sim.diary
    truth = {d.date: d for d in sim.days}
    errors = [abs((entry.bed_time - sim.recording.time_at(truth[entry.date].bed_epoch)).total_seconds()) / 60
              for entry in sim.diary if entry.bed_time is not None]
    assert len(errors) < len(sim.diary) or SPEC.diary_blank_rate == 0
    assert np.median(errors) <= 15  # small errors for most days, rounded to 5 min


def test_psg_nights_are_the_true_stages_on_an_offset_clock(sims: list[SimulatedRecording]) -> None:
    for sim in sims:
        assert len(sim.psg) == SPEC.psg_nights
        for psg in sim.psg:
            day = next(d for d in sim.days if d.date == psg.date)
            assert psg.true_start == sim.recording.time_at(day.bed_epoch)
            assert (psg.true_start - psg.start).total_seconds() == pytest.approx(psg.clock_offset_s)
            assert 20 <= abs(psg.clock_offset_s) <= 240
            assert psg.stages.size == day.rise_epoch - day.bed_epoch
            asleep = psg.stages != "W"
            np.testing.assert_array_equal(asleep, sim.sleep[day.bed_epoch: day.rise_epoch])
            body = psg.to_json()
            assert body["epoch_seconds"] == 30 and len(body["stages"]) == psg.stages.size
