"""Reading and writing nights: nightbank JSON, CSV and Parquet.

JSON (nightbank's own format, also the HTTP body)::

    {"epoch_seconds": 30, "start": "2031-03-02T22:41:00+01:00", "counts": [0, 12, ...],
     "reference": ["W", "N1", ...], "lights_off": "...", "lights_on": "...", "label": "night-07"}

``reference``, ``lights_off``, ``lights_on`` and ``label`` are optional.

CSV: a header row, then one row per epoch with a time column, a counts column and an optional
reference column. The delimiter (comma, semicolon or tab) is sniffed from the header and a decimal
comma is accepted with semicolon or tab delimiters. Columns are found by the aliases in
:data:`COLUMN_ALIASES` (case-insensitive) or named explicitly. The epoch length is inferred from the
timestamps, which must be regular. Timestamps carry their UTC offset or are localised with
``NightOptions.tz``. Optional leading lines ``# key: value`` carry ``lights_off``, ``lights_on`` and
``label``.

Parquet: the same columns; lights and label in the file's key-value metadata under ``nightbank``.

Every reader returns a valid :class:`~models.nights.night.Night` or raises
:class:`~models.errors.InvalidNightError` listing every problem.
"""

from __future__ import annotations

import io
import json
import re
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .checks import NightOptions, validate_night_fields
from ..errors import InvalidNightError, Problem
from .night import Night
from .resample import aggregate_epochs

__all__ = [
    "COLUMN_ALIASES",
    "FORMATS",
    "read_night",
    "night_from_json",
    "night_to_json",
    "detect_format",
]

#: accepted header names per role, compared case-insensitively after stripping blanks
COLUMN_ALIASES: dict[str, tuple[str, ...]] = {
    "time": ("time", "timestamp", "datetime", "date_time", "epoch_start", "start"),
    "counts": ("counts", "count", "activity", "activity_counts", "movement"),
    "reference": ("reference", "stage", "stages", "sleep_stage", "psg", "psg_stage", "label"),
}
FORMATS = ("json", "csv", "parquet")
_JSON_FIELDS = {"epoch_seconds", "start", "counts", "reference", "lights_off", "lights_on", "label"}
_META_LINE = re.compile(r"^#\s*([A-Za-z_]+)\s*:\s*(.*?)\s*$")


def detect_format(name: str | None, data: bytes) -> str:
    """Format from a file name's suffix, else from the first bytes."""
    suffix = Path(name).suffix.lower().lstrip(".") if name else ""
    if suffix in FORMATS:
        return suffix
    if data[:4] == b"PAR1":
        return "parquet"
    head = data.lstrip(b"\xef\xbb\xbf \t\r\n")[:1]
    return "json" if head in (b"{", b"[") else "csv"


def read_night(path: str | Path, *, participant_id: str = "", options: NightOptions = NightOptions(),
               fmt: str | None = None) -> Night:
    """Read one night file (format from ``fmt`` or the suffix/content)."""
    path = Path(path)
    data = path.read_bytes()
    fmt = fmt or detect_format(path.name, data)
    from .tabular import night_from_csv, night_from_parquet

    reader = {"json": night_from_json, "csv": night_from_csv, "parquet": night_from_parquet}[fmt]
    return reader(data, participant_id=participant_id, options=options, source=str(path))


# ---- shared helpers ----------------------------------------------------------------------------
def _decode(data: bytes | str, source: str | None) -> str:
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


def _parse_time(value: Any, field: str, tz: str | None, problems: list[Problem]) -> pd.Timestamp | None:
    if not isinstance(value, str):
        problems.append(Problem("invalid_timestamp", f"{field} must be an ISO 8601 text, got {value!r}",
                                {"field": field}))
        return None
    try:
        ts = pd.Timestamp(value)
    except (ValueError, TypeError):
        problems.append(Problem("invalid_timestamp", f"{field} {value!r} is not an ISO 8601 time", {"field": field}))
        return None
    if ts is pd.NaT:
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


def _night_kwargs_meta(meta: dict[str, Any], tz: str | None, problems: list[Problem]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key in ("lights_off", "lights_on"):
        if meta.get(key) not in (None, ""):
            out[key] = _parse_time(meta[key], key, tz, problems)
    label = meta.get("label")
    if label is not None and not isinstance(label, str):
        problems.append(Problem("invalid_field", f"label must be text, got {type(label).__name__}",
                                {"field": "label"}))
        label = None
    out["label"] = label
    return out


def _finish(night: Night, options: NightOptions) -> Night:
    return night if options.aggregate_to in (None, night.epoch_seconds) else aggregate_epochs(night, options.aggregate_to)


# ---- JSON --------------------------------------------------------------------------------------
def night_from_json(data: bytes | str | dict, *, participant_id: str = "", options: NightOptions = NightOptions(),
                    source: str | None = None) -> Night:
    """Night from nightbank JSON (bytes, text or an already decoded object)."""
    if isinstance(data, dict):
        obj: Any = data
    else:
        text = _decode(data, source)
        if not text.strip():
            raise InvalidNightError([Problem("empty_file", "the file is empty", {"row": 1})], source=source)
        try:
            obj = json.loads(text)
        except json.JSONDecodeError as exc:
            raise InvalidNightError([Problem("malformed_json", f"not valid JSON at line {exc.lineno} column "
                                             f"{exc.colno}: {exc.msg}", {"row": exc.lineno, "column": exc.colno})],
                                    source=source) from None
    if not isinstance(obj, dict):
        raise InvalidNightError([Problem("malformed_json", f"the top level must be an object, got "
                                         f"{type(obj).__name__}", {"field": "$"})], source=source)
    problems: list[Problem] = []
    for key in sorted(set(obj) - _JSON_FIELDS):
        problems.append(Problem("unknown_field", f"unknown field {key!r}; allowed: {sorted(_JSON_FIELDS)}",
                                {"field": key}))
    for key in ("epoch_seconds", "start", "counts"):
        if key not in obj:
            problems.append(Problem("missing_field", f"required field {key!r} is missing", {"field": key}))
    counts = obj.get("counts")
    if counts is not None and not isinstance(counts, list):
        problems.append(Problem("invalid_field", f"counts must be a list of numbers, got {type(counts).__name__}",
                                {"field": "counts"}))
        counts = None
    if counts is not None and options.fill_gaps and any(c is None for c in counts):
        counts = [np.nan if c is None else c for c in counts]
    reference = obj.get("reference")
    if reference is not None and not isinstance(reference, list):
        problems.append(Problem("invalid_field", f"reference must be a list of labels, got "
                                f"{type(reference).__name__}", {"field": "reference"}))
        reference = None
    start = _parse_time(obj["start"], "start", options.tz, problems) if "start" in obj else None
    meta = _night_kwargs_meta(obj, options.tz, problems)
    night = validate_night_fields(participant_id=participant_id, start=start,
                                  epoch_seconds=obj.get("epoch_seconds", 30), counts=counts, reference=reference,
                                  options=options, problems=problems, source=source, **meta)
    return _finish(night, options)


def night_to_json(night: Night) -> dict[str, Any]:
    """nightbank JSON object of a night (missing epochs as ``null`` counts)."""
    counts = night.counts
    as_int = np.all(np.isnan(counts) | (counts == np.round(counts)))
    values = [None if np.isnan(c) else (int(c) if as_int else float(c)) for c in counts.tolist()]
    out: dict[str, Any] = {"epoch_seconds": night.epoch_seconds, "start": night.start.isoformat(), "counts": values}
    if night.reference is not None:
        out["reference"] = night.reference.tolist()
    for key in ("lights_off", "lights_on"):
        if getattr(night, key) is not None:
            out[key] = getattr(night, key).isoformat()
    if night.label is not None:
        out["label"] = night.label
    return out
