"""Sleep diaries: clock times placed on the calendar in the participant's zone, blanks, naps, errors."""

from __future__ import annotations

import datetime as dt
import json
from zoneinfo import ZoneInfo

import pandas as pd
import pytest

from models import DiaryDay, InvalidDiaryError, read_diary

OSLO = ZoneInfo("Europe/Oslo")


def _local(y: int, mo: int, d: int, h: int, mi: int) -> pd.Timestamp:
    # check values built with the standard library's zoneinfo, not with our placement
    return pd.Timestamp(dt.datetime(y, mo, d, h, mi, tzinfo=OSLO))


def test_clock_times_land_on_the_right_days() -> None:
    text = ("date,bed_time,rise_time,nap1_start,nap1_end,notes\n"
            "2031-05-05,22:40,06:55,14:10,14:45,late dinner\n"
            "2031-05-06,00:30,08:10,,,\n"       # bed after midnight: the next calendar day
            "2031-05-07,,,,,forgot\n"           # blank day
            "2031-05-08,23:50,00:20,10:30,11:05,\n")  # a short night; a morning nap is the next day's morning
    days = read_diary(text.encode(), tz="Europe/Oslo")
    assert [d.date for d in days] == [dt.date(2031, 5, 5), dt.date(2031, 5, 6), dt.date(2031, 5, 7),
                                      dt.date(2031, 5, 8)]
    assert days[0].bed_time == _local(2031, 5, 5, 22, 40) and days[0].rise_time == _local(2031, 5, 6, 6, 55)
    assert days[0].naps == ((_local(2031, 5, 5, 14, 10), _local(2031, 5, 5, 14, 45)),)
    assert days[1].bed_time == _local(2031, 5, 7, 0, 30) and days[1].rise_time == _local(2031, 5, 7, 8, 10)
    assert days[2] == DiaryDay(dt.date(2031, 5, 7), None, None, ())
    assert days[3].rise_time == _local(2031, 5, 9, 0, 20)
    assert days[3].naps[0][0] == _local(2031, 5, 9, 10, 30)


def test_a_night_across_the_spring_clock_change_is_one_hour_shorter() -> None:
    # Europe/Oslo moves from +01:00 to +02:00 at 02:00 on the last Sunday of March (2031-03-30)
    (day,) = read_diary(b"date;bed_time;rise_time\n2031-03-29;23:00;07:00\n", tz="Europe/Oslo")
    assert day.rise_time - day.bed_time == pd.Timedelta(hours=7)
    assert day.rise_time.utcoffset() == dt.timedelta(hours=2)


def test_json_gives_the_same_days_as_csv() -> None:
    csv_days = read_diary(b"date,bed_time,rise_time,nap_start,nap_end\n2031-05-05,22:40,06:55,14:10,14:45\n"
                          b"2031-05-06,,,,\n", tz="Europe/Oslo")
    body = {"days": [{"date": "2031-05-05", "bed_time": "22:40", "rise_time": "06:55", "naps": [["14:10", "14:45"]]},
                     {"date": "2031-05-06", "bed_time": None}]}
    assert read_diary(json.dumps(body).encode(), tz="Europe/Oslo") == csv_days
    assert read_diary(json.dumps(body["days"]).encode(), fmt="json", tz="Europe/Oslo") == csv_days


def test_full_timestamps_are_taken_as_written() -> None:
    (day,) = read_diary(b"date,bed_time,rise_time\n2031-05-05,2031-05-05T21:30:00+00:00,07:00\n", tz="Europe/Oslo")
    assert day.bed_time == pd.Timestamp("2031-05-05T23:30:00+02:00")
    assert day.rise_time == _local(2031, 5, 6, 7, 0)


def test_every_problem_is_reported_with_its_row_and_column() -> None:
    text = ("date,bed_time,rise_time,nap1_start,nap1_end,mood\n"
            "2031-05-04,22:40,06:10,,,\n"
            "2031-05-05,22:40,25:10,,,\n"
            "05/06/2031,23:00,07:00,,,\n"
            "2031-05-07,23:00,07:00,14:00,,\n"
            "2031-05-04,23:30,07:30,,,\n")
    with pytest.raises(InvalidDiaryError) as info:
        read_diary(text.encode(), tz="Europe/Oslo", source_name="p01-diary.csv")
    assert info.value.code == "invalid_diary"
    found = {(p.code, p.location.get("row"), p.location.get("field")) for p in info.value.problems}
    assert found == {("unknown_column", 1, "mood"), ("invalid_time", 3, "rise_time"), ("invalid_date", 4, "date"),
                     ("incomplete_nap", 5, "nap1_end"), ("duplicate_date", 6, "date")}
    assert "p01-diary.csv" in str(info.value)
    assert any("25:10" in p.message and "row 3" in p.message for p in info.value.problems)


def test_unknown_zone_and_missing_date_column() -> None:
    with pytest.raises(InvalidDiaryError) as info:
        read_diary(b"date,bed_time\n", tz="Mars/Olympus")
    assert info.value.problems[0].code == "unknown_time_zone"
    with pytest.raises(InvalidDiaryError) as info:
        read_diary(b"day,bed_time\n2031-05-05,22:00\n", tz="Europe/Oslo")
    assert {p.code for p in info.value.problems} == {"unknown_column", "missing_column"}
