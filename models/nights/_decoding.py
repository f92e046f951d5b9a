"""What the night readers share: text decoding, timestamps and metadata fields (private to the package)."""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import TypedDict

import pandas as pd

from ..errors import InvalidNightError, Problem
from .checks import NightOptions
from .night import Night
from .resample import aggregate_epochs

__all__ = ["META_LINE", "NightMetadata", "decode_text", "finish_night", "metadata_fields", "parse_time"]

#: an optional leading ``# key: value`` line of a CSV file
META_LINE = re.compile(r"^#\s*([A-Za-z_]+)\s*:\s*(.*?)\s*$")


def decode_text(data: bytes | str, source: str | None) -> str:
    """Text of a file: UTF-8 (a byte-order mark is dropped); UTF-16 and undecodable bytes are refused."""
    if isinstance(data, str):
        return data.removeprefix("\ufeff")
    if data[:2] in (b"\xff\xfe", b"\xfe\xff"):
        raise InvalidNightError([Problem("not_utf8", "the file is UTF-16 encoded (byte-order mark at byte 0); "
                                         "save it as UTF-8", {"row": 1})], source=source)
    try:
        return data.decode("utf-8").removeprefix("\ufeff")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise InvalidNightError([Problem("not_utf8", f"the file is not valid UTF-8: byte {exc.start} "
                                         f"(line {line}) cannot be decoded", {"row": line})], source=source) from None


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
        ts = pd.Timestamp(value)
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
        try:
            ts = ts.tz_localize(tz, ambiguous="raise", nonexistent="raise")
        except Exception as exc:  # pytz/zoneinfo raise several types for DST and unknown zones
            problems.append(Problem("invalid_timestamp", f"{field} {value!r} cannot be placed in time zone "
                                    f"{tz!r}: {exc}", {"field": field, "time": value}))
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
