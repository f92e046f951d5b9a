"""A date column and a time-of-day column read through a profile's format, with pandas as the reference.

Every expected time is ``pandas.to_datetime(date + " " + time (trimmed), format=..., exact=True)``
localised with ``tz_localize(..., ambiguous="infer")``; refused rows are the ones pandas refuses
(``errors="coerce"`` gives NaT). The exports are simulated.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pytest
from factories import one_problem, problems_of

from models import ImportProfile, night_from_csv
from models.nights._days import day_of_month, days_read, text_of, written_days
from models.nights.timestamps import NAT, date_time_ns, parse_with_format, settle_doubtful

BERLIN = "Europe/Berlin"


def _export(date_fmt: str, time_fmt: str, start: str, *, n: int = 960, epoch_seconds: int = 30,
            tz: str = BERLIN) -> tuple[str, pd.Series, pd.Series]:
    """Simulated export: ``Datum;Zeit;Counts`` rows of local times from ``start`` (UTC) on, and its two columns."""
    local = pd.date_range(start, periods=n, freq=f"{epoch_seconds}s", tz="UTC").tz_convert(tz)
    dates, times = pd.Series(local.strftime(date_fmt)), pd.Series(local.strftime(time_fmt))
    counts = np.random.default_rng(3).poisson(5, n)
    rows = "\n".join(f"{d};{t};{c}" for d, t, c in zip(dates, times, counts, strict=True))
    return "Datum;Zeit;Counts\n" + rows + "\n", dates, times


def _profile(fmt: str, tz: str = BERLIN) -> ImportProfile:
    return ImportProfile(name="split", delimiter=";", datetime_format=fmt, tz=tz,
                         columns={"date": "Datum", "time": "Zeit", "counts": "Counts"})


def _pandas_times(dates: pd.Series, times: pd.Series, fmt: str, tz: str) -> pd.DatetimeIndex:
    joined = (dates + " " + times).str.strip()
    naive = pd.DatetimeIndex(pd.to_datetime(joined, format=fmt, exact=True))  # pandas: the reference
    return naive.tz_localize(tz, ambiguous="infer", nonexistent="raise")


@pytest.mark.parametrize(("date_fmt", "time_fmt", "epoch_seconds"), [
    ("%d.%m.%Y", "%H:%M:%S", 30), ("%d/%m/%Y", "%I:%M:%S %p", 30), ("%m/%d/%Y", "%H:%M", 60),
    ("%d %b %Y", "%H:%M:%S", 15), ("%d.%m.%y", "%H:%M:%S", 30),
])
@pytest.mark.parametrize("start", [
    "2031-01-31T20:00:00Z",  # into the first of a month
    "2032-02-28T20:30:00Z",  # through a leap day
    "2031-03-02T21:00:00Z",  # early days of a month only
    "2031-10-25T22:00:00Z",  # the night the clocks fall back in Berlin (the repeated hour placed by order)
    "2031-12-31T21:00:00Z",  # into a new year
])
def test_split_columns_read_as_pandas_reads_them(date_fmt: str, time_fmt: str, epoch_seconds: int,
                                                 start: str) -> None:
    fmt = f"{date_fmt} {time_fmt}"
    text, dates, times = _export(date_fmt, time_fmt, start, epoch_seconds=epoch_seconds)
    night = night_from_csv(text, profile=_profile(fmt))
    want = _pandas_times(dates, times, fmt, BERLIN)
    assert night.epoch_seconds == epoch_seconds
    assert night.epoch_times().equals(want.as_unit(night.epoch_times().unit))


@pytest.mark.parametrize(("date_cell", "time_cell"), [(" {}", "{}"), ("{}  ", "{}"), ("{}", " {}"), ("{}", "{}\t")])
def test_other_zone_and_blanks_around_cells(date_cell: str, time_cell: str) -> None:
    # blanks around one row's cells: the joined text is trimmed, blanks inside read as the format's blank
    text, dates, times = _export("%d.%m.%Y", "%H:%M:%S", "2031-03-09T03:00:00Z", tz="America/New_York")
    lines = text.splitlines()
    dates[9], times[9] = date_cell.format(dates[9]), time_cell.format(times[9])
    lines[10] = f"{dates[9]};{times[9]};{lines[10].rsplit(';', 1)[1]}"
    night = night_from_csv("\n".join(lines), profile=_profile("%d.%m.%Y %H:%M:%S", "America/New_York"))
    want = _pandas_times(dates, times, "%d.%m.%Y %H:%M:%S", "America/New_York")
    assert night.epoch_times().equals(want.as_unit(night.epoch_times().unit))


def test_time_written_in_the_date_cell_is_read_joined() -> None:
    # one row holds its whole time in the date cell and leaves the time cell empty: joined, it still reads
    text, dates, times = _export("%d.%m.%Y", "%H:%M:%S", "2031-05-04T20:00:00Z")
    lines = text.splitlines()
    lines[6] = f"{dates[5]} {times[5]};;{lines[6].rsplit(';', 1)[1]}"
    night = night_from_csv("\n".join(lines), profile=_profile("%d.%m.%Y %H:%M:%S"))
    dates[5], times[5] = f"{dates[5]} {times[5]}", ""
    want = _pandas_times(dates, times, "%d.%m.%Y %H:%M:%S", BERLIN)
    assert night.epoch_times().equals(want.as_unit(night.epoch_times().unit))


@pytest.mark.parametrize("bad_date", ["31.02.2031", "29.02.2031", "31.04.2031", "00.03.2031"])
def test_day_past_the_month_end_is_refused_at_its_row(bad_date: str) -> None:
    # pandas refuses these dates; Arrow alone would read 31.02 as 03.03
    text, _, times = _export("%d.%m.%Y", "%H:%M:%S", "2031-03-02T23:00:00Z")
    assert pd.isna(pd.to_datetime(f"{bad_date} {times[3]}", format="%d.%m.%Y %H:%M:%S", errors="coerce"))
    lines = text.splitlines()
    lines[4] = bad_date + lines[4][10:]
    p = one_problem(problems_of(night_from_csv, "\n".join(lines), profile=_profile("%d.%m.%Y %H:%M:%S")),
                    "invalid_timestamp")
    assert p.location["row"] == 5 and f"{bad_date} {times[3]}" in p.message


DATES = ["02/03/2031", "31/02/2031", "29/02/2031", "29/02/2032", "2/3/2031", "01/03/2031", "30/04/2031",
         "31/04/2031", "03/03/2031", "01/01/1985", " 02/03/2031", "02/31/2031", "02/29/2032", "04/31/2031",
         "12/31/2031"]  # day-first and month-first days past the month's end among them
TIMES = ["22:41:30", "00:00:00", "23:59:59", "7:05:03", "12:00:00", "24:00:00", "22:41:30x", " 22:41:30"]


@pytest.mark.parametrize("fmt", ["%d/%m/%Y %H:%M:%S", "%m/%d/%Y %H:%M:%S"])
def test_date_and_time_pairs_agree_with_pandas_exact(fmt: str) -> None:
    dates = pa.array([d for d in DATES for _ in TIMES])
    times = pa.array([t for _ in DATES for t in TIMES])
    joined = pc.utf8_trim_whitespace(pc.binary_join_element_wise(dates, times, " "))
    want = pd.DatetimeIndex(pd.to_datetime(joined.to_pylist(), format=fmt, exact=True, errors="coerce"))  # pandas
    got = parse_with_format(joined, fmt)
    np.testing.assert_array_equal(got == NAT, want.isna())
    np.testing.assert_array_equal(got[~want.isna()], want[~want.isna()].as_unit("ns").asi8)
    date_fmt = fmt.split(" ")[0]
    readable = [d for d in DATES if pc.strptime(pa.array([d]), format=date_fmt, unit="s",
                                                error_is_null=True)[0].is_valid]  # Arrow reads the date alone
    assert len(readable) >= 9
    for time in ("22:41:30", "00:00:00", "7:05:03", " 23:59:59"):  # the split read: each distinct date once
        pair = pa.array(readable).dictionary_encode(), pa.array([time] * len(readable))
        fast = date_time_ns(*pair, fmt)
        assert fast is not None
        text = pc.utf8_trim_whitespace(pc.binary_join_element_wise(pa.array(readable), pair[1], " "))
        split = settle_doubtful(fast[0], fmt, lambda idx, text=text: pc.take(text, pa.array(idx)),
                                days_written=fast[1])
        expect = pd.DatetimeIndex(pd.to_datetime(text.to_pylist(), format=fmt, exact=True, errors="coerce"))
        np.testing.assert_array_equal(split == NAT, expect.isna())  # pandas: the reference
        np.testing.assert_array_equal(split[~expect.isna()], expect[~expect.isna()].as_unit("ns").asi8)


@pytest.mark.parametrize("span_days", [0.5, 2, 40, 400])  # a night, a long recording, over a year (numpy's calendar)
def test_days_read_agree_with_pandas(span_days: float) -> None:
    rng = np.random.default_rng(7)
    start = pd.Timestamp("1899-12-30").value  # before 1970 too: days are floored
    day_ns = 86_400 * 10**9
    for offset_days in (0, 25_567, 40_000, 60_000):
        ns = start + offset_days * day_ns + rng.integers(0, int(span_days * day_ns), 300)
        ns[::17] = NAT  # rows not read: any value
        read = ns[ns != NAT]
        got = days_read(ns, read)
        want = pd.DatetimeIndex(read.view("M8[ns]")).day.to_numpy()  # pandas: the reference
        np.testing.assert_array_equal(got[ns != NAT], want)


@pytest.mark.parametrize("fmt", ["%d.%m.%Y %H:%M:%S", "T%d/%m/%Y %H:%M", "%d-%b-%y %H:%M"])
def test_written_days_of_distinct_dates_agree_with_arrow_regex(fmt: str) -> None:
    date_fmt = fmt.rsplit(" ", 1)[0]
    dates = pd.Series(pd.date_range("2031-02-25", periods=12, freq="D").strftime(date_fmt))
    dates[3], dates[5] = f" {dates[3]}", f"{dates[5]}\t"  # blanks around a cell are trimmed
    if date_fmt.startswith("%d."):
        dates[7] = dates[7].lstrip("0")  # one digit for the day
    text = pa.array(dates.tolist())
    want = pd.to_datetime(dates.str.strip(), format=date_fmt).dt.day.to_numpy()  # pandas: the reference
    np.testing.assert_array_equal(written_days(text, fmt), want)
    np.testing.assert_array_equal(written_days(text, fmt), day_of_month(text_of(text), fmt))  # Arrow's RE2
