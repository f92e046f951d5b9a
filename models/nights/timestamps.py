"""Epoch times of tabular nights: strict ISO 8601 or an explicit ``strftime`` format, time zones, plausible dates.

Without a format, times must be ISO 8601 in the extended form ``YYYY-MM-DDThh:mm[:ss[.fff]]`` (``T`` or
a blank between date and time) with an optional ``Z`` or ``±hh:mm`` offset; anything else is refused,
including the words pandas would otherwise read as the current time (``now``, ``today``).

With a format (an import profile's ``datetime_format``) every time is parsed with it exactly. Arrow's
``strptime`` kernel reads the usual rows; every row it cannot read, and every row it may have read
more leniently than pandas (a day of month 1-3 that could be an overflowed 29-31, a year before
:data:`EARLIEST_PLAUSIBLE_DATE`), is parsed again with ``pandas.to_datetime(format=..., exact=True)``,
whose result stands. So the outcome is pandas' at Arrow's speed. A date column and a time-of-day
column, whose texts are joined with a blank, are read apart when the format is a date part and a
time part joined by blanks (:func:`split_date_time_format`): each distinct date once, each time of
day once, the two added; the joined text is built only for the rows checked again or quoted.

Times without an offset are placed in a time zone. A local time that does not exist (clocks jump
forward) or that happens twice and cannot be placed by the order of the rows (clocks fall back) is
refused with the file row and the time as written.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from datetime import timedelta
from functools import lru_cache
from typing import TYPE_CHECKING
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ..errors import Problem
from ._days import day_of_month, days_read, early_days, written_days
from .checks import MAX_LISTED

if TYPE_CHECKING:  # pyarrow has no type information
    import pyarrow as pa

__all__ = ["EARLIEST_PLAUSIBLE_DATE", "ISO_8601_PATTERN", "LATEST_PLAUSIBLE_DATE"]

#: first accepted epoch time (UTC): actigraphs with digital count export are later than this
EARLIEST_PLAUSIBLE_DATE = pd.Timestamp("1990-01-01T00:00:00Z")
#: first refused epoch time (UTC): a later date is a typing or clock error
LATEST_PLAUSIBLE_DATE = pd.Timestamp("2100-01-01T00:00:00Z")
#: the ISO 8601 times accepted without a format (extended form, date and time of day, optional offset)
ISO_8601_PATTERN = r"\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}(?::\d{2}(?:[.,]\d{1,9})?)?(?:Z|[+-]\d{2}:?\d{2})?"

NAT = np.iinfo(np.int64).min  # pandas' NaT as int64
_OFFSET_AT_END = re.compile(r"(?:Z|[+-]\d\d:?\d\d)$")
_FIRST, _LAST = EARLIEST_PLAUSIBLE_DATE.value, LATEST_PLAUSIBLE_DATE.value
# times far outside the plausible range are clipped to these (still implausible, but they fit int64 nanoseconds)
_LOW, _HIGH = _FIRST - 3650 * 86_400 * 10**9, _LAST + 3650 * 86_400 * 10**9
_PER_UNIT = {"s": 10**9, "ms": 10**6, "us": 10**3, "ns": 1}


def index_ns(index: pd.DatetimeIndex) -> NDArray[np.int64]:
    """Times as int64 nanoseconds (UTC for aware ones), :data:`NAT` for NaT; far-off times clipped."""
    if index.unit == "ns":
        return np.asarray(index.asi8, dtype=np.int64)
    per = _PER_UNIT[index.unit]
    raw = np.asarray(index.asi8, dtype=np.int64)
    out = np.clip(raw, _LOW // per, _HIGH // per) * per
    return np.where(index.isna(), NAT, out)


def arrow_ns(col: pa.Array) -> NDArray[np.int64]:
    """An Arrow timestamp column (no nulls) as int64 nanoseconds (UTC for aware ones); far-off times clipped."""
    import pyarrow as pa

    per = _PER_UNIT[col.type.unit]
    raw = np.asarray(col.cast(pa.int64()).to_numpy(zero_copy_only=False), dtype=np.int64)
    return raw if per == 1 else np.clip(raw, _LOW // per, _HIGH // per) * per


def has_zone(fmt: str) -> bool:
    """Whether times written with ``fmt`` carry their UTC offset."""
    return "%z" in fmt or "%Z" in fmt


Rows = Callable[[NDArray[np.intp]], "pa.Array"]  # the trimmed times as written of some 0-based data rows
DaysWritten = Callable[[NDArray[np.intp]], NDArray[np.int64]]  # the day of month written in some rows


def parse_with_format(text: pa.Array, fmt: str) -> NDArray[np.int64]:
    """Times written with ``fmt``, as int64 nanoseconds (UTC when the format has ``%z``), :data:`NAT` if invalid.

    Parameters
    ----------
    text : pyarrow.StringArray, shape (n,)
        Trimmed times.
    fmt : str
        ``strftime`` format.

    Returns
    -------
    ns : ndarray of int64, shape (n,)

    Notes
    -----
    Arrow's ``strptime`` reads a day of month past the month's end (31/02) as the following days
    (03/03), where pandas refuses it; those results fall on days 1-3 (1-4 in UTC with ``%z``), so
    a row read as such a day is kept only when the day written is the day read. Every other
    doubtful row (not read by Arrow, or a year before the plausible range) goes to pandas.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    def rows(idx: NDArray[np.intp]) -> pa.Array:
        return text if idx.size == len(text) else pc.take(text, pa.array(idx))

    try:
        fast = pc.strptime(text, format=fmt, unit="ns", error_is_null=True)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):  # a directive Arrow does not know
        return settle_doubtful(np.full(len(text), NAT, dtype=np.int64), fmt, rows, all_doubtful=True)
    return settle_doubtful(np.asarray(fast.to_numpy(zero_copy_only=False)).view(np.int64), fmt, rows)


def settle_doubtful(ns: NDArray[np.int64], fmt: str, rows: Rows, *, all_doubtful: bool = False,
                    days_written: DaysWritten | None = None) -> NDArray[np.int64]:
    """Arrow's ``strptime`` results ``ns`` (:data:`NAT` where not read) with every doubtful row parsed by pandas.

    ``rows`` gives the trimmed texts of some rows, only asked for the doubtful ones (see
    :func:`parse_with_format`); ``all_doubtful`` sends every row to pandas. ``days_written`` gives
    the day of month as written in some rows (-1 where not found); by default it is read from
    ``rows`` up to the format's ``%d``.
    """
    aware = has_zone(fmt)
    if all_doubtful:
        doubtful = np.ones(ns.size, dtype=bool)
    else:
        # not read, or a year pandas may refuse (e.g. 31 for %Y); a time of day alone is read on 1900-01-01
        doubtful = ns < _FIRST if re.search(r"%[YyG]", fmt) else ns == NAT
        read = ns[~doubtful] if doubtful.any() else ns
        if "%d" in fmt and early_days(read, 4 if aware else 3):  # in UTC a local day may move by one
            day_read = days_read(ns, read)
            early = ~doubtful & (day_read <= (4 if aware else 3))
            if early.any():
                at = np.flatnonzero(early)
                written = days_written(at) if days_written is not None else day_of_month(rows(at), fmt)
                doubtful[at[written != day_read[early]]] = True
    if doubtful.any():
        idx = np.flatnonzero(doubtful)
        values = rows(idx).to_pylist()
        exact = pd.DatetimeIndex(pd.to_datetime(values, format=fmt, exact=True, errors="coerce", utc=aware))
        ns = ns.copy()
        ns[idx] = index_ns(exact)
    return ns


_DATE_DIRECTIVES, _TIME_DIRECTIVES = frozenset("dmYybB"), frozenset("HMSIp")
_DIRECTIVES = re.compile(r"%(.)")
_1900 = pd.Timestamp("1900-01-01").value  # the day Arrow's strptime puts a time of day alone on
_LAST_DAY = pd.Timestamp("2262-01-01").value  # later days do not fit int64 nanoseconds with their times


@lru_cache(maxsize=256)
def split_date_time_format(fmt: str) -> tuple[str, str] | None:
    """(date format, time-of-day format) of a format that is the two joined by blanks, else None.

    The date part may hold only day, month and year directives (``%d %m %Y %y %b %B``), the time
    part only ``%H %M %S %I %p``; anything else (``%z``, ``%j``, ``%%``, a time before the date) is None.
    """
    if re.fullmatch(r"(?:[^%]|%[A-Za-z])*", fmt) is None:
        return None
    for blank in re.finditer(r"\s+", fmt):
        date_fmt, time_fmt = fmt[: blank.start()], fmt[blank.end():]
        in_date, in_time = set(_DIRECTIVES.findall(date_fmt)), set(_DIRECTIVES.findall(time_fmt))
        if in_date and in_time and in_date <= _DATE_DIRECTIVES and in_time <= _TIME_DIRECTIVES:
            return date_fmt, time_fmt
    return None


def date_time_ns(date_col: pa.Array, time_col: pa.Array,
                 fmt: str) -> tuple[NDArray[np.int64], DaysWritten | None] | None:
    """Arrow's ``strptime`` of ``date + " " + time`` per row, read as date and time of day apart and added.

    Each distinct date is read once. None unless ``fmt`` splits (:func:`split_date_time_format`),
    every date and every time reads as written (untrimmed, no nulls) and every date lies in
    1900..2261: then the sum is what ``strptime`` of the joined, trimmed text with ``fmt`` gives
    (each part sets its own fields, Arrow reads a text to its end and a blank in the format
    takes any run of blanks).

    Parameters
    ----------
    date_col, time_col : pyarrow.StringArray or pyarrow.DictionaryArray of strings, shape (n,)
    fmt : str
        Format of the joined text.

    Returns
    -------
    ns : ndarray of int64, shape (n,)
        Naive times in nanoseconds, before :func:`settle_doubtful`.
    days_written : callable or None
        The day of month written in given rows, read from the distinct dates, when ``fmt`` has
        nothing but literal text before its ``%d`` (then the joined text reads the same up to it);
        else None.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    split = split_date_time_format(fmt)
    if split is None or date_col.null_count or time_col.null_count or not pa.types.is_string(time_col.type):
        return None
    if not pa.types.is_dictionary(date_col.type):
        if not pa.types.is_string(date_col.type):
            return None
        date_col = date_col.dictionary_encode()
    dates = date_col.dictionary
    if not pa.types.is_string(dates.type):
        return None
    try:
        days = pc.strptime(dates, format=split[0], unit="ns", error_is_null=True)
        clock = pc.strptime(time_col, format=split[1], unit="ns", error_is_null=True)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return None
    if days.null_count or clock.null_count:
        return None
    day_ns = np.asarray(days.to_numpy(zero_copy_only=False)).view(np.int64)
    if day_ns.size and (day_ns.min() < _1900 or day_ns.max() >= _LAST_DAY):
        return None
    codes = np.asarray(date_col.indices.to_numpy(zero_copy_only=False), dtype=np.intp)
    ns = day_ns[codes] + (np.asarray(clock.to_numpy(zero_copy_only=False)).view(np.int64) - _1900)
    before_day = fmt.partition("%d")[0]
    if "%" in before_day or any(c.isspace() for c in before_day):
        return ns, None
    return ns, lambda at: written_days(dates, fmt)[codes[at]]


def iso_invalid(text: pd.Series) -> NDArray[np.bool_]:
    """Mask of times that are not accepted ISO 8601 (:data:`ISO_8601_PATTERN`)."""
    return ~text.str.fullmatch(ISO_8601_PATTERN).fillna(False).to_numpy(dtype=bool)


def invalid_problem(bad: NDArray[np.intp], values: list[str], row0: int, field: str, fmt: str | None) -> Problem:
    """``invalid_timestamp`` for the rows ``bad`` (0-based data rows) whose written times are ``values``."""
    how = f"written as {fmt!r}" if fmt else "ISO 8601 times (e.g. 2031-03-02T22:41:30+01:00)"
    return Problem("invalid_timestamp", f"{bad.size} time value(s) are not {how}, first {values[0]!r} at row "
                   f"{row0 + int(bad[0])}", {"field": field, "row": int(row0 + bad[0]), "epoch": int(bad[0]),
                                              "values": values[:MAX_LISTED]})


def offsets_of(text: pd.Series) -> NDArray[np.bool_]:
    """Which ISO times end in a UTC offset."""
    return text.str.contains(_OFFSET_AT_END, regex=True).fillna(False).to_numpy(dtype=bool)


Quote = Callable[[int], str]  # the time of a 0-based data row as written in the file


def plausible_problems(utc_ns: NDArray[np.int64], quote: Quote | None, row0: int, field: str) -> list[Problem]:
    """``implausible_date`` for times outside [:data:`EARLIEST_PLAUSIBLE_DATE`, :data:`LATEST_PLAUSIBLE_DATE`)."""
    if utc_ns.size == 0 or (utc_ns.min() >= _FIRST and utc_ns.max() < _LAST):
        return []
    bad = np.flatnonzero((utc_ns < _FIRST) | (utc_ns >= _LAST))
    i = int(bad[0])
    shown = quote(i) if quote is not None else pd.Timestamp(int(utc_ns[i]), tz="UTC").isoformat()
    return [Problem("implausible_date", f"{bad.size} time(s) lie outside the plausible range "
                    f"{EARLIEST_PLAUSIBLE_DATE.date()} .. {LATEST_PLAUSIBLE_DATE.date()}, first {shown!r} at row "
                    f"{row0 + i}", {"field": field, "row": row0 + i, "epoch": i, "time": shown})]


def _offset(delta: timedelta | None) -> str:
    seconds = int(delta.total_seconds()) if delta is not None else 0
    sign = "-" if seconds < 0 else "+"
    return f"{sign}{abs(seconds) // 3600:02d}:{abs(seconds) % 3600 // 60:02d}"


#: an IANA zone name's shape: letters first, then letters, digits, ``_ + -`` in up to three parts
_ZONE_NAME = re.compile(r"[A-Za-z][A-Za-z0-9_+-]{0,29}(?:/[A-Za-z0-9_+-]{1,30}){0,2}")


@lru_cache(maxsize=1)
def _zone_names() -> frozenset[str]:
    """The zone names of the zone database; ``localtime`` and ``posixrules`` are files, not zones."""
    from zoneinfo import available_timezones

    return frozenset(available_timezones()) - {"localtime", "posixrules"}


def zone_of(tz: str, problems: list[Problem]) -> ZoneInfo | None:
    """The IANA zone named ``tz``, or None with an ``unknown_time_zone`` problem.

    Only names of the zone database are looked up (never a path: ``../``, absolute paths and the
    database's own files get the same problem as an unknown name, so the answer cannot tell which
    files exist).
    """
    if isinstance(tz, str) and _ZONE_NAME.fullmatch(tz) and tz in _zone_names():
        try:
            return ZoneInfo(tz)
        except (ZoneInfoNotFoundError, ValueError, OSError):
            pass
    problems.append(Problem("unknown_time_zone", "tz is not the name of an IANA time zone (e.g. Europe/Berlin)",
                            {"field": "tz"}))
    return None


def localize(naive_ns: NDArray[np.int64], tz: str, quote: Quote | None, row0: int, field: str,
             problems: list[Problem]) -> tuple[NDArray[np.int64], ZoneInfo] | None:
    """Naive local times (int64 ns) placed in ``tz``: (UTC int64 ns, zone), or None with a problem.

    Times repeated when the clocks fall back are placed by the order of the rows (pandas'
    ``ambiguous="infer"``); nonexistent times and repeated times that order cannot place are refused,
    naming the file row, the time as written and the zone's offsets around the change.
    """
    zone = zone_of(tz, problems)
    if zone is None:
        return None
    import pyarrow as pa
    import pyarrow.compute as pc

    naive_ns = np.ascontiguousarray(naive_ns, dtype=np.int64)
    try:  # Arrow's kernel places the usual night, with no clock change, fast (the arrays shared, not copied)
        naive = pa.Array.from_buffers(pa.timestamp("ns"), naive_ns.size, [None, pa.py_buffer(naive_ns)])
        placed = pc.assume_timezone(naive, tz, ambiguous="raise", nonexistent="raise")
        if placed.null_count == 0:
            return np.frombuffer(placed.buffers()[1], dtype=np.int64, count=len(placed),
                                 offset=placed.offset * 8), zone
    except pa.ArrowInvalid:  # a clock change (or a zone Arrow's database lacks): pandas infers and explains
        pass
    index = pd.DatetimeIndex(naive_ns.view("M8[ns]"))
    try:
        local = index.tz_localize(zone, ambiguous="infer", nonexistent="raise")
    except ValueError:
        gap = np.asarray(index.tz_localize(zone, ambiguous=np.zeros(index.size, dtype=bool),
                                           nonexistent="NaT").isna(), dtype=bool)
        twice = ~gap & np.asarray(index.tz_localize(zone, ambiguous="NaT", nonexistent="shift_forward").isna())
        kind, mask = ("nonexistent", gap) if gap.any() else ("ambiguous", twice)
        bad = np.flatnonzero(mask)
        i = int(bad[0]) if bad.size else 0
        wall = index[i].to_pydatetime()
        before, after = (_offset(wall.replace(tzinfo=zone, fold=f).utcoffset()) for f in (0, 1))
        shown = quote(i) if quote is not None else wall.isoformat()
        what = (f"does not exist in {tz} (clocks move from {before} to {after})" if kind == "nonexistent" else
                f"happens twice in {tz} (at {before} and at {after}) and the order of the rows does not tell which")
        problems.append(Problem("daylight_saving", f"{bad.size} local time(s) where the clocks change: "
                                f"{shown!r} at row {row0 + i} {what}",
                                {"field": field, "row": row0 + i, "epoch": i, "time": shown,
                                 "values": [quote(int(j)) if quote is not None else index[j].isoformat()
                                            for j in bad[:MAX_LISTED]]}))
        return None
    return local.tz_convert("UTC").as_unit("ns").asi8, zone
