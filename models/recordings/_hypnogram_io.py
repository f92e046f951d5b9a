"""Hypnogram readers: CSV ``time,stage`` and JSON (format rules in :mod:`models.recordings.hypnogram`).

The readers raise :class:`~models.errors.InvalidNightError`; :func:`~models.recordings.hypnogram.read_hypnogram`
turns it into :class:`~models.recordings.hypnogram.InvalidHypnogramError`.
"""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Mapping
from datetime import tzinfo
from pathlib import PurePath
from typing import NamedTuple

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ..errors import InvalidNightError, Problem
from ..nights import COLUMN_ALIASES, ImportProfile, canonical_stage, looks_like_reference
from ..nights._decoding import decode_json, decode_text, parse_time
from ..nights._table import times_to_utc
from ..nights.checks import MAX_LISTED
from ..nights.columns import header_key

__all__ = ["EPOCH_SECONDS", "MAX_EPOCHS", "HypnogramParts", "hypnogram_from_csv", "hypnogram_from_json"]

#: the PSG epoch length, seconds (AASM scoring epoch; Iber et al. 2007)
EPOCH_SECONDS = 30
#: most epochs a hypnogram may have (48 h of 30-s epochs: one night with a wide margin)
MAX_EPOCHS = 5760


class HypnogramParts(NamedTuple):
    """The checked fields of a hypnogram as read (the caller builds the Hypnogram)."""

    start: pd.Timestamp
    stages: NDArray[np.str_]
    source_name: str | None
    unused_columns: tuple[str, ...]

_DELIMITERS = (",", ";", "\t", "|")
_JSON_FIELDS = ("start", "epoch_seconds", "stages")
_ROLES = {"time": "time", "date": "date", "stage": "reference"}  # our role -> the profile's role name


def _name(source: str | None) -> str | None:
    return (PurePath(source).name or None) if source else None


def _stage(value: object, profile: ImportProfile | None) -> str | None:
    """Canonical stage of one written value (the profile's ``stage_codes`` first), None when unknown."""
    if profile is not None and profile.stage_codes and value is not None and not isinstance(value, bool | list
                                                                                                | dict):
        hit = profile.stage_code(value)
        if hit is None:  # "1.0" or 1.0 written for the code 1
            try:
                number = float(str(value))
            except ValueError:
                number = float("nan")
            if number.is_integer():
                hit = profile.stage_code(int(number))
        if hit is not None:
            return hit
    if isinstance(value, bool | list | dict):
        return None
    return canonical_stage(value.strip() if isinstance(value, str) else value)


def _stages(values: list[object], profile: ImportProfile | None, field: str, row0: int | None,
            problems: list[Problem]) -> NDArray[np.str_]:
    """Canonical codes of the written stages; ``unknown_stage`` (first row/epoch, values) for the rest."""
    keys = [v if isinstance(v, str) else json.dumps(v) for v in values]
    uniq, inverse = np.unique(np.asarray(keys, dtype=object), return_inverse=True)
    first_value = {k: v for k, v in zip(keys[::-1], values[::-1], strict=True)}
    mapped = [_stage(first_value[u], profile) for u in uniq]
    unknown = [str(u) for u, m in zip(uniq, mapped, strict=True) if m is None]
    if unknown:
        bad = np.flatnonzero(np.isin(np.asarray(keys, dtype=object), unknown))
        i = int(bad[0])
        where = {"field": field, "epoch": i, "values": unknown[:MAX_LISTED]}
        if row0 is not None:
            where["row"] = row0 + i
        at = f"row {row0 + i}" if row0 is not None else f"epoch {i}"
        problems.append(Problem("unknown_stage", f"{bad.size} stage(s) use unknown codes {unknown[:MAX_LISTED]!r}, "
                                f"first at {at}; allowed: W N1 N2 N3 R (AASM), S1 S2 S3 S4 REM MT (R&K), S/W, 1/0, "
                                "and ? U - or empty for unscored, or the profile's stage codes", where))
        return np.full(len(values), "?", dtype="<U3")
    return np.asarray([m or "?" for m in mapped], dtype="<U3")[inverse]


def _finish(start: pd.Timestamp | None, stages: NDArray[np.str_], problems: list[Problem], source: str | None,
            unused: tuple[str, ...] = (), field: str = "stages") -> HypnogramParts:
    if stages.size > MAX_EPOCHS:
        problems.append(Problem("too_many_epochs", f"{stages.size} epochs exceed the limit of "
                                f"{MAX_EPOCHS} (48 h)", {"field": field}))
    elif stages.size and not problems and (stages == "?").all():
        problems.append(Problem("no_scored_epochs", "every epoch is unscored; check the stage column and the "
                                "profile's stage codes", {"field": field}))
    if problems or start is None:
        raise InvalidNightError(problems, source=source)
    return HypnogramParts(start, stages, _name(source), unused)


def hypnogram_from_json(data: bytes | str | Mapping[str, object], *, profile: ImportProfile | None = None,
                        tz: str | None = None, source: str | None = None) -> HypnogramParts:
    """Hypnogram from JSON ``{"start", "epoch_seconds", "stages"}`` (bytes, text or a decoded object)."""
    obj = data if isinstance(data, Mapping) else decode_json(data, source)
    if not isinstance(obj, Mapping):
        raise InvalidNightError([Problem("malformed_json", f"the top level must be an object, got "
                                             f"{type(obj).__name__}", {"field": "$"})], source=source)
    problems = [Problem("unknown_field", f"unknown field {k!r}; allowed: {list(_JSON_FIELDS)}", {"field": str(k)})
                for k in obj if k not in _JSON_FIELDS]
    problems += [Problem("missing_field", f"required field {k!r} is missing", {"field": k})
                 for k in _JSON_FIELDS if k not in obj]
    zone = tz if tz is not None else (profile.tz if profile is not None else None)
    start = parse_time(obj["start"], "start", zone, problems) if "start" in obj else None
    epoch = obj.get("epoch_seconds", EPOCH_SECONDS)
    if not isinstance(epoch, int | float) or isinstance(epoch, bool) or epoch != EPOCH_SECONDS:
        problems.append(Problem("unsupported_epoch_length", f"epoch_seconds must be {EPOCH_SECONDS} "
                                f"(the PSG scoring epoch), got {epoch!r}", {"field": "epoch_seconds"}))
    raw = obj.get("stages", [])
    stages = np.zeros(0, dtype="<U3")
    if not isinstance(raw, list):
        problems.append(Problem("invalid_field", f"stages must be a list of stage codes, got {type(raw).__name__}",
                                {"field": "stages"}))
    elif not raw and "stages" in obj:
        problems.append(Problem("too_short", "stages is empty; a hypnogram needs at least one epoch",
                                {"field": "stages"}))
    else:
        stages = _stages(list(raw), profile, "stages", None, problems)
    return _finish(start, stages, problems, source)


def _skip(lines: list[str], skip: int) -> int:
    """Index of the header line: after ``skip`` lines and any ``#`` lines."""
    i = min(skip, len(lines))
    while i < len(lines) and lines[i].startswith("#"):
        i += 1
    return i


def _find(names: list[str], profile: ImportProfile | None, header_row: int,
          problems: list[Problem]) -> tuple[dict[str, int | None], tuple[str, ...]]:
    """Column index of each role (None when absent) and the unused headers; problems recorded."""
    keys = [header_key(n) for n in names]
    ignored = {header_key(c) for c in profile.ignore_columns} if profile is not None else set()
    named = dict(profile.columns) if profile is not None else {}
    found: dict[str, int | None] = {}
    for role, profile_role in _ROLES.items():
        if profile_role in named:
            want = header_key(named[profile_role])
            found[role] = keys.index(want) if want in keys else None
            if found[role] is None:
                problems.append(Problem("missing_column", f"column {named[profile_role]!r} that profile "
                                        f"{profile.name if profile else ''!r} names for {profile_role} is not in the "
                                        f"header {names!r}", {"field": named[profile_role], "row": header_row}))
            continue
        if role == "date":
            found[role] = None
            continue
        taken = set(found.values())
        found[role] = next((keys.index(a) for a in COLUMN_ALIASES[profile_role]
                            if a in keys and keys.index(a) not in taken and a not in ignored), None)
        if found[role] is None:
            problems.append(Problem("missing_column", f"no {role} column: the header {names!r} has none of "
                                    f"{list(COLUMN_ALIASES[profile_role])!r}", {"field": role, "row": header_row}))
    used = {i for i in found.values() if i is not None}
    unused = tuple(n for i, n in enumerate(names) if i not in used and keys[i] not in ignored and n.strip())
    for n in unused:
        if looks_like_reference(n):
            problems.append(Problem("unmapped_reference_column", f"column {n!r} looks like a second scoring but is "
                                    "not the stage column; map it as the reference or list it in the profile's "
                                    "ignore_columns", {"field": n, "row": header_row}))
    return found, unused


def _grid(utc_ns: NDArray[np.int64], zone: tzinfo | None, row0: int, field: str, problems: list[Problem]) -> bool:
    """Whether the rows are exactly one PSG epoch apart; spacing problems recorded."""
    step = np.diff(utc_ns)
    want = EPOCH_SECONDS * 1_000_000_000
    for code, mask, what in (("duplicate_timestamp", step == 0, "repeats the previous time"),
                             ("time_not_increasing", step < 0, "goes back in time"),
                             ("irregular_spacing", (step > 0) & (step != want),
                              f"is not {EPOCH_SECONDS} s after the previous one")):
        idx = np.flatnonzero(mask) + 1
        if idx.size:
            i = int(idx[0])
            when = pd.Timestamp(int(utc_ns[i]), tz="UTC").tz_convert(zone or "UTC").isoformat()
            if code == "irregular_spacing" and (step == step[0]).all():
                code, message = "unsupported_epoch_length", (f"rows are {step[0] / 1e9:g} s apart; PSG epochs "
                                                             f"must be {EPOCH_SECONDS} s")
            else:
                message = f"{idx.size} row(s) where the time {what}, first at row {row0 + i} ({when})"
            problems.append(Problem(code, message, {"field": field, "row": row0 + i, "epoch": i, "time": when}))
            return False
    return True


def hypnogram_from_csv(data: bytes | str, *, profile: ImportProfile | None = None, tz: str | None = None,
                       source: str | None = None) -> HypnogramParts:
    """Hypnogram from CSV text with a time column and a stage column (bytes or text)."""
    import pyarrow as pa

    text = decode_text(data, source, profile.encoding if profile is not None else "utf-8")
    lines = text.splitlines()
    h = _skip(lines, profile.skip_rows if profile is not None else 0)
    while len(lines) > h and not lines[-1].strip():
        lines.pop()
    if h >= len(lines) or not lines[h].strip():
        raise InvalidNightError([Problem("empty_file", "the file has no header row", {"row": h + 1})],
                                    source=source)
    header = lines[h]
    sep = profile.delimiter if profile is not None and profile.delimiter else max(_DELIMITERS, key=header.count)
    names = [c.strip() for c in next(csv.reader([header], delimiter=sep))]
    problems: list[Problem] = []
    if len(names) < 2:
        problems.append(Problem("missing_column", f"the header {header[:80]!r} has a single column; expected time "
                                "and stage", {"row": h + 1}))
        raise InvalidNightError(problems, source=source)
    cols, unused = _find(names, profile, h + 1, problems)
    rows = list(csv.reader(io.StringIO("\n".join(lines[h + 1:])), delimiter=sep))
    row0 = h + 2  # file line of the first data row
    short = [i for i, r in enumerate(rows) if len(r) != len(names)]
    if short:
        i = short[0]
        problems.append(Problem("malformed_csv", f"{len(short)} line(s) do not match the {sep!r}-delimited header "
                                f"of {len(names)} columns, first line {row0 + i} with {len(rows[i])}",
                                {"row": row0 + i}))
    if not rows:
        problems.append(Problem("too_short", "the file has a header but no rows", {"row": row0}))
    if short or not rows or cols["time"] is None or cols["stage"] is None:
        raise InvalidNightError(problems, source=source)
    if len(rows) > MAX_EPOCHS:
        return _finish(None, np.zeros(len(rows), dtype="<U3"), problems, source, field=names[cols["stage"]])
    time_field = names[cols["time"]]
    time_col = pa.array([r[cols["time"]] for r in rows], pa.string())
    date_col = None if cols["date"] is None else pa.array([r[cols["date"]] for r in rows], pa.string())
    zone = tz if tz is not None else (profile.tz if profile is not None else None)
    times = times_to_utc(time_col, date_col, fmt=profile.datetime_format if profile is not None else None, tz=zone,
                         row0=row0, field=time_field, problems=problems)
    start = None
    if times is not None:
        utc_ns, placed = times
        shown: tzinfo | None = placed
        if shown is None and (profile is None or profile.datetime_format is None):
            try:
                shown = pd.Timestamp(rows[0][cols["time"]].strip()).tzinfo
            except (ValueError, TypeError):
                shown = None
        if len(rows) < 2:
            problems.append(Problem("too_short", "a CSV hypnogram needs at least two rows to check the epoch "
                                    "length", {"field": time_field, "row": row0}))
        elif _grid(utc_ns, shown, row0, time_field, problems):
            start = pd.Timestamp(int(utc_ns[0]), tz="UTC").tz_convert(shown or "UTC")
    stage_field = names[cols["stage"]]
    stages = _stages([r[cols["stage"]] for r in rows], profile, stage_field, row0, problems)
    return _finish(start, stages, problems, source, unused, field=stage_field)
