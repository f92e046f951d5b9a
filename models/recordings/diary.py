"""Sleep diaries: the participant's own bed and rise times (and naps) per night, as local clock times.

CSV: a header row, then one row per day::

    date,bed_time,rise_time,nap1_start,nap1_end
    2031-03-02,22:40,06:55,,
    2031-03-03,,,14:10,14:45        <- bed and rise left blank: the night was not written down

``date`` is the evening the night starts (ISO ``YYYY-MM-DD``); times are clock times ``HH:MM`` or
``HH:MM:SS`` (a full ISO 8601 time is taken as written). Delimiter comma, semicolon or tab. Header
names: ``bed_time`` (also ``bedtime``, ``bed``, ``in_bed``), ``rise_time`` (also ``risetime``,
``rise``, ``out_of_bed``, ``get_up``), nap pairs ``nap<k>_start`` / ``nap<k>_end`` (``k`` may be
left out for a single nap). Columns whose header contains ``note`` or ``comment`` hold free text and
are skipped; any other column is refused.

Placing clock times on the calendar (common practice for a diary keyed by the evening's date):

* ``bed_time`` before 12:00 is after midnight, on the next calendar day;
* ``rise_time`` at or before ``bed_time`` is on the next morning (the usual case);
* a nap starting at or after 12:00 is on ``date``, one starting before 12:00 on the next day (the
  noon-to-noon day of ``date``); a nap end at or before its start is on the day after its start.

Local times are placed in the zone ``tz``; a time the clocks skip (spring forward) moves forward
to the first valid instant and a time passed twice (fall back) is read as the first.

JSON: ``{"days": [{"date": "2031-03-02", "bed_time": "22:40", "rise_time": "06:55",
"naps": [["14:10", "14:45"]]}, ...]}`` (or the list alone); ``null`` or a missing key for blanks.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd

from ..errors import NightbankError, Problem
from ..nights._decoding import load_json
from ..nights.timestamps import EARLIEST_PLAUSIBLE_DATE, LATEST_PLAUSIBLE_DATE, zone_of

__all__ = ["DiaryDay", "InvalidDiaryError", "read_diary"]

_BED = ("bed_time", "bedtime", "bed", "in_bed")
_RISE = ("rise_time", "risetime", "rise", "out_of_bed", "get_up")
_NAP = re.compile(r"^nap_?(\d*)_?(start|end)$")
_CLOCK = re.compile(r"^(\d{1,2}):(\d{2})(?::(\d{2}))?$")
_NOON = dt.time(12, 0)


class InvalidDiaryError(NightbankError):
    """A diary failed validation; ``problems`` lists every defect (``row`` and ``field`` located)."""

    code = "invalid_diary"

    def __init__(self, problems: list[Problem], *, source: str | None = None) -> None:
        self.problems = list(problems)
        head = "; ".join(p.message for p in self.problems[:3])
        more = f" (+{len(self.problems) - 3} more)" if len(self.problems) > 3 else ""
        super().__init__(f"{source + ': ' if source else ''}{len(self.problems)} problem(s): {head}{more}")


@dataclass(frozen=True)
class DiaryDay:
    """One diary day.

    Parameters
    ----------
    date : datetime.date
        The evening the night starts (its noon-to-noon day).
    bed_time, rise_time : pandas.Timestamp or None
        Timezone-aware; None where the participant left it blank.
    naps : tuple of (pandas.Timestamp, pandas.Timestamp)
        (start, end) of each nap written down, timezone-aware.
    """

    date: dt.date
    bed_time: pd.Timestamp | None
    rise_time: pd.Timestamp | None
    naps: tuple[tuple[pd.Timestamp, pd.Timestamp], ...] = ()


def _key(name: str) -> str:
    return re.sub(r"[\s\-]+", "_", name.strip().lower())


def _clock(text: str, where: dict[str, Any], problems: list[Problem]) -> dt.time | pd.Timestamp | None:
    """A clock time, a full timestamp (when written so), or None (blank or invalid, problem recorded)."""
    text = text.strip()
    if not text:
        return None
    hit = _CLOCK.match(text)
    if hit:
        h, m, s = int(hit.group(1)), int(hit.group(2)), int(hit.group(3) or 0)
        if h < 24 and m < 60 and s < 60:
            return dt.time(h, m, s)
    elif re.match(r"^\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}", text):
        try:
            return pd.Timestamp(text)
        except ValueError:
            pass
    problems.append(Problem("invalid_time", f"{where['field']} {text!r} at row {where.get('row', '?')} is not a "
                            "clock time HH:MM (or an ISO 8601 time)", dict(where)))
    return None


def _place(day: dt.date, value: dt.time | pd.Timestamp, tz: str) -> pd.Timestamp:
    if isinstance(value, pd.Timestamp):
        return value.tz_convert(tz) if value.tzinfo is not None else \
            value.tz_localize(tz, ambiguous=True, nonexistent="shift_forward")
    naive = pd.Timestamp(dt.datetime.combine(day, value))
    return naive.tz_localize(tz, ambiguous=True, nonexistent="shift_forward")


def _day_after_noon(day: dt.date, value: dt.time | pd.Timestamp, tz: str) -> pd.Timestamp:
    """On ``day`` from noon, else on the next day (explicit timestamps as written)."""
    if isinstance(value, dt.time) and value < _NOON:
        return _place(day + dt.timedelta(days=1), value, tz)
    return _place(day, value, tz)


def _after(first: pd.Timestamp, value: dt.time | pd.Timestamp, tz: str) -> pd.Timestamp:
    """``value`` on ``first``'s day, moved a day on while it is not after ``first``."""
    if isinstance(value, pd.Timestamp):
        return _place(first.date(), value, tz)
    out = _place(first.tz_convert(tz).date(), value, tz)
    while out <= first:
        out = _place(out.tz_convert(tz).date() + dt.timedelta(days=1), value, tz)
    return out


def _build_day(cells: Mapping[str, str], naps: list[tuple[str, str]], where: dict[str, Any], tz: str,
               problems: list[Problem]) -> DiaryDay | None:
    n_before = len(problems)
    raw_date = cells.get("date", "").strip()
    try:
        day = dt.date.fromisoformat(raw_date)
    except ValueError:
        problems.append(Problem("invalid_date", f"date {raw_date!r} at row {where.get('row', '?')} is not an ISO "
                                "date YYYY-MM-DD", {**where, "field": "date"}))
        day = None
    if day is not None and not EARLIEST_PLAUSIBLE_DATE.year <= day.year < LATEST_PLAUSIBLE_DATE.year:
        problems.append(Problem("implausible_date", f"date {raw_date!r} at row {where.get('row', '?')} lies outside "
                                f"the plausible range {EARLIEST_PLAUSIBLE_DATE.date()} .. "
                                f"{LATEST_PLAUSIBLE_DATE.date()}", {**where, "field": "date"}))
        day = None
    bed = _clock(cells.get("bed_time", ""), {**where, "field": "bed_time"}, problems)
    rise = _clock(cells.get("rise_time", ""), {**where, "field": "rise_time"}, problems)
    nap_values = [(_clock(a, {**where, "field": f"nap{k + 1}_start"}, problems),
                   _clock(b, {**where, "field": f"nap{k + 1}_end"}, problems)) for k, (a, b) in enumerate(naps)]
    if len(problems) > n_before or day is None:
        return None
    bed_ts = None if bed is None else _day_after_noon(day, bed, tz)
    if rise is None:
        rise_ts = None
    elif bed_ts is not None:
        rise_ts = _after(bed_ts, rise, tz)
    else:  # rise without bed: the morning after the evening's date
        rise_ts = _place(day + dt.timedelta(days=1), rise, tz) if isinstance(rise, dt.time) else _place(day, rise, tz)
    out_naps = []
    for k, (a, b) in enumerate(nap_values):
        if (a is None) != (b is None):
            problems.append(Problem("incomplete_nap", f"nap {k + 1} at row {where.get('row', '?')} has a "
                                    f"{'start' if a is not None else 'end'} but no "
                                    f"{'end' if a is not None else 'start'}",
                                    {**where, "field": f"nap{k + 1}_{'end' if a is not None else 'start'}"}))
        elif a is not None and b is not None:
            start = _day_after_noon(day, a, tz)
            out_naps.append((start, _after(start, b, tz)))
    if bed_ts is not None and rise_ts is not None and (rise_ts - bed_ts) > pd.Timedelta(hours=24):
        problems.append(Problem("implausible_diary", f"rise time is more than 24 h after bed time at row "
                                f"{where.get('row', '?')}", {**where, "field": "rise_time"}))
    if len(problems) > n_before:
        return None
    return DiaryDay(date=day, bed_time=bed_ts, rise_time=rise_ts, naps=tuple(out_naps))


def _csv_days(text: str, tz: str, problems: list[Problem]) -> list[tuple[DiaryDay | None, dict[str, Any]]]:
    lines = text.splitlines()
    header_at = next((i for i, line in enumerate(lines) if line.strip()), None)
    if header_at is None:
        problems.append(Problem("empty_file", "the diary has no header row", {"row": 1}))
        return []
    sep = max((",", ";", "\t"), key=lines[header_at].count)
    rows = list(csv.reader(io.StringIO("\n".join(lines[header_at:])), delimiter=sep))
    header = [_key(h) for h in rows[0]]
    roles: dict[int, str] = {}
    nap_cols: dict[int, tuple[int, str]] = {}
    for j, name in enumerate(header):
        if name == "date":
            roles[j] = "date"
        elif name in _BED:
            roles[j] = "bed_time"
        elif name in _RISE:
            roles[j] = "rise_time"
        elif (hit := _NAP.match(name)) is not None:
            nap_cols[j] = (int(hit.group(1) or 1), hit.group(2))
        elif "note" not in name and "comment" not in name and name:
            problems.append(Problem("unknown_column", f"diary column {rows[0][j]!r} is not date, bed_time, "
                                    "rise_time, nap<k>_start/end or a note", {"row": header_at + 1,
                                                                              "field": rows[0][j]}))
    if "date" not in roles.values():
        problems.append(Problem("missing_column", f"the diary header {rows[0]!r} has no date column",
                                {"row": header_at + 1, "field": "date"}))
        return []
    n_naps = max((k for k, _ in nap_cols.values()), default=0)
    out = []
    for i, row in enumerate(rows[1:]):
        line = header_at + 2 + i
        if not any(c.strip() for c in row):
            continue
        if len(row) > len(header):
            problems.append(Problem("malformed_row", f"row {line} has {len(row)} fields, the header "
                                    f"{len(header)}", {"row": line}))
            continue
        cells = {roles[j]: row[j] for j in roles if j < len(row)}
        pairs = [["", ""] for _ in range(n_naps)]
        for j, (k, part) in nap_cols.items():
            if j < len(row):
                pairs[k - 1][0 if part == "start" else 1] = row[j]
        where = {"row": line}
        out.append((_build_day(cells, [(a, b) for a, b in pairs], where, tz, problems), where))
    return out


def _json_days(obj: object, tz: str, problems: list[Problem]) -> list[tuple[DiaryDay | None, dict[str, Any]]]:
    days = obj.get("days") if isinstance(obj, dict) else obj
    if not isinstance(days, list):
        problems.append(Problem("malformed_json", "a JSON diary is a list of days or {\"days\": [...]}",
                                {"field": "days"}))
        return []
    out = []
    for i, entry in enumerate(days):
        where: dict[str, Any] = {"field": f"days[{i}]", "row": i + 1}
        if not isinstance(entry, dict):
            problems.append(Problem("invalid_field", f"days[{i}] is not an object", where))
            continue
        naps = entry.get("naps") or []
        if not isinstance(naps, list) or not all(isinstance(n, list) and len(n) == 2 for n in naps):
            problems.append(Problem("invalid_field", f"days[{i}].naps must list [start, end] pairs", where))
            naps = []
        cells = {k: "" if entry.get(k) is None else str(entry.get(k)) for k in ("date", "bed_time", "rise_time")}
        pairs = [("" if a is None else str(a), "" if b is None else str(b)) for a, b in naps]
        out.append((_build_day(cells, pairs, where, tz, problems), where))
    return out


def read_diary(source: str | Path | bytes, *, fmt: str | None = None, tz: str,
               source_name: str | None = None) -> list[DiaryDay]:
    """Read a sleep diary (format in the module docstring).

    Parameters
    ----------
    source : str, Path or bytes
        A path or the file's content.
    fmt : {"csv", "json"}, optional
        By default from the suffix, else from the content.
    tz : str
        IANA zone of the clock times.
    source_name : str, optional
        Name for errors when ``source`` is bytes.

    Returns
    -------
    list of DiaryDay
        Sorted by date; a row with only its date gives a day with every time None.

    Raises
    ------
    InvalidDiaryError
        Listing every problem with its row (1-based line, header included; JSON: position in the
        list) and field (column).
    """
    if isinstance(source, bytes):
        data, name = source, source_name
    else:
        data, name = Path(source).read_bytes(), source_name or str(source)
    problems: list[Problem] = []
    try:
        text = data.decode("utf-8").removeprefix("\ufeff")
    except UnicodeDecodeError as exc:
        raise InvalidDiaryError([Problem("not_utf8", f"the diary is not valid UTF-8 (byte {exc.start})",
                                         {"row": data[: exc.start].count(b"\n") + 1})], source=name) from None
    if zone_of(tz, problems) is None:
        raise InvalidDiaryError(problems, source=name)
    suffix = Path(name).suffix.lower().lstrip(".") if name else ""
    fmt = fmt or (suffix if suffix in ("csv", "json") else "json" if text.lstrip()[:1] in "[{" else "csv")
    if fmt == "json":
        obj, problem = load_json(text)
        if problem is not None:
            raise InvalidDiaryError([problem], source=name)
        found = _json_days(obj, tz, problems)
    else:
        found = _csv_days(text, tz, problems)
    seen: dict[dt.date, dict[str, Any]] = {}
    for day, where in found:
        if day is None:
            continue
        if day.date in seen:
            problems.append(Problem("duplicate_date", f"date {day.date} at row {where['row']} repeats row "
                                    f"{seen[day.date]['row']}", {**where, "field": "date"}))
        seen[day.date] = where
    if problems:
        raise InvalidDiaryError(problems, source=name)
    return sorted((d for d, _ in found if d is not None), key=lambda d: d.date)
