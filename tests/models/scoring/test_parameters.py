"""Sleep parameters on hand-made sequences with answers worked out by hand.

Definitions: AASM-style PSG parameters (Iber et al. 2007, from memory) with the actigraphy
options named in published-methods section 2 (Fekedulegn et al. 2020): SOL to the first sleep
epoch, LPS to the first run of N minutes of sleep, SPT from onset to the last sleep epoch,
SE = 100 x TST / time in bed, WASO to lights-on (AASM) or to the final awakening.
Sequences are written one character per epoch: S = sleep, W = wake, ? = unscored.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from models.scoring.parameters import PARAMETER_NAMES, InvalidInBedIntervalError, SleepParameters, sleep_parameters
from models.scoring.rescoring import InvalidSleepVectorError, UnsupportedEpochLengthError

NAN = float("nan")


def _vec(text: str) -> np.ndarray:
    return np.array([{"S": 1.0, "W": 0.0, "?": NAN}[c] for c in text])


def _check(params: SleepParameters, **expected):
    for name, value in expected.items():
        got = getattr(params, name)
        if isinstance(value, float) and math.isnan(value):
            assert math.isnan(got), name
        else:
            assert got == pytest.approx(value), name


def test_parameters_worked_example_60s():
    # index:     0123456789
    seq = _vec("WWSSSWSSWW")
    p = sleep_parameters(seq, 60, persistent_sleep_min=3)
    _check(p, time_in_bed_min=10, sol_min=2,  # first S at index 2
           lps_min=2,  # first run of 3 S: indices 2-4
           spt_min=6,  # indices 2..7
           tst_min=5, waso_min=3,  # W at 5, 8, 9 (to lights-on)
           sleep_efficiency_pct=50.0, awakenings=2,  # bouts: [5], [8, 9]
           mean_awakening_min=1.5, longest_awakening_min=2, unscored_epochs=0)
    assert (p.sleep_onset_idx, p.final_awakening_idx) == (2, 8)


def test_waso_to_final_awakening_drops_the_last_wake_bout():
    p = sleep_parameters(_vec("WWSSSWSSWW"), 60, waso_end="final_awakening")
    _check(p, waso_min=1, awakenings=1, mean_awakening_min=1, longest_awakening_min=1, spt_min=6)


def test_minimum_awakening_length_in_epochs():
    p = sleep_parameters(_vec("WWSSSWSSWW"), 60, min_awakening_epochs=2)
    _check(p, waso_min=3, awakenings=1, mean_awakening_min=2, longest_awakening_min=2)  # WASO keeps every epoch


def test_parameters_30s_epochs_halve_the_minutes():
    p = sleep_parameters(_vec("WWSSSWSSWW"), 30, persistent_sleep_min=1.5)  # 1.5 min = 3 epochs
    _check(p, time_in_bed_min=5, sol_min=1, lps_min=1, spt_min=3, tst_min=2.5, waso_min=1.5,
           sleep_efficiency_pct=50.0, awakenings=2, mean_awakening_min=0.75, longest_awakening_min=1)


def test_persistent_sleep_default_is_ten_minutes_of_epochs():
    seq = _vec("W" * 4 + "S" * 19 + "W" + "S" * 20 + "W")  # 30-s epochs: 19 S is 9.5 min, 20 S is 10 min
    p = sleep_parameters(seq, 30)
    _check(p, sol_min=2.0, lps_min=12.0)  # the 20-S run starts at index 24 = 12 min
    assert math.isnan(sleep_parameters(_vec("S" * 19), 30).lps_min)


def test_in_bed_interval_restricts_everything():
    seq = _vec("WWSSSWSSWW")
    p = sleep_parameters(seq, 60, lights_off_idx=1, lights_on_idx=9)  # in bed: "WSSSWSSW"
    _check(p, time_in_bed_min=8, sol_min=1, spt_min=6, tst_min=5, waso_min=2, sleep_efficiency_pct=62.5,
           awakenings=2, unscored_epochs=0)
    assert (p.sleep_onset_idx, p.final_awakening_idx) == (2, 8)  # indices count from the recording start


def test_unscored_epochs_are_neither_sleep_nor_wake():
    # index: 01234567 ; scored: W . S S . W S W
    p = sleep_parameters(_vec("W?SS?WSW"), 60)
    _check(p, time_in_bed_min=8, unscored_epochs=2, sol_min=2,  # clock latency
           spt_min=5,  # indices 2..6, the unscored epoch 4 included (clock interval)
           tst_min=3, waso_min=2, sleep_efficiency_pct=50.0,  # 3 of 6 scored minutes
           awakenings=2)
    assert p.final_awakening_idx == 7


def test_unscored_epochs_do_not_split_bouts_or_runs():
    p = sleep_parameters(_vec("SSW?WSS"), 60)
    _check(p, awakenings=1, longest_awakening_min=2, waso_min=2)  # one bout of 2 scored wake epochs
    assert sleep_parameters(_vec("SS?SS"), 60, persistent_sleep_min=4).lps_min == 0.0


def test_no_sleep_at_all():
    p = sleep_parameters(_vec("WWWW"), 30)
    _check(p, time_in_bed_min=2, sol_min=NAN, lps_min=NAN, spt_min=0, tst_min=0, waso_min=0,
           sleep_efficiency_pct=0, awakenings=0, mean_awakening_min=NAN, longest_awakening_min=0)
    assert p.sleep_onset_idx is None and p.final_awakening_idx is None


def test_sleep_from_the_first_epoch():
    p = sleep_parameters(_vec("S" * 12), 60)
    _check(p, sol_min=0, lps_min=0, spt_min=12, tst_min=12, waso_min=0, sleep_efficiency_pct=100,
           awakenings=0, mean_awakening_min=NAN, longest_awakening_min=0)
    assert (p.sleep_onset_idx, p.final_awakening_idx) == (0, 12)


def test_one_epoch_recording_of_sleep():
    p = sleep_parameters([1], 30)
    _check(p, time_in_bed_min=0.5, sol_min=0, lps_min=NAN, spt_min=0.5, tst_min=0.5, waso_min=0,
           sleep_efficiency_pct=100, awakenings=0)
    assert (p.sleep_onset_idx, p.final_awakening_idx) == (0, 1)


def test_wake_at_the_very_end():
    seq = _vec("SSSWW")
    _check(sleep_parameters(seq, 60), waso_min=2, awakenings=1, longest_awakening_min=2, spt_min=3)
    _check(sleep_parameters(seq, 60, waso_end="final_awakening"), waso_min=0, awakenings=0,
           mean_awakening_min=NAN, longest_awakening_min=0)


@pytest.mark.parametrize(("seq", "kwargs"), [("?????", {}), ("SSWW", {"lights_off_idx": 2, "lights_on_idx": 2})])
def test_nothing_scored_in_bed_gives_nan(seq, kwargs):
    p = sleep_parameters(_vec(seq), 60, **kwargs)
    for name in PARAMETER_NAMES:
        if name not in ("time_in_bed_min", "unscored_epochs"):
            assert math.isnan(getattr(p, name)), name
    assert p.unscored_epochs == seq.count("?") and p.time_in_bed_min == (5 if seq == "?????" else 0)


def test_integer_and_bool_inputs_match_float():
    seq = _vec("WWSSSWSSWW")
    expected = sleep_parameters(seq, 60, persistent_sleep_min=3)  # no NaN field, so == compares every value
    assert sleep_parameters(seq.astype(int), 60, persistent_sleep_min=3) == expected
    assert sleep_parameters(seq.astype(bool), 60, persistent_sleep_min=3) == expected


def test_parameter_names_are_the_leading_fields_in_table_order():
    names = [f.name for f in dataclasses.fields(SleepParameters)]
    assert tuple(names[:len(PARAMETER_NAMES)]) == PARAMETER_NAMES
    assert list(sleep_parameters([1, 0], 30).as_dict())[:len(PARAMETER_NAMES)] == list(PARAMETER_NAMES)


@given(st.text(alphabet="SW", min_size=1, max_size=200), st.sampled_from([15, 30, 60]))
def test_durations_add_up_without_unscored_epochs(text, epoch_seconds):
    seq = _vec(text)
    epoch_min = epoch_seconds / 60
    to_lights_on = sleep_parameters(seq, epoch_seconds)
    to_final = sleep_parameters(seq, epoch_seconds, waso_end="final_awakening")
    assert to_lights_on.tst_min == pytest.approx(text.count("S") * epoch_min)
    assert to_lights_on.sleep_efficiency_pct == pytest.approx(100 * to_lights_on.tst_min / to_lights_on.time_in_bed_min)
    if "S" in text:  # SOL + TST + WASO(to lights-on) = TIB; TST + WASO(to final awakening) = SPT
        total = to_lights_on.sol_min + to_lights_on.tst_min + to_lights_on.waso_min
        assert total == pytest.approx(len(text) * epoch_min)
        assert to_final.tst_min + to_final.waso_min == pytest.approx(to_final.spt_min)
        assert to_final.awakenings <= to_lights_on.awakenings <= to_final.awakenings + 1


@pytest.mark.parametrize("bad", [[0, 2, 1], [[0, 1]], [0.5]])
def test_invalid_sleep_vector(bad):
    with pytest.raises(InvalidSleepVectorError) as info:
        sleep_parameters(np.asarray(bad), 30)
    assert info.value.code == "invalid_sleep_vector"


@pytest.mark.parametrize(("off", "on"), [(3, 2), (-1, None), (0, 6), (1.0, None), (True, None)])
def test_invalid_in_bed_interval(off, on):
    with pytest.raises(InvalidInBedIntervalError) as info:
        sleep_parameters([1, 0, 1, 1, 0], 30, lights_off_idx=off, lights_on_idx=on)
    assert info.value.code == "invalid_in_bed_interval"


@pytest.mark.parametrize("options", [{"waso_end": "noon"}, {"min_awakening_epochs": 0},
                                     {"min_awakening_epochs": 1.5}, {"persistent_sleep_min": 0}])
def test_invalid_options(options):
    with pytest.raises(ValueError) as info:
        sleep_parameters([1, 0, 1], 30, **options)
    assert info.value.code == "invalid_parameter_option"


def test_unsupported_epoch_length():
    with pytest.raises(UnsupportedEpochLengthError):
        sleep_parameters([1, 0, 1], 20)
