"""Epoch times: strict ISO 8601, exact formats (pandas as reference), plausible dates, clock changes (zoneinfo)."""

from __future__ import annotations

from datetime import datetime
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
from factories import one_problem, problems_of

from models import (
    EARLIEST_PLAUSIBLE_DATE,
    LATEST_PLAUSIBLE_DATE,
    ImportProfile,
    NightOptions,
    night_from_csv,
    night_from_json,
)
from models.nights.timestamps import NAT, parse_with_format

BERLIN = "Europe/Berlin"


def _csv(times: list[str], header: str = "time,counts") -> str:
    return header + "\n" + "\n".join(f"{t},1" for t in times)


def _iso_times(start: str = "2031-03-02T22:00:00+01:00", n: int = 240) -> list[str]:
    return [t.isoformat() for t in pd.date_range(start, periods=n, freq="30s")]


def test_pandas_reads_some_words_as_times() -> None:
    # the reason for the strict check: pandas' ISO 8601 parser takes "now" and "today" as the current time
    parsed = pd.to_datetime(pd.Series(["now", "today"]), format="ISO8601", errors="coerce")
    assert parsed.notna().all()


@pytest.mark.parametrize("word", ["now", "today", "yesterday", "tomorrow", "in 2 hours", "2 days ago", "noon"])
def test_words_are_refused_in_csv(word: str) -> None:
    times = _iso_times()
    times[5] = word
    p = one_problem(problems_of(night_from_csv, _csv(times)), "invalid_timestamp")
    assert p.location["row"] == 7 and word in p.message


@pytest.mark.parametrize("word", ["now", "today", "yesterday"])
def test_words_are_refused_in_json(word: str) -> None:
    obj = {"epoch_seconds": 30, "start": word, "counts": [1] * 240}
    assert one_problem(problems_of(night_from_json, obj), "invalid_timestamp").location["field"] == "start"


@pytest.mark.parametrize("value", ["2031", "2031-03-02", "20310302T220000", "2031-03-02T22"])
def test_only_extended_date_and_time_of_day(value: str) -> None:
    times = _iso_times()
    times[3] = value
    assert one_problem(problems_of(night_from_csv, _csv(times)), "invalid_timestamp").location["row"] == 5


@pytest.mark.parametrize("start,ok", [("1989-12-31T22:00:00Z", False), ("1990-01-01T00:00:00Z", True),
                                      ("2099-12-31T20:00:00Z", True), ("2100-01-01T00:00:00Z", False),
                                      ("1970-01-01T00:00:00Z", False)])
def test_plausible_date_range(start: str, ok: bool) -> None:
    text = _csv(_iso_times(start))
    obj = {"epoch_seconds": 30, "start": start, "counts": [1] * 240}
    for read, data in ((night_from_csv, text), (night_from_json, obj)):
        if ok:
            read(data)
        else:
            p = one_problem(problems_of(read, data), "implausible_date")
            assert str(EARLIEST_PLAUSIBLE_DATE.date()) in p.message and str(LATEST_PLAUSIBLE_DATE.date()) in p.message


def test_implausible_date_from_a_two_digit_year_format() -> None:
    local = pd.date_range("1985-03-02 22:00", periods=240, freq="30s")
    text = _csv([t.strftime("%d.%m.%y %H:%M:%S") for t in local])
    profile = ImportProfile(name="yy", datetime_format="%d.%m.%y %H:%M:%S", tz=BERLIN)
    p = one_problem(problems_of(night_from_csv, text, profile=profile), "implausible_date")
    assert p.location["row"] == 2 and "02.03.85 22:00:00" in p.message


TRICKY = ["02/03/2031 22:41:30", "31/02/2031 22:41:30", "29/02/2031 00:00:00", "29/02/2032 00:00:00",
          "2/3/2031 22:41:30", "02/03/2031 24:00:00", "02/03/2031 22:41:30x", "02/03/31 22:41:30",
          "01/03/2031 00:00:00", "03/03/2031 23:59:59", "30/04/2031 12:00:00", "31/04/2031 12:00:00", ""]


def test_format_parsing_agrees_with_pandas_exact() -> None:
    fmt = "%d/%m/%Y %H:%M:%S"
    got = parse_with_format(pa.array(TRICKY), fmt)
    want = pd.DatetimeIndex(pd.to_datetime(TRICKY, format=fmt, exact=True, errors="coerce"))  # pandas: reference
    np.testing.assert_array_equal(got == NAT, want.isna())
    np.testing.assert_array_equal(got[~want.isna()], want[~want.isna()].as_unit("ns").asi8)


def test_overflowing_day_in_a_file_is_refused() -> None:
    # 31 February does not exist: pandas refuses it, so must the reader (Arrow alone would read 3 March)
    local = pd.date_range("2031-03-03 00:00", periods=240, freq="30s")
    times = [t.strftime("%d/%m/%Y %H:%M:%S") for t in local]
    times[0] = "31/02/2031 00:00:00"
    profile = ImportProfile(name="dmy", datetime_format="%d/%m/%Y %H:%M:%S", tz="UTC")
    p = one_problem(problems_of(night_from_csv, _csv(times), profile=profile), "invalid_timestamp")
    assert p.location["row"] == 2 and "31/02/2031" in p.message


def test_spring_forward_names_row_and_offsets() -> None:
    local = pd.date_range("2031-03-30 00:30:00", periods=240, freq="30s")  # 02:00-02:59 does not exist in Berlin
    times = [t.strftime("%d.%m.%Y;%H:%M:%S") for t in local]
    text = "Header line 1\nHeader line 2\nDatum;Zeit;Aktivität\n" + "\n".join(f"{t};3" for t in times)
    profile = ImportProfile(name="de", delimiter=";", skip_rows=2, datetime_format="%d.%m.%Y %H:%M:%S", tz=BERLIN,
                            columns={"date": "Datum", "time": "Zeit", "counts": "Aktivität"})
    p = one_problem(problems_of(night_from_csv, text, profile=profile), "daylight_saving")
    first_gap = int(np.flatnonzero(local.hour == 2)[0])
    assert p.location["row"] == 3 + 1 + first_gap  # preamble (2) + header (1) + data rows before it, 1-based
    assert p.location["time"] == "30.03.2031 02:00:00"
    zone = ZoneInfo(BERLIN)  # the offsets around the change, from zoneinfo
    before = datetime(2031, 3, 30, 1, 59, tzinfo=zone).utcoffset()
    after = datetime(2031, 3, 30, 3, 0, tzinfo=zone).utcoffset()
    assert (before.seconds // 3600, after.seconds // 3600) == (1, 2)
    assert "+01:00" in p.message and "+02:00" in p.message and BERLIN in p.message


def test_repeated_hour_without_order_names_row() -> None:
    # a night that starts inside the repeated hour 02:00-03:00 (2031-10-26, Berlin) cannot be placed by order
    local = pd.date_range("2031-10-26 02:10:00", periods=240, freq="30s")
    text = _csv([t.strftime("%Y-%m-%dT%H:%M:%S") for t in local])
    p = one_problem(problems_of(night_from_csv, text, options=NightOptions(tz=BERLIN)), "daylight_saving")
    assert p.location["row"] == 2 and p.location["time"] == "2031-10-26T02:10:00"
    zone = ZoneInfo(BERLIN)
    first, second = (datetime(2031, 10, 26, 2, 10, tzinfo=zone, fold=f).utcoffset() for f in (0, 1))
    assert (first.seconds // 3600, second.seconds // 3600) == (2, 1)
    assert "+02:00" in p.message and "+01:00" in p.message


def test_fall_back_in_order_matches_pandas_inference() -> None:
    utc = pd.date_range("2031-10-26T00:00:00Z", periods=480, freq="30s")
    local = utc.tz_convert(BERLIN)
    text = _csv([t.strftime("%d.%m.%Y %H:%M:%S") for t in local])
    profile = ImportProfile(name="de", datetime_format="%d.%m.%Y %H:%M:%S", tz=BERLIN)
    night = night_from_csv(text, profile=profile)
    want = pd.DatetimeIndex(local.tz_localize(None)).tz_localize(BERLIN, ambiguous="infer")  # pandas: reference
    assert night.epoch_times().equals(want.as_unit(night.epoch_times().unit))


def test_unknown_zone_is_named() -> None:
    text = _csv([t[:19] for t in _iso_times()])
    assert one_problem(problems_of(night_from_csv, text, options=NightOptions(tz="Mars/Olympus")),
                "unknown_time_zone").location["field"] == "tz"
