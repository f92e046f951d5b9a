"""Night model: stage vocabularies, sleep/wake mapping, derived values, hashing."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from factories import make_night

from models import Night, canonical_stage, stages_to_sleep


# AASM scoring manual (Iber et al. 2007): W is wake; N1, N2, N3 and R are sleep stages.
@pytest.mark.parametrize("code,expected", [("W", 0.0), ("N1", 1.0), ("N2", 1.0), ("N3", 1.0), ("R", 1.0)])
def test_stages_to_sleep_aasm(code: str, expected: float) -> None:
    assert stages_to_sleep(np.array([canonical_stage(code)]))[0] == expected


# Rechtschaffen & Kales (1968): W wake; S1-S4 and REM sleep; MT movement time (a setting).
@pytest.mark.parametrize("code,expected", [("W", 0.0), ("S1", 1.0), ("S2", 1.0), ("S3", 1.0), ("S4", 1.0),
                                           ("REM", 1.0)])
def test_stages_to_sleep_rk(code: str, expected: float) -> None:
    assert stages_to_sleep(np.array([canonical_stage(code)]))[0] == expected


def test_movement_time_policy() -> None:
    # MT handling is a documented setting (published-methods notes §3: wake, exclude or sleep).
    mt = np.array(["MT"])
    assert stages_to_sleep(mt)[0] == 0.0  # default: wake
    assert stages_to_sleep(mt, movement_time="sleep")[0] == 1.0
    assert np.isnan(stages_to_sleep(mt, movement_time="exclude")[0])


@pytest.mark.parametrize("raw,canon", [("w", "W"), (" n2 ", "N2"), ("rem", "REM"), (1, "1"), (0.0, "0"), ("s", "S"),
                                       ("?", "?"), ("U", "?"), ("-", "?"), ("", "?"), (None, "?")])
def test_canonical_stage_case_and_unscored(raw, canon) -> None:
    assert canonical_stage(raw) == canon


@pytest.mark.parametrize("raw", ["N4", "X", 2, True, "stage 2"])
def test_canonical_stage_unknown(raw) -> None:
    assert canonical_stage(raw) is None


def test_binary_and_unscored_mapping() -> None:
    out = stages_to_sleep(np.array(["S", "W", "1", "0", "?"]))
    assert out[:4].tolist() == [1.0, 0.0, 1.0, 0.0] and np.isnan(out[4])


def test_derived_values() -> None:
    night = make_night(240)
    assert night.n_epochs == 240
    assert night.end - night.start == pd.Timedelta(hours=2)
    assert night.duration_hours == 2.0
    assert night.in_bed == (0, 240)


def test_in_bed_epochs_from_lights() -> None:
    base = make_night(240)
    night = Night(participant_id="P", start=base.start, epoch_seconds=30, counts=base.counts,
                  lights_off=base.start + pd.Timedelta(minutes=10, seconds=10),
                  lights_on=base.start + pd.Timedelta(minutes=100))
    # epochs whose start lies in [lights_off, lights_on): first at 10:30 (index 21), stop at 100:00 (index 200)
    assert night.in_bed == (21, 200)


def test_hash_ignores_participant_and_label_but_not_content() -> None:
    a = make_night(240, participant_id="A", label="x")
    b = make_night(240, participant_id="B", label="y")
    assert a.content_hash == b.content_hash
    c = Night(participant_id="A", start=a.start, epoch_seconds=30, counts=a.counts + np.eye(1, 240)[0],
              reference=a.reference)
    assert c.content_hash != a.content_hash


def test_hash_same_instant_other_offset() -> None:
    a = make_night(240)
    b = Night(participant_id="A", start=a.start.tz_convert("UTC"), epoch_seconds=30, counts=a.counts,
              reference=a.reference)
    assert a.content_hash == b.content_hash


def test_arrays_are_read_only() -> None:
    night = make_night(120)
    with pytest.raises(ValueError):
        night.counts[0] = 1.0
