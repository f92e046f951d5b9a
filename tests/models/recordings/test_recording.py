"""Reading continuous recordings: formats, markers, limits, hashes, epoch aggregation."""

from __future__ import annotations

import io
import json

import numpy as np
import pandas as pd
import pytest

from models import (
    ImportProfile,
    InvalidNightError,
    InvalidRecordingError,
    read_recording,
    recording_from_json,
    recording_to_epoch,
    recording_to_json,
)


def _frame(n: int, *, epoch_seconds: int = 30, seed: int = 0, start: str = "2031-03-02 12:00") -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    times = pd.date_range(start, periods=n, freq=f"{epoch_seconds}s", tz="Europe/Oslo")
    return pd.DataFrame({"time": [t.isoformat() for t in times], "counts": rng.poisson(15, n)})


def _csv(frame: pd.DataFrame, sep: str = ",") -> bytes:
    return frame.to_csv(index=False, sep=sep).encode()


def _problems(data: bytes, **kwargs: object) -> list:
    with pytest.raises(InvalidRecordingError) as info:
        read_recording(data, participant_id="P", **kwargs)
    assert info.value.code == "invalid_recording"
    assert isinstance(info.value, InvalidNightError)  # handled wherever a night's problems are
    return info.value.problems


def test_csv_markers_land_on_their_epochs_and_columns_are_accounted_for() -> None:
    frame = _frame(600)
    frame["event"] = ""
    frame.loc[[17, 402], "event"] = "x"
    frame["battery"] = 3.9
    rec = read_recording(_csv(frame), participant_id="P-01", source_name="p01.csv")
    assert rec.n_epochs == 600 and rec.epoch_seconds == 30
    assert np.flatnonzero(rec.markers).tolist() == [17, 402]
    assert rec.unused_columns == ("battery",)
    assert rec.source_name == "p01.csv"
    np.testing.assert_array_equal(rec.counts, frame["counts"].to_numpy(dtype=float))
    assert rec.end == pd.Timestamp("2031-03-02 17:00", tz="Europe/Oslo")  # 600 x 30 s = 5 h


def test_profile_marker_role_semicolons_and_naive_times() -> None:
    frame = _frame(240)
    frame["time"] = frame["time"].str.slice(0, 19).str.replace("T", " ")
    frame["Taste"] = 0
    frame.loc[100, "Taste"] = 2  # a count of presses marks the epoch
    frame = frame.rename(columns={"time": "Zeit", "counts": "Aktivitaet"})
    profile = ImportProfile(name="lab-a", delimiter=";", tz="Europe/Oslo", datetime_format="%Y-%m-%d %H:%M:%S",
                            columns={"time": "Zeit", "counts": "Aktivitaet", "marker": "Taste"})
    rec = read_recording(_csv(frame, ";"), participant_id="P", profile=profile)
    assert np.flatnonzero(rec.markers).tolist() == [100]
    assert rec.start == pd.Timestamp("2031-03-02 12:00", tz="Europe/Oslo")


def test_invalid_marker_is_located_by_row() -> None:
    frame = _frame(240)
    frame["marker"] = "0"
    frame.loc[9, "marker"] = "maybe"
    (problem,) = _problems(_csv(frame))
    assert problem.code == "invalid_marker"
    assert problem.location["row"] == 11  # header is line 1, epoch 0 is line 2
    assert "maybe" in problem.message
    frame.loc[9, "marker"] = "-1"
    assert _problems(_csv(frame))[0].location["row"] == 11
    frame.loc[9, "marker"] = " TRUE "
    frame.loc[12, "marker"] = "1.0"
    assert np.flatnonzero(read_recording(_csv(frame), participant_id="P").markers).tolist() == [9, 12]


def test_json_markers_as_booleans() -> None:
    body = {"start": "2031-03-02T12:00:00+01:00", "epoch_seconds": 60, "counts": [3] * 120,
            "markers": [False] * 119 + [True]}
    rec = recording_from_json(body)
    assert np.flatnonzero(rec.markers).tolist() == [119]
    with pytest.raises(InvalidRecordingError) as info:
        recording_from_json({**body, "markers": [True, False]})
    assert info.value.problems[0].code == "markers_length"


def test_json_csv_and_parquet_give_the_same_recording() -> None:
    frame = _frame(300)
    frame["marker"] = 0
    frame.loc[[3, 250], "marker"] = 1
    from_csv = read_recording(_csv(frame), participant_id="P")
    as_json = recording_to_json(from_csv)
    assert as_json["markers"] == [3, 250]
    from_json = read_recording(json.dumps(as_json).encode(), fmt="json")
    parquet = io.BytesIO()
    typed = frame.assign(time=pd.to_datetime(frame["time"]))
    typed.to_parquet(parquet, index=False)
    from_parquet = read_recording(parquet.getvalue(), participant_id="P", fmt="parquet")
    assert from_json.participant_id == "P"
    assert from_csv.content_hash() == from_json.content_hash() == from_parquet.content_hash()
    assert np.flatnonzero(from_parquet.markers).tolist() == [3, 250]
    assert recording_from_json(recording_to_json(from_json)).content_hash() == from_csv.content_hash()
    moved = recording_from_json({**as_json, "markers": [4, 250]})
    assert moved.content_hash() != from_csv.content_hash()  # markers are content


def test_gap_filled_recording_keeps_markers_on_their_times() -> None:
    frame = _frame(400)
    frame["marker"] = 0
    frame.loc[300, "marker"] = 1
    gappy = frame.drop(index=range(100, 120))
    rec = read_recording(_csv(gappy), participant_id="P", fill_gaps=True)
    assert rec.n_epochs == 400
    assert np.isnan(rec.counts[100:120]).all() and not np.isnan(rec.counts[:100]).any()
    assert np.flatnonzero(rec.markers).tolist() == [300]
    (problem,) = _problems(_csv(gappy))
    assert problem.code == "irregular_spacing" and problem.location["row"] == 102


def test_length_limits() -> None:
    assert {p.code for p in _problems(_csv(_frame(100)))} == {"too_short"}  # 50 min < 1 h
    day = 1440
    long = _frame(43 * day, epoch_seconds=60)  # 43 days > 42
    (problem,) = _problems(_csv(long))
    assert problem.code == "too_long" and "42 days" in problem.message
    month = _frame(35 * day * 2)  # 35 days of 30-s epochs
    month["button"] = "0"
    month.loc[100_790, "button"] = "x"  # a text mark long after the first megabyte of numbers
    ok = read_recording(_csv(month), participant_id="P")
    assert ok.n_epochs == 100_800 and ok.days == pytest.approx(35.0)
    assert np.flatnonzero(ok.markers).tolist() == [100_790]


def test_json_problems_are_all_reported() -> None:
    body = {"start": "2031-03-02T12:00:00+01:00", "epoch_seconds": 30, "counts": [1] * 200, "markers": [5, 900],
            "participant_id": 7}
    problems = _problems(json.dumps(body).encode(), fmt="json")
    assert {p.code for p in problems} == {"invalid_field", "invalid_marker"}
    assert {p.location["field"] for p in problems} == {"participant_id", "markers"}
    assert _problems(b"{not json", fmt="json")[0].code == "malformed_json"


def test_aggregation_matches_pandas_resampling() -> None:
    frame = _frame(960, epoch_seconds=15)  # 4 h of 15-s epochs
    frame["marker"] = 0
    frame.loc[[5, 401], "marker"] = 1
    rec = read_recording(_csv(frame), participant_id="P")
    half = recording_to_epoch(rec, 30)
    minute = recording_to_epoch(rec, 60)
    # check value from pandas' own resampling (sum per bin), not our reshaping
    series = pd.Series(frame["counts"].to_numpy(dtype=float), index=pd.to_datetime(frame["time"]))
    np.testing.assert_array_equal(half.counts, series.resample("30s").sum().to_numpy())
    np.testing.assert_array_equal(minute.counts, series.resample("60s").sum().to_numpy())
    assert np.flatnonzero(half.markers).tolist() == [2, 200]
    assert np.flatnonzero(minute.markers).tolist() == [1, 100]
    assert half.source_epoch_seconds == 15 and minute.start == rec.start
    with pytest.raises(InvalidRecordingError) as info:
        recording_to_epoch(minute, 30)
    assert info.value.problems[0].code == "epoch_length_mismatch"


def test_preamble_and_metadata_lines_before_the_marker_header() -> None:
    frame = _frame(240)
    frame["button"] = "0"
    frame.loc[[0, 239], "button"] = "1"
    body = _csv(frame, "\t").decode()
    text = "Device: wrist-07\nSerial: 123\n# label: night-x\n" + body
    profile = ImportProfile(name="lab-b", skip_rows=2)
    rec = read_recording(text.encode(), participant_id="P", profile=profile)
    assert np.flatnonzero(rec.markers).tolist() == [0, 239]
    frame.loc[5, "button"] = "?"
    bad = "Device: wrist-07\nSerial: 123\n# label: night-x\n" + _csv(frame, "\t").decode()
    (problem,) = _problems(bad.encode(), profile=profile)
    assert problem.code == "invalid_marker" and problem.location["row"] == 10  # 3 lines, header, then epoch 5
