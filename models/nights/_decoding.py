"""What the night readers share: text decoding, timestamps and metadata fields (private to the package)."""

from __future__ import annotations

import codecs
import json
import re
from collections.abc import Mapping
from typing import TypedDict

import pandas as pd

from ..errors import InvalidNightError, Problem
from .checks import NightOptions
from .night import Night
from .resample import aggregate_epochs
from .timestamps import EARLIEST_PLAUSIBLE_DATE, ISO_8601_PATTERN, LATEST_PLAUSIBLE_DATE, zone_of

__all__ = ["META_LINE", "NightMetadata", "decode_json", "decode_text", "finish_night", "metadata_fields",
           "parse_time"]

#: an optional leading ``# key: value`` line of a CSV file
META_LINE = re.compile(r"^#\s*([A-Za-z_]+)\s*:\s*(.*?)\s*$")


#: an ISO 8601 time as accepted in JSON and metadata fields (see :mod:`models.nights.timestamps`)
_ISO_TIME = re.compile(ISO_8601_PATTERN)


def decode_text(data: bytes | str, source: str | None, encoding: str = "utf-8") -> str:
    """Text of a file in ``encoding`` (default UTF-8; a UTF-8 byte-order mark is dropped).

    UTF-16 (when UTF-8 is expected) and bytes that do not decode are refused, naming the line.
    """
    if isinstance(data, str):
        return data.removeprefix("\ufeff")
    if codecs.lookup(encoding).name not in ("utf-8", "utf-8-sig"):
        try:
            return data.decode(encoding)
        except UnicodeDecodeError as exc:
            line = data[: exc.start].count(b"\n") + 1
            raise InvalidNightError([Problem("undecodable_text", f"the file is not valid {encoding}: byte "
                                             f"{exc.start} (line {line}) cannot be decoded", {"row": line})],
                                    source=source) from None
    if data[:2] in (b"\xff\xfe", b"\xfe\xff"):
        raise InvalidNightError([Problem("not_utf8", "the file is UTF-16 encoded (byte-order mark at byte 0); "
                                         "save it as UTF-8", {"row": 1})], source=source)
    try:
        return data.decode("utf-8").removeprefix("\ufeff")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise InvalidNightError([Problem("not_utf8", f"the file is not valid UTF-8: byte {exc.start} "
                                         f"(line {line}) cannot be decoded", {"row": line})], source=source) from None


def decode_json(data: bytes | str, source: str | None) -> object:
    """The JSON value of a file's content; an empty file or invalid JSON is refused, naming the line."""
    text = decode_text(data, source)
    if not text.strip():
        raise InvalidNightError([Problem("empty_file", "the file is empty", {"row": 1})], source=source)
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise InvalidNightError([Problem("malformed_json", f"not valid JSON at line {exc.lineno} column "
                                         f"{exc.colno}: {exc.msg}", {"row": exc.lineno, "column": exc.colno})],
                                source=source) from None


class NightMetadata(TypedDict, total=False):
    """The metadata fields of a night as keyword arguments of :func:`~models.nights.checks.validate_night_fields`."""

    lights_off: pd.Timestamp | None
    lights_on: pd.Timestamp | None
    label: str | None


def parse_time(value: object, field: str, tz: str | None, problems: list[Problem]) -> pd.Timestamp | None:
    """An ISO 8601 time, localised with ``tz`` when it has no offset; None (and a problem) when invalid."""
    if not isinstance(value, str):
        problems.append(Problem("invalid_timestamp", f"{field} must be an ISO 8601 text, got {value!r}",
                                {"field": field}))
        return None
    try:
        if not _ISO_TIME.fullmatch(value.strip()):  # pandas would read words such as "now" or "today"
            raise ValueError(value)
        ts = pd.Timestamp(value.strip())
    except (ValueError, TypeError):
        problems.append(Problem("invalid_timestamp", f"{field} {value!r} is not an ISO 8601 time", {"field": field}))
        return None
    if pd.isna(ts):
        problems.append(Problem("invalid_timestamp", f"{field} {value!r} is not a time", {"field": field}))
        return None
    if ts.tzinfo is None:
        if tz is None:
            problems.append(Problem("missing_timezone", f"{field} {value!r} has no UTC offset; add one "
                                    "(e.g. +01:00) or give a time zone", {"field": field, "time": value}))
            return None
        zone = zone_of(tz, problems)
        if zone is None:
            return None
        try:
            ts = ts.tz_localize(zone, ambiguous="raise", nonexistent="raise")
        except ValueError as exc:  # a local time the clocks skip or pass twice
            problems.append(Problem("daylight_saving", f"{field} {value!r} cannot be placed in time zone {tz!r}: "
                                    f"{exc}", {"field": field, "time": value}))
            return None
    if not EARLIEST_PLAUSIBLE_DATE <= ts < LATEST_PLAUSIBLE_DATE:
        problems.append(Problem("implausible_date", f"{field} {value!r} lies outside the plausible range "
                                f"{EARLIEST_PLAUSIBLE_DATE.date()} .. {LATEST_PLAUSIBLE_DATE.date()}",
                                {"field": field, "time": value}))
        return None
    return ts


def metadata_fields(meta: Mapping[str, object], tz: str | None, problems: list[Problem]) -> NightMetadata:
    """``lights_off``, ``lights_on`` and ``label`` of a night from its metadata, checked."""
    out = NightMetadata()
    if meta.get("lights_off") not in (None, ""):
        out["lights_off"] = parse_time(meta["lights_off"], "lights_off", tz, problems)
    if meta.get("lights_on") not in (None, ""):
        out["lights_on"] = parse_time(meta["lights_on"], "lights_on", tz, problems)
    label = meta.get("label")
    if label is not None and not isinstance(label, str):
        problems.append(Problem("invalid_field", f"label must be text, got {type(label).__name__}",
                                {"field": "label"}))
        label = None
    out["label"] = label
    return out


def finish_night(night: Night, options: NightOptions) -> Night:
    """The night aggregated to ``options.aggregate_to`` when that is set and differs."""
    if options.aggregate_to in (None, night.epoch_seconds):
        return night
    return aggregate_epochs(night, options.aggregate_to)
