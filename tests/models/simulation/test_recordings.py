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
#: content hashes (first 16 hex digits) of SPEC's recordings at seed 321, recorded at commit f62b7ef
BEFORE_VARIANTS = ["0d61ec3ce226f6a6", "afb07714f398ce48"]


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
            assert kind in ("day", "evening", "morning", "night", "short")  # no "bed" by default
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


# ---- harder variants ---------------------------------------------------------------------------

HARD = RecordingSpec(n_participants=2, n_days=14, bed_wake_minutes=(10.0, 60.0), morning_still_minutes=(5.0, 30.0),
                     gradual_minutes=45.0, late_night_rate=0.2, noise_floor_rate=1.0, noise_offset_rate=0.5,
                     bed_offwrist_rate=0.2, diary_shift_rate=0.5)


@pytest.fixture(scope="module")
def hard() -> list[SimulatedRecording]:
    return simulate_recordings(HARD, seed=321)


def test_default_output_is_the_output_from_before_the_variants(sims: list[SimulatedRecording]) -> None:
    # regression fixture: content hashes of SPEC at seed 321, recorded with the simulator as it was before
    # the harder variants existed (demo data elsewhere are written with the defaults and must not move)
    assert [s.recording.content_hash()[:16] for s in sims] == BEFORE_VARIANTS


def test_variants_draw_from_their_own_stream(sims: list[SimulatedRecording]) -> None:
    from dataclasses import replace

    shifted = simulate_recordings(replace(SPEC, diary_shift_rate=1.0), seed=321)
    for a, b in zip(sims, shifted, strict=True):  # only the diary changes: the counts and truth are untouched
        assert a.recording.content_hash() == b.recording.content_hash() and a.days == b.days
        assert a.diary_csv != b.diary_csv
        truth = {d.date: d for d in b.days}
        errors = [abs((e.bed_time - b.recording.time_at(truth[e.date].bed_epoch)).total_seconds()) / 60
                  for e in b.diary if e.bed_time is not None]
        assert np.median(errors) >= 15  # every time carries an extra 15-45 min


def test_hard_variants_truth(hard: list[SimulatedRecording]) -> None:
    kinds: set[str] = set()
    late = 0
    for sim in hard:
        rec = sim.recording
        assert rec.counts.min() >= 1  # a noise floor: never exactly zero
        for day in sim.days:
            assert day.bed_epoch <= day.onset_epoch < day.offset_epoch <= day.rise_epoch
            assert day.onset_epoch - day.bed_epoch >= 10 * 2  # at least 10 min of quiet wake in bed
            assert day.rise_epoch - day.offset_epoch >= 5 * 2  # at least 5 min awake before rising
            wake_in_bed = rec.counts[day.bed_epoch: day.onset_epoch]
            moving = wake_in_bed > rec.counts.min() + HARD.noise_floor_counts  # above the floor's noise
            assert 0.05 <= moving.mean() <= 0.7  # low but not still: reading, a phone
            local = rec.time_at(day.bed_epoch)
            late += 2 <= local.hour < 6
            assert rec.time_at(day.rise_epoch).hour < 12
        for a, b, kind in sim.nonwear:
            kinds.add(kind)
            assert np.ptp(rec.counts[a:b]) <= HARD.noise_floor_counts  # only the floor's noise off the wrist
            assert not sim.sleep[a:b].any()
            if kind == "bed":
                day = next(d for d in sim.days if d.bed_epoch <= a < d.rise_epoch)
                assert not day.observable and b <= day.rise_epoch + 10 * 2
    assert "bed" in kinds and late >= 1
    for sim in hard:  # PSG covers the whole time in bed, the quiet and still wake as W
        for psg in sim.psg:
            day = next(d for d in sim.days if d.date == psg.date)
            assert psg.stages.size == day.rise_epoch - day.bed_epoch
            np.testing.assert_array_equal(psg.stages != "W", sim.sleep[day.bed_epoch: day.rise_epoch])
