"""What the night readers share: text decoding, timestamps and metadata fields (private to the package)."""

from __future__ import annotations

import codecs
import json
import re
from collections.abc import Mapping
from typing import Any, TypedDict

import numpy as np
import pandas as pd

from ..errors import InvalidNightError, Problem
from .checks import NightOptions
from .night import Night
from .resample import aggregate_epochs
from .timestamps import EARLIEST_PLAUSIBLE_DATE, ISO_8601_PATTERN, LATEST_PLAUSIBLE_DATE, zone_of

__all__ = ["JSON_MAX_DEPTH", "JSON_MAX_NUMBER_DIGITS", "META_LINE", "PARQUET_MAX_COLUMNS", "PARQUET_MAX_EXPANDED_BYTES",
           "NightMetadata", "decode_json", "decode_text", "finish_night", "load_json", "metadata_fields",
           "parquet_bounds_problem", "parse_time"]

#: deepest nesting of arrays and objects accepted in a JSON file (a night needs 2)
JSON_MAX_DEPTH = 64
#: most digits in one JSON number (integer part, fraction and exponent each); no count needs more
JSON_MAX_NUMBER_DIGITS = 30

_JSON_STRING = re.compile(r'"(?:[^"\\]|\\.)*"', re.DOTALL)
_NOT_BRACKET = re.compile(r"[^\[\]{}]+")
_LONG_DIGITS = re.compile(f"[0-9]{{{JSON_MAX_NUMBER_DIGITS + 1},}}")

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


#: every byte that is a digit becomes "0", every other byte a blank (for the quick bounds check)
_DIGIT_MASK = bytes(48 if 48 <= i <= 57 else 32 for i in range(256))


def _plainly_within_bounds(text: str) -> bool:
    """True when the text cannot break the bounds, whatever its strings hold (a quick check in C).

    Fewer opening brackets in the whole text than :data:`JSON_MAX_DEPTH` cannot nest deeper, and
    no run of more than :data:`JSON_MAX_NUMBER_DIGITS` digits anywhere means no such number outside
    strings either; otherwise the full scan decides.
    """
    if text.count("[") + text.count("{") > JSON_MAX_DEPTH:
        return False
    return b"0" * (JSON_MAX_NUMBER_DIGITS + 1) not in text.encode("utf-8", "surrogatepass").translate(_DIGIT_MASK)


def _json_bounds_problem(text: str) -> Problem | None:
    """``json_too_deep`` or ``json_number_too_long`` found by a scan outside strings, before parsing.

    The scan is linear in the text: strings are blanked by one regular expression, then the
    nesting depth is the running sum of opening minus closing brackets.
    """
    if _plainly_within_bounds(text):
        return None
    bare = _JSON_STRING.sub('""', text)
    long_number = _LONG_DIGITS.search(bare)
    if long_number is not None:
        return Problem("json_number_too_long", f"a number has more than {JSON_MAX_NUMBER_DIGITS} digits "
                       f"(at character {long_number.start()} outside strings)", {"field": "$"})
    brackets = np.frombuffer(_NOT_BRACKET.sub("", bare).encode("ascii"), dtype=np.uint8)
    depth, level = 0, 0
    for at in range(0, brackets.size, 2**20):  # in chunks: the scan's memory stays a few MB
        steps = np.where((brackets[at:at + 2**20] & 0x02) != 0, 1, -1).astype(np.int32)  # [{ vs ]}
        running = level + np.cumsum(steps)
        depth, level = max(depth, int(running.max())), int(running[-1])
    if depth > JSON_MAX_DEPTH:
        return Problem("json_too_deep", f"arrays and objects are nested {depth} deep; at most {JSON_MAX_DEPTH} "
                       "levels are read", {"field": "$"})
    return None


#: most bytes a Parquet night's columns may expand to, read from the file's metadata before any data
PARQUET_MAX_EXPANDED_BYTES = 256 * 2**20
#: most columns a Parquet night may have
PARQUET_MAX_COLUMNS = 64


def parquet_bounds_problem(metadata: Any, max_rows: int) -> Problem | None:
    """``too_many_epochs`` or ``parquet_too_large`` from a Parquet file's footer (``pyarrow`` FileMetaData).

    Rows, columns and the uncompressed size of every column chunk are read from the footer, so a
    small file that would expand to gigabytes is refused before a single page is decoded.
    """
    if metadata.num_rows > max_rows:
        return Problem("too_many_epochs", f"the file has {metadata.num_rows} rows (from its metadata); the limit is "
                       f"{max_rows} epochs", {"field": "counts", "values": [int(metadata.num_rows), max_rows]})
    if metadata.num_columns > PARQUET_MAX_COLUMNS:
        return Problem("parquet_too_large", f"the file has {metadata.num_columns} columns; at most "
                       f"{PARQUET_MAX_COLUMNS} are read", {"field": "$"})
    expanded = sum(metadata.row_group(g).column(c).total_uncompressed_size
                   for g in range(metadata.num_row_groups) for c in range(metadata.num_columns))
    if expanded > PARQUET_MAX_EXPANDED_BYTES:
        return Problem("parquet_too_large", f"the file's columns expand to {expanded / 2**20:.0f} MB (from its "
                       f"metadata); at most {PARQUET_MAX_EXPANDED_BYTES // 2**20} MB are read", {"field": "$"})
    return None


def load_json(text: str) -> tuple[object, Problem | None]:
    """The JSON value of ``text`` and None, or None and the problem (bounds, syntax) naming where."""
    found = _json_bounds_problem(text)
    if found is not None:
        return None, found
    try:
        return json.loads(text), None
    except json.JSONDecodeError as exc:
        return None, Problem("malformed_json", f"not valid JSON at line {exc.lineno} column {exc.colno}: "
                             f"{exc.msg}", {"row": exc.lineno, "column": exc.colno})
    except (ValueError, RecursionError) as exc:  # limits of the parser itself, reached despite the scan
        return None, Problem("malformed_json", f"the JSON cannot be read: {type(exc).__name__}", {"field": "$"})


def decode_json(data: bytes | str, source: str | None) -> object:
    """The JSON value of a file's content; an empty file, invalid or too deeply nested JSON is refused.

    Nesting deeper than :data:`JSON_MAX_DEPTH` and numbers longer than :data:`JSON_MAX_NUMBER_DIGITS`
    digits are refused before the text is parsed (codes ``json_too_deep``, ``json_number_too_long``).
    """
    text = decode_text(data, source)
    if not text.strip():
        raise InvalidNightError([Problem("empty_file", "the file is empty", {"row": 1})], source=source)
    value, problem = load_json(text)
    if problem is not None:
        raise InvalidNightError([problem], source=source)
    return value


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
