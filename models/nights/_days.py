"""Day of month of times read with a format and as written (the check of Arrow's lenient day-of-month reading).

Arrow's ``strptime`` reads a day past the month's end (31.02) as one of the first days of the next
month; :mod:`models.nights.timestamps` checks the rows read as such a day against the day written.
"""

from __future__ import annotations

import re
from datetime import datetime, timedelta
from functools import lru_cache
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

if TYPE_CHECKING:  # pyarrow has no type information
    import pyarrow as pa

__all__ = ["day_of_month", "days_read", "early_days", "text_of", "written_days"]


def text_of(col: pa.Array) -> pa.Array:
    """A column as trimmed text (nulls as empty text)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if not pa.types.is_string(col.type):
        col = col.cast(pa.string())
    return pc.utf8_trim_whitespace(pc.fill_null(col, "") if col.null_count else col)


_DIGITS = {"m": r"\d{1,2}", "Y": r"\d{4}", "y": r"\d{2}", "H": r"\d{1,2}", "I": r"\d{1,2}", "M": r"\d{1,2}",
           "S": r"\d{1,2}", "f": r"\d{1,9}", "j": r"\d{1,3}"}


@lru_cache(maxsize=256)
def _day_pattern(fmt: str) -> str:
    """A regular expression (RE2) of the start of texts written with ``fmt``, up to the day of month (group ``d``)."""
    out = ["^"]
    for literal, directive in re.findall(r"([^%]*)(%.|$)", fmt):
        out.extend(r"\s+" if part.isspace() else re.sub(r"([^\w\s])", r"\\\1", part)
                   for part in re.split(r"(\s+)", literal) if part)
        key = directive[1:]
        if key == "d":
            return "".join(out) + r"(?P<d>\d{1,2})"
        out.append("%" if key == "%" else _DIGITS.get(key, ".+?"))
    return "".join(out)


def early_days(ns: NDArray[np.int64], last_day: int) -> bool:
    """Whether some of the times (int64 ns) may fall on days 1..``last_day`` of a month.

    Every time lies between the earliest and the latest, so when those two share a month and the
    earliest is past ``last_day``, none can.
    """
    if ns.size == 0:
        return False
    first, last = (_EPOCH + timedelta(microseconds=int(v) // 1000) for v in (ns.min(), ns.max()))  # floored
    return (first.year, first.month) != (last.year, last.month) or first.day <= last_day


_EPOCH = datetime(1970, 1, 1)  # naive: int64 nanoseconds count from it
_DAY_NS = 86_400 * 1_000_000_000


def days_read(ns: NDArray[np.int64], read: NDArray[np.int64]) -> NDArray[np.int64]:
    """Day of month (1-31) of each naive time in ``ns`` (int64 ns) that lies within ``read``'s range; any value else.

    The few days the range spans are looked up once each; a span of more than a year goes to numpy's calendar.
    """
    first, last = int(read.min()) // _DAY_NS, int(read.max()) // _DAY_NS
    if last - first > 366:
        stamps = ns.view("M8[ns]")
        return np.asarray((stamps.astype("M8[D]") - stamps.astype("M8[M]")).astype(np.int64) + 1)
    days = np.array([(_EPOCH + timedelta(days=d)).day for d in range(first, last + 1)], dtype=np.int64)
    return days[np.clip(ns // _DAY_NS - first, 0, last - first)]


def day_of_month(text: pa.Array, fmt: str) -> NDArray[np.int64]:
    """The day of month as written in each of the texts (written with ``fmt``, trimmed), -1 where not found."""
    import pyarrow as pa
    import pyarrow.compute as pc

    days = pc.extract_regex(text, _day_pattern(fmt)).field("d")
    return np.asarray(pc.fill_null(pc.cast(days, pa.int64(), safe=False), -1).to_numpy(zero_copy_only=False))


@lru_cache(maxsize=256)
def _day_regex(fmt: str) -> re.Pattern[str]:
    """:func:`_day_pattern` for Python's ``re`` (ASCII digits, as RE2 reads ``\\d``)."""
    return re.compile(_day_pattern(fmt), re.ASCII)


def written_days(dates: pa.Array, fmt: str) -> NDArray[np.int64]:
    """:func:`day_of_month` of a few distinct dates, matched in Python (no regular expression built in Arrow).

    Used where ``fmt`` has only literal text without blanks before its ``%d``: the pattern is then that
    text and ``\\d{1,2}``, read alike by RE2 and ``re``.
    """
    hits = map(_day_regex(fmt).match, text_of(dates).to_pylist())
    return np.array([-1 if m is None else int(m.group("d")) for m in hits], dtype=np.int64)
