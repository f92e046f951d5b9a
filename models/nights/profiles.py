"""Import profiles: how one lab's export is laid out, saved once and used by name at ingest.

A profile says where a CSV export's rows begin, how its fields are separated and written, which
columns hold the epoch time, the counts and the reference, how times are written and in which zone,
and how the reference's own codes map onto nightbank's stage codes. Every field is optional: a
field left out falls back to what the reader finds by itself (sniffed delimiter, header aliases,
ISO 8601 times).
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from ..errors import NightbankError, Problem
from .timestamps import zone_of

__all__ = ["PROFILE_COLUMN_ROLES", "PROFILE_STAGE_TARGETS", "ImportProfile", "InvalidProfileError"]

#: column roles a profile may map; ``time`` alone or ``date`` + ``time`` (a date column and a time-of-day column);
#: ``marker`` (event-marker presses) is read by continuous recordings and left unused by nights
PROFILE_COLUMN_ROLES = ("date", "time", "counts", "reference", "marker")
#: codes a profile's ``stage_codes`` may map to: AASM stages, ``S`` (sleep of unknown stage), ``?`` (unscored)
PROFILE_STAGE_TARGETS = ("W", "N1", "N2", "N3", "R", "S", "?")
_DELIMITERS = (",", ";", "\t", "|")
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")
_FIELDS = ("name", "delimiter", "skip_rows", "decimal", "columns", "datetime_format", "tz", "stage_codes",
           "ignore_columns", "encoding")
_SAMPLE_TIME = datetime(2031, 3, 2, 22, 41, 30)  # a sample time: a format must write and read it back


class InvalidProfileError(NightbankError):
    """A profile failed validation; ``problems`` names every bad field (``location.field``)."""

    code = "invalid_profile"

    def __init__(self, problems: list[Problem]) -> None:
        self.problems = list(problems)
        super().__init__("; ".join(p.message for p in self.problems))


@dataclass(frozen=True)
class ImportProfile:
    """How one lab's night export is laid out.

    Parameters
    ----------
    name : str
        The profile's name within its study: letters, digits, ``_ . -``; at most 64 characters.
    delimiter : {",", ";", "\\t", "|"}, optional
        Field separator; sniffed from the header when not given.
    skip_rows : int, default=0
        Lines before the header row (a preamble of device metadata), 0..1000.
    decimal : {".", ","}, default="."
        Decimal mark of the counts column.
    columns : dict, optional
        Header of each role in :data:`PROFILE_COLUMN_ROLES`. ``date`` needs ``time`` (then ``time`` holds
        the time of day); without ``date``, ``time`` holds full timestamps.
    datetime_format : str, optional
        ``strftime`` format of the times (of ``date`` + ``" "`` + ``time`` when both are mapped); strict
        ISO 8601 when not given.
    tz : str, optional
        IANA time zone of times written without a UTC offset.
    stage_codes : dict, optional
        The reference's codes (compared as text after stripping blanks, case-insensitively) mapped to
        :data:`PROFILE_STAGE_TARGETS`; a reference value without an entry is read as usual.
    ignore_columns : tuple of str, default=()
        Columns to leave unused on purpose (a reference-like header is refused unless listed here).
    encoding : str, default="utf-8"
        Text encoding of the file.
    """

    name: str
    delimiter: str | None = None
    skip_rows: int = 0
    decimal: str = "."
    columns: Mapping[str, str] = field(default_factory=dict)
    datetime_format: str | None = None
    tz: str | None = None
    stage_codes: Mapping[str, str] = field(default_factory=dict)
    ignore_columns: tuple[str, ...] = ()
    encoding: str = "utf-8"

    def __post_init__(self) -> None:
        object.__setattr__(self, "columns", dict(self.columns))
        object.__setattr__(self, "stage_codes", {str(k).strip(): v for k, v in self.stage_codes.items()})
        object.__setattr__(self, "ignore_columns", tuple(self.ignore_columns))
        problems = _problems(self)
        if problems:
            raise InvalidProfileError(problems)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> ImportProfile:
        """Profile from its JSON form; every problem is named by its field.

        Raises
        ------
        InvalidProfileError
            Unknown fields, wrong types, unknown roles or target codes, a format string that cannot
            write and read back a time, an unknown zone.
        """
        if not isinstance(data, Mapping):
            raise InvalidProfileError([Problem("invalid_profile", "a profile is a JSON object", {"field": ""})])
        problems = [Problem("unknown_field", f"unknown profile field {k!r}; known: {', '.join(_FIELDS)}",
                            {"field": str(k)}) for k in data if k not in _FIELDS]
        if "name" not in data:
            problems.append(Problem("missing_field", "a profile needs a name", {"field": "name"}))
        kinds: dict[str, tuple[type, ...]] = {
            "name": (str,), "delimiter": (str, type(None)), "skip_rows": (int,), "decimal": (str,),
            "columns": (dict,), "datetime_format": (str, type(None)), "tz": (str, type(None)),
            "stage_codes": (dict,), "ignore_columns": (list, tuple), "encoding": (str,),
        }
        for key, types in kinds.items():
            value = data.get(key)
            if key in data and (not isinstance(value, types) or isinstance(value, bool)):
                want = " or ".join("null" if t is type(None) else t.__name__ for t in types)
                problems.append(Problem("invalid_type", f"profile field {key!r} must be {want}", {"field": key}))
        for key in ("columns", "stage_codes"):
            value = data.get(key)
            if isinstance(value, dict):
                for k, v in value.items():
                    if not isinstance(v, str):
                        problems.append(Problem("invalid_type", f"{key}.{k} must be a string",
                                                {"field": f"{key}.{k}"}))
        if isinstance(data.get("ignore_columns"), list | tuple):
            if not all(isinstance(c, str) for c in data["ignore_columns"]):
                problems.append(Problem("invalid_type", "ignore_columns must list strings",
                                        {"field": "ignore_columns"}))
        if problems:
            raise InvalidProfileError(problems)
        return cls(**{k: data[k] for k in _FIELDS if k in data})

    def to_dict(self) -> dict[str, Any]:
        """JSON form (only fields that differ from their defaults, plus ``name``)."""
        out: dict[str, Any] = {"name": self.name}
        if self.delimiter is not None:
            out["delimiter"] = self.delimiter
        if self.skip_rows:
            out["skip_rows"] = self.skip_rows
        if self.decimal != ".":
            out["decimal"] = self.decimal
        if self.columns:
            out["columns"] = dict(self.columns)
        if self.datetime_format is not None:
            out["datetime_format"] = self.datetime_format
        if self.tz is not None:
            out["tz"] = self.tz
        if self.stage_codes:
            out["stage_codes"] = dict(self.stage_codes)
        if self.ignore_columns:
            out["ignore_columns"] = list(self.ignore_columns)
        if self.encoding != "utf-8":
            out["encoding"] = self.encoding
        return out

    def stage_code(self, value: object) -> str | None:
        """The mapped stage code of a reference value, or None when the profile does not map it."""
        if not self.stage_codes:
            return None
        key = str(value).strip()
        hit = self.stage_codes.get(key)
        if hit is None:
            lower = {k.lower(): v for k, v in self.stage_codes.items()}
            hit = lower.get(key.lower())
        return hit


def _problems(p: ImportProfile) -> list[Problem]:
    out: list[Problem] = []
    if not isinstance(p.name, str) or not _NAME.match(p.name):
        out.append(Problem("invalid_name", "name must be 1-64 letters, digits, '_', '.' or '-', starting with a "
                           "letter or digit", {"field": "name"}))
    if p.delimiter is not None and p.delimiter not in _DELIMITERS:
        out.append(Problem("invalid_delimiter", f"delimiter must be one of {list(_DELIMITERS)!r}",
                           {"field": "delimiter"}))
    if not isinstance(p.skip_rows, int) or isinstance(p.skip_rows, bool) or not 0 <= p.skip_rows <= 1000:
        out.append(Problem("invalid_skip_rows", "skip_rows must be a whole number from 0 to 1000",
                           {"field": "skip_rows"}))
    if p.decimal not in (".", ","):
        out.append(Problem("invalid_decimal", "decimal must be '.' or ','", {"field": "decimal"}))
    elif p.decimal == "," and p.delimiter == ",":
        out.append(Problem("invalid_decimal", "a decimal comma needs another delimiter than ','",
                           {"field": "decimal"}))
    for role, header in p.columns.items():
        if role not in PROFILE_COLUMN_ROLES:
            out.append(Problem("unknown_role", f"columns.{role}: unknown role; roles are "
                               f"{', '.join(PROFILE_COLUMN_ROLES)}", {"field": f"columns.{role}"}))
        elif not isinstance(header, str) or not header.strip():
            out.append(Problem("invalid_column", f"columns.{role} must name a header", {"field": f"columns.{role}"}))
    if "date" in p.columns and "time" not in p.columns:
        out.append(Problem("missing_column", "columns.date needs columns.time (the time of day)",
                           {"field": "columns.time"}))
    if p.datetime_format is not None:
        out.extend(_format_problems(p.datetime_format))
    if p.tz is not None:
        zone_of(p.tz, out)
    for code, target in p.stage_codes.items():
        if target not in PROFILE_STAGE_TARGETS:
            out.append(Problem("unknown_stage_target", f"stage_codes.{code} maps to {target!r}; targets are "
                               f"{', '.join(PROFILE_STAGE_TARGETS)}", {"field": f"stage_codes.{code}"}))
    if not all(isinstance(c, str) for c in p.ignore_columns):
        out.append(Problem("invalid_type", "ignore_columns must list strings", {"field": "ignore_columns"}))
    try:
        "".encode(p.encoding)
    except (LookupError, TypeError):
        out.append(Problem("unknown_encoding", f"encoding {p.encoding!r} is not known", {"field": "encoding"}))
    return out


def _format_problems(fmt: str) -> list[Problem]:
    where = {"field": "datetime_format"}
    if "%" not in fmt:
        return [Problem("invalid_datetime_format", f"datetime_format {fmt!r} has no % directive", where)]
    try:
        written = _SAMPLE_TIME.strftime(fmt)
        back = datetime.strptime(written, fmt)
    except ValueError as exc:
        return [Problem("invalid_datetime_format", f"datetime_format {fmt!r} cannot be used: {exc}", where)]
    for part in ("year", "month", "day", "hour", "minute"):
        if getattr(back, part) != getattr(_SAMPLE_TIME, part):
            return [Problem("invalid_datetime_format", f"datetime_format {fmt!r} does not give the {part} "
                            "(a time written with it does not read back)", where)]
    return []
