"""Validation (one test per rule: code + location named) and quality flags (at and below thresholds)."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from factories import make_night, night_json, one_problem, problems_of

from models import (
    Night,
    NightOptions,
    QCConfig,
    night_from_csv,
    night_from_json,
    night_to_csv,
    quality_flags,
)


def _csv(n=240) -> list[str]:
    return night_to_csv(make_night(n, stages=False)).splitlines()


# ---- JSON field rules -------------------------------------------------------------------------------------
def test_empty_recording() -> None:
    p = one_problem(problems_of(night_from_json, night_json(240, counts=[])), "empty_recording")
    assert p.location["field"] == "counts"


def test_too_short() -> None:
    p = one_problem(problems_of(night_from_json, night_json(119)), "too_short")  # 119 x 30 s < 1 h
    assert "shorter than the minimum 1 h" in p.message and p.location["field"] == "counts"
    night_from_json(night_json(120))  # exactly 1 h is accepted


def test_too_long_configurable() -> None:
    obj = night_json(240)
    p = one_problem(problems_of(night_from_json, obj, options=NightOptions(max_hours=1.5)), "too_long")
    assert "1.5 h" in p.message


def test_unsupported_epoch_length() -> None:
    p = one_problem(problems_of(night_from_json, night_json(240, epoch_seconds=20)), "unsupported_epoch_length")
    assert p.location["field"] == "epoch_seconds" and "20" in p.message


@pytest.mark.parametrize("bad,code", [(-3, "negative_count"), (float("inf"), "non_finite_count"),
                                      ("12", "non_numeric_count"), (True, "non_numeric_count"),
                                      (None, "non_numeric_count")])
def test_count_value_rules_name_the_epoch(bad, code) -> None:
    obj = night_json(240)
    obj["counts"][17] = bad
    p = one_problem(problems_of(night_from_json, obj), code)
    assert p.location["epoch"] == 17 and "epoch 17" in p.message


def test_nan_count_in_csv_names_row() -> None:
    lines = _csv()
    t = lines[30].split(",")[0]
    lines[30] = f"{t},NaN"
    p = one_problem(problems_of(night_from_csv, "\n".join(lines)), "non_finite_count")
    assert p.location["row"] == 31 and p.location["epoch"] == 29


def test_reference_wrong_length() -> None:
    obj = night_json(240)
    obj["reference"] = obj["reference"][:-2]
    p = one_problem(problems_of(night_from_json, obj), "reference_length")
    assert "238" in p.message and "240" in p.message


def test_unknown_stage_codes_listed() -> None:
    obj = night_json(240)
    obj["reference"][5] = "N4"
    obj["reference"][9] = "stage 2"
    p = one_problem(problems_of(night_from_json, obj), "unknown_stage")
    assert p.location["epoch"] == 5 and set(p.location["values"]) == {"N4", "stage 2"}


def test_lights_order_and_outside() -> None:
    obj = night_json(240, lights_off="2031-03-02T23:30:00+01:00", lights_on="2031-03-02T23:00:00+01:00")
    p = one_problem(problems_of(night_from_json, obj), "lights_order")
    assert p.location["field"] == "lights_off"
    obj = night_json(240, lights_on="2031-03-03T09:00:00+01:00")
    p = one_problem(problems_of(night_from_json, obj), "lights_outside_recording")
    assert p.location["field"] == "lights_on" and "2031-03-03T09:00:00+01:00" in p.message


def test_missing_timezone_in_json() -> None:
    p = one_problem(problems_of(night_from_json, night_json(240, start="2031-03-02T22:41:00")), "missing_timezone")
    assert p.location["field"] == "start"


def test_malformed_json_names_line_and_column() -> None:
    text = json.dumps(night_json(240), indent=1)[:-40]
    p = one_problem(problems_of(night_from_json, text.encode()), "malformed_json")
    assert p.location["row"] > 1 and "line" in p.message


def test_unknown_and_missing_fields() -> None:
    obj = night_json(240, participant="x")
    del obj["start"]
    problems = problems_of(night_from_json, obj)
    assert one_problem(problems, "unknown_field").location["field"] == "participant"
    assert one_problem(problems, "missing_field").location["field"] == "start"


def test_not_utf8_and_utf16() -> None:
    p = one_problem(problems_of(night_from_csv, b"time,counts\n\xff\xfe\xfa,1\n"), "not_utf8")
    assert p.location["row"] == 2
    p = one_problem(problems_of(night_from_csv, "time,counts\n".encode("utf-16")), "not_utf8")
    assert "UTF-16" in p.message


def test_every_problem_reported_at_once() -> None:
    obj = night_json(240, epoch_seconds=45, lights_off="2031-03-02T21:00:00+01:00")
    obj["counts"][3] = -1
    obj["reference"][4] = "Q"
    codes = {p.code for p in problems_of(night_from_json, obj)}
    assert {"unsupported_epoch_length", "negative_count", "unknown_stage"} <= codes


def test_too_many_epochs_checked_first() -> None:
    problems = problems_of(night_from_json, night_json(240), options=NightOptions(max_epochs=100))
    p = one_problem(problems, "too_many_epochs")
    assert "100" in p.message


# ---- CSV timestamp rules ----------------------------------------------------------------------------------
def test_duplicate_timestamp() -> None:
    lines = _csv()
    lines[11] = lines[10].split(",")[0] + ",3"
    p = one_problem(problems_of(night_from_csv, "\n".join(lines)), "duplicate_timestamp")
    assert p.location["row"] == 12 and p.location["epoch"] == 10


def test_time_going_backwards() -> None:
    lines = _csv()
    lines[20], lines[21] = lines[21], lines[20]
    p = one_problem(problems_of(night_from_csv, "\n".join(lines)), "time_not_increasing")
    assert p.location["row"] == 22


def test_irregular_spacing_gap() -> None:
    lines = _csv()
    del lines[40]
    p = one_problem(problems_of(night_from_csv, "\n".join(lines)), "irregular_spacing")
    assert p.location["row"] == 41 and "60 s" in p.message


def test_one_second_epochs_refused() -> None:
    times = pd.date_range("2031-03-02T22:00:00+00:00", periods=4000, freq="1s")
    text = "time,counts\n" + "\n".join(f"{t.isoformat()},0" for t in times)
    p = one_problem(problems_of(night_from_csv, text), "unsupported_epoch_length")
    assert "1 s" in p.message


def test_missing_timezone_in_csv() -> None:
    text = "\n".join(line.replace("+01:00", "") for line in _csv())
    p = one_problem(problems_of(night_from_csv, text), "missing_timezone")
    assert p.location["row"] == 2


def test_daylight_saving_gap_in_naive_times() -> None:
    # 02:30 local does not exist on 2031-03-30 in Europe/Berlin (clocks jump 02:00 -> 03:00).
    times = pd.date_range("2031-03-30T00:00:00", periods=480, freq="30s")
    text = "time,counts\n" + "\n".join(f"{t.strftime('%Y-%m-%dT%H:%M:%S')},1" for t in times)
    p = one_problem(problems_of(night_from_csv, text, options=NightOptions(tz="Europe/Berlin")), "daylight_saving")
    assert "Europe/Berlin" in p.message


def test_invalid_timestamp_text() -> None:
    lines = _csv()
    lines[7] = "yesterday," + lines[7].split(",")[1]
    p = one_problem(problems_of(night_from_csv, "\n".join(lines)), "invalid_timestamp")
    assert p.location["row"] == 8 and "yesterday" in p.message


def test_missing_columns_and_header_only_and_empty() -> None:
    p = one_problem(problems_of(night_from_csv, "when,counts\n2031-03-02T22:00:00Z,1\n"), "missing_column")
    assert p.location["row"] == 1 and "when" in p.message
    assert one_problem(problems_of(night_from_csv, "time,counts\n"), "empty_recording")
    assert one_problem(problems_of(night_from_csv, b""), "empty_file")


def test_mixed_delimiters() -> None:
    lines = _csv()
    lines[15] = lines[15].replace(",", ";") + ",2,3"
    p = one_problem(problems_of(night_from_csv, "\n".join(lines)), "malformed_csv")
    assert p.location["row"] == 16


def test_non_numeric_count_in_csv() -> None:
    lines = _csv()
    lines[9] = lines[9].split(",")[0] + ",twelve"
    p = one_problem(problems_of(night_from_csv, "\n".join(lines)), "non_numeric_count")
    assert p.location["row"] == 10 and "twelve" in p.message


# ---- quality flags ----------------------------------------------------------------------------------------
def _night_with(counts: np.ndarray, reference=None) -> Night:
    return Night(participant_id="P", start=pd.Timestamp("2031-03-02T22:00:00+00:00"), epoch_seconds=30,
                 counts=counts, reference=reference)


def _codes(night: Night, **cfg) -> dict:
    return {f.code: f for f in quality_flags(night, config=QCConfig(**cfg))}


def test_off_wrist_at_and_below_threshold() -> None:
    counts = np.full(480, 5.0)
    counts[100:220] = 0  # 120 epochs = 60 min of exact zeros: at the threshold (common practice)
    flag = _codes(_night_with(counts))["off_wrist"]
    assert flag.ranges == [(100, 220)] and flag.threshold == {"off_wrist_min": 60.0}
    counts[219] = 1  # 59.5 min
    assert "off_wrist" not in _codes(_night_with(counts))


def test_spike_at_and_below_ceiling() -> None:
    counts = np.full(480, 5.0)
    counts[50] = 20000.5
    assert _codes(_night_with(counts), spike_factor=1e9)["spike"].ranges == [(50, 51)]
    counts[50] = 20000.0  # "above" the ceiling only
    assert "spike" not in _codes(_night_with(counts), spike_factor=1e9)


def test_spike_relative_to_upper_quantile() -> None:
    counts = np.full(480, 10.0)
    counts[7] = 101.0  # q99 = 10 -> limit 10 x 10 = 100
    assert _codes(_night_with(counts))["spike"].ranges == [(7, 8)]
    counts[7] = 100.0
    assert "spike" not in _codes(_night_with(counts))


def test_stuck_sensor_at_and_below() -> None:
    counts = np.arange(480, dtype=float)
    counts[200:210] = 33.0  # 10 identical non-zero values
    assert _codes(_night_with(counts))["stuck_sensor"].ranges == [(200, 210)]
    counts[209] = 34.0  # 9 values
    assert "stuck_sensor" not in _codes(_night_with(counts))


def test_low_reference_coverage_at_and_above() -> None:
    ref = np.full(480, "N2", dtype="<U3")
    ref[:48] = "?"  # exactly 10 %: not above the limit
    assert "low_reference_coverage" not in _codes(_night_with(np.ones(480), ref))
    ref[48] = "?"
    flag = _codes(_night_with(np.ones(480), ref))["low_reference_coverage"]
    assert flag.ranges == [(0, 49)]


def test_missing_epochs_and_movement_time_flags() -> None:
    counts = np.ones(480)
    counts[10:12] = np.nan
    ref = np.full(480, "S2", dtype="<U3")
    ref[30] = "MT"
    flags = _codes(_night_with(counts, ref))
    assert flags["missing_epochs"].ranges == [(10, 12)]
    assert flags["movement_time"].n_epochs == 1


def test_flags_never_change_data() -> None:
    night = make_night(480)
    before = night.counts.copy()
    quality_flags(night)
    np.testing.assert_array_equal(night.counts, before)
