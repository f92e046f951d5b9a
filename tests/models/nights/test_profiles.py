"""Import profiles: validation names the bad field; the JSON form round-trips."""

from __future__ import annotations

from datetime import datetime

import pytest

from models import ImportProfile, InvalidProfileError

FULL = {"name": "unit42", "delimiter": ";", "skip_rows": 6, "decimal": ",",
        "columns": {"date": "Date", "time": "Time", "counts": "Activity [counts]", "reference": "Sleep stage"},
        "datetime_format": "%d/%m/%Y %H:%M:%S", "tz": "Europe/Berlin",
        "stage_codes": {"0": "W", "1": "N1", "2": "N2", "3": "N3", "4": "N3", "5": "R", "9": "?"}}


def test_a_full_profile_round_trips() -> None:
    p = ImportProfile.from_dict(FULL)
    assert ImportProfile.from_dict(p.to_dict()) == p and p.to_dict() == FULL
    assert p.stage_code(" 4 ") == "N3" and p.stage_code("7") is None


def test_only_a_name_is_needed() -> None:
    assert ImportProfile.from_dict({"name": "plain"}).to_dict() == {"name": "plain"}


@pytest.mark.parametrize(("change", "field"), [
    ({"stage_codes": {"0": "Wake"}}, "stage_codes.0"),
    ({"datetime_format": "%d/%m"}, "datetime_format"),  # cannot give the year: does not read back
    ({"datetime_format": "day month"}, "datetime_format"),
    ({"tz": "Mars/Olympus"}, "tz"),
    ({"delimiter": "x"}, "delimiter"),
    ({"columns": {"epoch": "E"}}, "columns.epoch"),
    ({"columns": {"date": "D"}}, "columns.time"),
    ({"skip_rows": -1}, "skip_rows"),
    ({"skip_rows": True}, "skip_rows"),
    ({"colour": "red"}, "colour"),
    ({"name": "no spaces"}, "name"),
])
def test_every_bad_field_is_named(change, field) -> None:
    with pytest.raises(InvalidProfileError) as err:
        ImportProfile.from_dict({**FULL, **change})
    assert field in [p.location["field"] for p in err.value.problems]


def test_the_sample_format_reads_back_with_the_standard_library() -> None:
    # datetime.strptime is the outside reference for what a format string means (Python docs, strftime codes)
    fmt = ImportProfile.from_dict(FULL).datetime_format
    assert datetime.strptime("02/03/2031 22:41:30", fmt) == datetime(2031, 3, 2, 22, 41, 30)
