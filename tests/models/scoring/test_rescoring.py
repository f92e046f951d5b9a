"""Webster rescoring on hand-made sequences, run-length encoding and sleep-vector checks.

Rules as restated by Cole et al. 1992 (Webster et al. 1982), from memory (published-methods 1c):
1. >= 4 min W -> next 1 min S becomes W;  2. >= 10 min W -> next 3 min S;  3. >= 15 min W -> next 4 min S;
4. S run <= 6 min with >= 10 min W on both sides -> W;  5. S run <= 10 min with >= 20 min W on both sides -> W.
Sequences are written in minutes as "W"/"S" runs and expanded to epochs of the tested length.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from models.scoring.rescoring import (
    InvalidSleepVectorError,
    UnsupportedEpochLengthError,
    as_sleep_vector,
    run_lengths,
    webster_rescore,
)


def _seq(*runs: tuple[str, int], epoch_seconds: int) -> np.ndarray:
    """Runs of (state, minutes) -> epochs of 1 (S) / 0 (W)."""
    per_min = 60 // epoch_seconds
    return np.concatenate([np.full(minutes * per_min, 1 if state == "S" else 0, dtype=np.int8)
                           for state, minutes in runs])


CASES = {
    # rule 1: 4 min of wake -> the next minute of sleep is wake; 3 min are not enough
    "rule1": ([("W", 4), ("S", 12)], [("W", 5), ("S", 11)]),
    "rule1_short_wake": ([("W", 3), ("S", 12)], [("W", 3), ("S", 12)]),
    # rule 2: 10 min -> 3 min; with 9 min only rule 1 applies
    "rule2": ([("W", 10), ("S", 12)], [("W", 13), ("S", 9)]),
    "rule2_short_wake": ([("W", 9), ("S", 12)], [("W", 10), ("S", 11)]),
    # rule 3: 15 min -> 4 min; with 14 min rule 2 applies
    "rule3": ([("W", 15), ("S", 12)], [("W", 19), ("S", 8)]),
    "rule3_short_wake": ([("W", 14), ("S", 12)], [("W", 17), ("S", 9)]),
    # rule 4: <= 6 min of sleep between >= 10 min of wake; 7 min only loses 3 min (rule 2)
    "rule4": ([("S", 12), ("W", 10), ("S", 6), ("W", 10), ("S", 12)],
              [("S", 12), ("W", 29), ("S", 9)]),  # the last run keeps its original 10 min wake -> rule 2
    "rule4_long_sleep": ([("S", 12), ("W", 10), ("S", 7), ("W", 10), ("S", 12)],
                         [("S", 12), ("W", 13), ("S", 4), ("W", 13), ("S", 9)]),
    "rule4_short_wake_after": ([("S", 12), ("W", 10), ("S", 6), ("W", 9), ("S", 12)],
                               [("S", 12), ("W", 13), ("S", 3), ("W", 10), ("S", 11)]),
    # rule 5: <= 10 min of sleep between >= 20 min of wake; 11 min only loses 4 min (rule 3)
    "rule5": ([("S", 12), ("W", 20), ("S", 10), ("W", 20), ("S", 12)],
              [("S", 12), ("W", 54), ("S", 8)]),  # the last run: 20 min wake before -> rule 3
    "rule5_long_sleep": ([("S", 12), ("W", 20), ("S", 11), ("W", 20), ("S", 12)],
                         [("S", 12), ("W", 24), ("S", 7), ("W", 24), ("S", 8)]),
    # a sleep run shorter than the amount to rescore is rescored entirely
    "rule3_short_sleep": ([("W", 15), ("S", 2), ("W", 1), ("S", 12)], [("W", 18), ("S", 12)]),
    # sleep at the recording edges has no wake on that side: rules 4-5 do not apply
    "edge_island": ([("S", 3), ("W", 25)], [("S", 3), ("W", 25)]),
    "edge_island_end": ([("W", 25), ("S", 6)], [("W", 29), ("S", 2)]),  # rule 3 takes 4 min; no wake after
    # no cascade: rules read the original runs, so the first rescoring does not lengthen the next wake run
    "no_cascade": ([("W", 4), ("S", 1), ("W", 5), ("S", 6)], [("W", 11), ("S", 5)]),
}


@pytest.mark.parametrize("epoch_seconds", [60, 30, 15])
@pytest.mark.parametrize("name", list(CASES))
def test_webster_hand_made_sequences(name, epoch_seconds):
    before, after = CASES[name]
    sleep = _seq(*before, epoch_seconds=epoch_seconds)
    expected = _seq(*after, epoch_seconds=epoch_seconds)
    result = webster_rescore(sleep, epoch_seconds)
    np.testing.assert_array_equal(result, expected)
    assert result.dtype == np.float64  # 1.0 / 0.0, NaN where unscored


def test_webster_does_not_modify_its_input():
    sleep = _seq(("W", 10), ("S", 12), epoch_seconds=30)
    copy = sleep.copy()
    webster_rescore(sleep, 30)
    np.testing.assert_array_equal(sleep, copy)


@given(arrays(np.int8, st.integers(0, 300), elements=st.integers(0, 1)), st.sampled_from([15, 30, 60]))
def test_webster_only_turns_sleep_into_wake(sleep, epoch_seconds):
    result = webster_rescore(sleep, epoch_seconds)
    assert result.shape == sleep.shape
    assert np.all(result <= sleep)


def test_webster_accepts_bool_and_float_sequences():
    sleep = _seq(("W", 4), ("S", 5), epoch_seconds=60)
    expected = webster_rescore(sleep, 60)
    np.testing.assert_array_equal(webster_rescore(sleep.astype(bool), 60), expected)
    np.testing.assert_array_equal(webster_rescore(sleep.astype(float), 60), expected)


@pytest.mark.parametrize("bad", [[0, 1, 0.5], [0, 2, 1], [[0, 1]], ["S", "W"]])
def test_webster_rejects_non_binary_sequences(bad):
    with pytest.raises(InvalidSleepVectorError) as info:
        webster_rescore(np.asarray(bad), 30)
    assert info.value.code == "invalid_sleep_vector"


def test_webster_rejects_unsupported_epoch_length():
    with pytest.raises(UnsupportedEpochLengthError):
        webster_rescore([0, 1], 20)


@given(arrays(np.int8, st.integers(0, 200), elements=st.integers(0, 3)))
def test_run_lengths_round_trip(values):
    starts, lengths, run_values = run_lengths(values)
    np.testing.assert_array_equal(np.repeat(run_values, lengths), values)
    assert np.all(lengths > 0)
    assert np.all(run_values[1:] != run_values[:-1])
    np.testing.assert_array_equal(starts, np.cumsum(lengths) - lengths)


def test_as_sleep_vector_allows_nan_only_when_asked():
    np.testing.assert_array_equal(as_sleep_vector([1, 0, np.nan]), [1.0, 0.0, np.nan])
    with pytest.raises(InvalidSleepVectorError, match="only 0 or 1"):
        as_sleep_vector([1, 0, np.nan], allow_unscored=False)


@given(st.floats(allow_nan=False).filter(lambda v: v not in (0.0, 1.0)))
def test_as_sleep_vector_rejects_every_other_value(value):
    with pytest.raises(InvalidSleepVectorError):
        as_sleep_vector([1.0, value, np.nan])
