"""The study protocol: validation naming every field, round trips and fingerprints; the parameter
definitions it selects, on hand-made hypnograms with answers worked out by hand.

Definitions (sources): WASO to lights-on with the final wake bout an awakening (AASM PSG
convention, Iber et al. 2007, from memory) or to the final awakening (actigraphy variant,
Fekedulegn et al. 2020); SOL to the first sleep epoch (AASM) or to the first run of 10 min of
sleep (latency to persistent sleep, from memory); minimum awakening length 1 or 2 epochs (common
practice); sleep outside lights-off..lights-on is not TST (AASM: TST is sleep within the recording
period, from memory). Sequences are one character per epoch: S = sleep, W = wake, ? = unscored.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from models import (
    DEFAULT_PROTOCOL,
    EQUIVALENCE_PARAMETERS,
    InvalidProtocolError,
    NightbankError,
    StudyProtocol,
    sleep_parameters,
)

NAN = float("nan")


def _vec(text: str) -> np.ndarray:
    return np.array([{"S": 1.0, "W": 0.0, "?": NAN}[c] for c in text])


def _check(params, **expected):
    for name, value in expected.items():
        got = getattr(params, name)
        if isinstance(value, float) and math.isnan(value):
            assert got is None or math.isnan(got), name
        else:
            assert got == pytest.approx(value), name


# ---------------------------------------------------------------- the record


def test_default_protocol_round_trips_through_json_and_keeps_its_fingerprint():
    text = json.dumps(DEFAULT_PROTOCOL.to_dict(), allow_nan=False)
    again = StudyProtocol.from_dict(json.loads(text))
    assert again == DEFAULT_PROTOCOL
    assert again.fingerprint() == DEFAULT_PROTOCOL.fingerprint()
    assert len(DEFAULT_PROTOCOL.fingerprint()) == 16 and hash(again) == hash(DEFAULT_PROTOCOL)
    assert set(DEFAULT_PROTOCOL.equivalence_margins) == set(EQUIVALENCE_PARAMETERS)


def test_default_protocol_is_the_documented_default_definitions():
    # the defaults the parameter function had before protocols: onset at the first sleep epoch,
    # 10-min persistent sleep, awakenings of 1 epoch, WASO to lights-on, unscored epochs bridged
    assert (DEFAULT_PROTOCOL.sol, DEFAULT_PROTOCOL.persistent_sleep_min, DEFAULT_PROTOCOL.min_awakening_epochs,
            DEFAULT_PROTOCOL.waso_end, DEFAULT_PROTOCOL.unscored_breaks_bouts) == (
        "first_sleep", 10.0, 1, "lights_on", False)
    # common practice: >= 2,000 bootstrap resamples, 95% intervals
    assert DEFAULT_PROTOCOL.bootstrap_resamples >= 2000 and DEFAULT_PROTOCOL.ci_level == 0.95


def test_every_field_changes_the_fingerprint():
    changed = [
        {"waso_end": "final_awakening"}, {"min_awakening_epochs": 2}, {"persistent_sleep_min": 5.0},
        {"sol": "persistent_sleep"}, {"unscored_breaks_bouts": True}, {"equivalence_margins": {"tst_min": 20.0}},
        {"ci_level": 0.9}, {"bootstrap_resamples": 5000}, {"seed": 7}, {"interval_level": 0.8},
    ]
    prints = {StudyProtocol.from_dict(c).fingerprint() for c in changed}
    assert len(prints) == len(changed) and DEFAULT_PROTOCOL.fingerprint() not in prints


def test_partial_margins_take_the_defaults_for_the_others():
    p = StudyProtocol.from_dict({"equivalence_margins": {"tst_min": 20}})
    assert p.equivalence_margins["tst_min"] == 20.0
    assert p.equivalence_margins["waso_min"] == DEFAULT_PROTOCOL.equivalence_margins["waso_min"]
    assert p.persistent_sleep_min == 10.0 and isinstance(p.persistent_sleep_min, float)
    with pytest.raises(TypeError):  # a protocol cannot be changed after the fact
        p.equivalence_margins["tst_min"] = 99.0  # type: ignore[index]


def test_without_unscored_epochs_the_bout_rule_changes_nothing():
    rng = np.random.default_rng(8)
    for _ in range(20):
        x = rng.choice([0.0, 1.0], size=200, p=[0.3, 0.7])
        a = sleep_parameters(x, 30, protocol=StudyProtocol(min_awakening_epochs=2, persistent_sleep_min=3.0))
        b = sleep_parameters(x, 30, protocol=StudyProtocol(min_awakening_epochs=2, persistent_sleep_min=3.0,
                                                           unscored_breaks_bouts=True))
        assert a == b


@pytest.mark.parametrize(("name", "value"), [
    ("waso_end", "midnight"), ("min_awakening_epochs", 0), ("min_awakening_epochs", 1.5),
    ("min_awakening_epochs", True), ("persistent_sleep_min", -1), ("persistent_sleep_min", float("inf")),
    ("sol", "last_sleep"), ("unscored_breaks_bouts", "yes"), ("ci_level", 1.0), ("ci_level", 0.5),
    ("bootstrap_resamples", 10), ("bootstrap_resamples", 2000.0), ("seed", -1), ("seed", "0"),
    ("equivalence_margins", [15]),
])
def test_each_invalid_field_is_named(name, value):
    with pytest.raises(InvalidProtocolError) as info:
        StudyProtocol.from_dict({name: value})
    assert info.value.code == "invalid_protocol" and isinstance(info.value, NightbankError)
    assert [p.location["field"] for p in info.value.problems] == [name]
    assert name in str(info.value)


def test_all_problems_are_listed_at_once_including_unknown_fields_and_margins():
    with pytest.raises(InvalidProtocolError) as info:
        StudyProtocol.from_dict({"sol": "x", "seed": -2, "colour": "red",
                                 "equivalence_margins": {"tst_min": 0, "naps": 3}})
    fields = {p.location["field"] for p in info.value.problems}
    assert fields == {"sol", "seed", "colour", "equivalence_margins.tst_min", "equivalence_margins.naps"}


def test_the_constructor_validates_too():
    with pytest.raises(InvalidProtocolError) as info:
        StudyProtocol(waso_end="noon")
    assert info.value.problems[0].location == {"field": "waso_end"}
    with pytest.raises(InvalidProtocolError):
        StudyProtocol.from_dict(["not", "a", "mapping"])  # type: ignore[arg-type]


# ---------------------------------------------------------------- definitions


def test_default_protocol_gives_the_same_parameters_as_the_default_options():
    rng = np.random.default_rng(3)
    for _ in range(20):
        x = rng.choice([0.0, 1.0, NAN], size=120, p=[0.3, 0.65, 0.05])
        a = sleep_parameters(x, 30, lights_off_idx=5, lights_on_idx=110).as_dict()
        b = sleep_parameters(x, 30, lights_off_idx=5, lights_on_idx=110, protocol=DEFAULT_PROTOCOL).as_dict()
        assert json.dumps(a) == json.dumps(b)


def test_waso_end_lights_on_versus_final_awakening():
    # index  012345678 (60-s epochs): onset 2, wake bouts at 4 (1 epoch) and 7-8 (final, 2 epochs)
    x = _vec("WWSSWSSWW")
    # AASM: WASO runs to lights-on = 1 + 2 epochs, both bouts are awakenings
    _check(sleep_parameters(x, 60, protocol=StudyProtocol(waso_end="lights_on")),
           waso_min=3.0, awakenings=2.0, longest_awakening_min=2.0, spt_min=5.0, tst_min=4.0)
    # final awakening: the last wake bout is neither WASO nor an awakening
    _check(sleep_parameters(x, 60, protocol=StudyProtocol(waso_end="final_awakening")),
           waso_min=1.0, awakenings=1.0, longest_awakening_min=1.0, spt_min=5.0, tst_min=4.0)


def test_minimum_awakening_length():
    # 60-s epochs: bouts of 1 (index 1) and 2 (3-4) epochs inside the sleep period
    x = _vec("SWSWWS")
    _check(sleep_parameters(x, 60, protocol=StudyProtocol(min_awakening_epochs=2)),
           waso_min=3.0, awakenings=1.0, mean_awakening_min=2.0)  # WASO counts every wake epoch
    _check(sleep_parameters(x, 60), awakenings=2.0, mean_awakening_min=1.5)


def test_sol_first_sleep_versus_persistent_sleep():
    # 30-s epochs, persistent sleep = 2 min = 4 epochs; index 0123456789
    x = _vec("WSSWSSSSWS")
    first = sleep_parameters(x, 30, protocol=StudyProtocol(persistent_sleep_min=2.0))
    # onset at epoch 1: SOL 0.5 min; WASO epochs 3 and 8 = 1 min; SPT 1..9 = 4.5 min
    _check(first, sol_min=0.5, lps_min=2.0, waso_min=1.0, awakenings=2.0, spt_min=4.5, tst_min=3.5,
           sleep_onset_idx=1)
    persistent = sleep_parameters(x, 30, protocol=StudyProtocol(persistent_sleep_min=2.0, sol="persistent_sleep"))
    # onset at epoch 4 (first run of 4 sleep epochs): SOL = LPS = 2 min; WASO only epoch 8 = 0.5 min;
    # SPT 4..9 = 3 min; TST still every in-bed sleep epoch (7 x 0.5 min)
    _check(persistent, sol_min=2.0, lps_min=2.0, waso_min=0.5, awakenings=1.0, spt_min=3.0, tst_min=3.5,
           sleep_onset_idx=4, sleep_efficiency_pct=70.0)


def test_persistent_sleep_onset_without_a_persistent_run_is_undefined_not_zero():
    x = _vec("WSWSSWS")  # 60-s epochs, no run of 10 min
    p = sleep_parameters(x, 60, protocol=StudyProtocol(sol="persistent_sleep"))
    _check(p, sol_min=NAN, spt_min=NAN, waso_min=NAN, awakenings=NAN, tst_min=4.0)
    assert p.sleep_onset_idx is None and p.sleep_efficiency_pct == pytest.approx(100 * 4 / 7)


def test_unscored_epochs_bridge_or_break_bouts():
    # 60-s epochs: wake, unscored, wake inside sleep; awakenings need 2 epochs
    x = _vec("SW?WS")
    bridged = sleep_parameters(x, 60, protocol=StudyProtocol(min_awakening_epochs=2))
    broken = sleep_parameters(x, 60, protocol=StudyProtocol(min_awakening_epochs=2, unscored_breaks_bouts=True))
    _check(bridged, awakenings=1.0, longest_awakening_min=2.0, waso_min=2.0, unscored_epochs=1)
    _check(broken, awakenings=0.0, longest_awakening_min=0.0, waso_min=2.0, unscored_epochs=1)
    assert broken.sleep_efficiency_pct == bridged.sleep_efficiency_pct == pytest.approx(50.0)  # 2 of 4 scored


def test_unscored_epoch_breaks_a_persistent_sleep_run_only_when_asked():
    # 30-s epochs, persistent sleep 2 min = 4 epochs: S S ? S S is a run of 4 scored sleep epochs
    x = _vec("WSS?SSW")
    proto = StudyProtocol(persistent_sleep_min=2.0)
    _check(sleep_parameters(x, 30, protocol=proto), lps_min=0.5)
    _check(sleep_parameters(x, 30, protocol=StudyProtocol(persistent_sleep_min=2.0, unscored_breaks_bouts=True)),
           lps_min=NAN, sol_min=0.5)


def test_sleep_outside_the_in_bed_interval_is_reported_not_counted():
    # 60-s epochs; lights off at 3, on at 7: sleep at 0-1 before, at 7 after
    x = _vec("SSWWSSWS")
    p = sleep_parameters(x, 60, lights_off_idx=3, lights_on_idx=7)
    _check(p, sleep_before_lights_off_min=2.0, sleep_after_lights_on_min=1.0, tst_min=2.0, sol_min=1.0,
           time_in_bed_min=4.0)
    assert sleep_parameters(x, 60).sleep_before_lights_off_min == 0.0


def test_sleep_before_lights_off_is_reported_on_a_night_without_in_bed_sleep():
    p = sleep_parameters(_vec("SSWWW"), 60, lights_off_idx=2)
    _check(p, tst_min=0.0, sol_min=NAN, sleep_before_lights_off_min=2.0)


def test_keyword_options_override_the_protocol():
    x = _vec("WWSSWSSWW")
    p = sleep_parameters(x, 60, protocol=StudyProtocol(waso_end="final_awakening"), waso_end="lights_on")
    _check(p, waso_min=3.0)
    p = sleep_parameters(_vec("SWSWWS"), 60, protocol=StudyProtocol(min_awakening_epochs=2), min_awakening_epochs=1)
    _check(p, awakenings=2.0)


def test_a_protocol_that_is_not_a_protocol_is_refused():
    with pytest.raises(NightbankError) as info:
        sleep_parameters([1, 0, 1], 30, protocol={"waso_end": "lights_on"})  # type: ignore[arg-type]
    assert info.value.code == "invalid_parameter_option"
