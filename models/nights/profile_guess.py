"""A first import profile guessed from a sample export, for a person to confirm.

:func:`guess_profile` looks at the bytes of one export and proposes every field of an
:class:`~models.nights.profiles.ImportProfile`: the encoding (UTF-8, UTF-8 with a byte-order mark,
UTF-16 with one, else Latin-1), the delimiter (the one that splits the most lines into the same
number of fields), the preamble (the lines before the first line with that number of fields), a
decimal comma, the time columns and their format, the counts column and the reference column with
a proposal for its codes. What it cannot know (the zone of naive times, the polarity of 0/1 codes,
a choice between equally good readings) it says in ``notes``.
"""

from __future__ import annotations

import codecs
import csv
import re
from collections import Counter
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from ..errors import InvalidNightError
from .checks import NightOptions
from .columns import COLUMN_ALIASES, header_key, looks_like_reference
from .profiles import ImportProfile
from .tabular import night_from_csv
from .timestamps import ISO_8601_PATTERN

__all__ = ["DATETIME_FORMATS", "DATE_FORMATS", "ProfileGuess", "TIME_OF_DAY_FORMATS", "guess_profile"]

#: timestamp formats tried for a single time column, in order of preference (day-first before month-first)
DATETIME_FORMATS: tuple[str, ...] = (
    "%Y-%m-%d %H:%M:%S", "%Y/%m/%d %H:%M:%S", "%d/%m/%Y %H:%M:%S", "%d.%m.%Y %H:%M:%S", "%d-%m-%Y %H:%M:%S",
    "%m/%d/%Y %H:%M:%S", "%m/%d/%Y %I:%M:%S %p", "%Y-%m-%d %H:%M", "%d/%m/%Y %H:%M", "%d.%m.%Y %H:%M",
    "%m/%d/%Y %H:%M", "%d/%m/%y %H:%M:%S", "%d.%m.%y %H:%M:%S", "%m/%d/%y %H:%M:%S",
)
#: formats tried for a date column (joined with a time-of-day column by a blank)
DATE_FORMATS: tuple[str, ...] = ("%Y-%m-%d", "%Y/%m/%d", "%d/%m/%Y", "%d.%m.%Y", "%d-%m-%Y", "%m/%d/%Y",
                                 "%d/%m/%y", "%d.%m.%y", "%m/%d/%y")
#: formats tried for a time-of-day column
TIME_OF_DAY_FORMATS: tuple[str, ...] = ("%H:%M:%S", "%H:%M", "%I:%M:%S %p", "%I:%M %p")

_SAMPLE_ROWS = 5000  # data rows looked at
_PREVIEW_ROWS = 5
_DELIMITERS = (";", "\t", "|", ",")  # ties go to the earlier: a comma may be a decimal mark
_DECIMAL_COMMA = re.compile(r"^-?\d+,\d+$")
_NUMBER = {".": re.compile(r"^-?\d+(?:\.\d+)?$"), ",": re.compile(r"^-?\d+(?:,\d+)?$")}
_COUNT_HINTS = ("count", "activ", "aktiv", "movement", "bewegung", "zcm", "pim")
_RK = {"0": "W", "1": "N1", "2": "N2", "3": "N3", "4": "N3", "5": "R", "6": "?", "9": "?"}
_WORDS = {
    "W": ("w", "wake", "awake", "wach", "wk"), "R": ("r", "rem", "stage r", "stage rem", "rem sleep"),
    "N1": ("n1", "s1", "stage 1", "stage n1", "nrem1", "nrem 1"), "N2": ("n2", "s2", "stage 2", "stage n2", "nrem2",
                                                                         "nrem 2"),
    "N3": ("n3", "s3", "s4", "n4", "stage 3", "stage 4", "stage n3", "nrem3", "nrem 3", "sws"),
    "S": ("s", "sleep", "asleep", "schlaf"),
    "?": ("?", "u", "-", "unscored", "not scored", "unknown", "artefact", "artifact", "a", "x", "movement",
          "movement time"),
}
_WORD_CODE = {w: code for code, words in _WORDS.items() for w in words}


@dataclass(frozen=True)
class ProfileGuess:
    """A guessed profile with what it reads from the sample.

    Attributes
    ----------
    profile : ImportProfile
        The proposal (reads the sample back with :func:`~models.nights.tabular.night_from_csv`).
    preview : list of dict
        The first epochs as read with the profile: ``time`` (ISO 8601), ``counts`` and
        ``reference`` (None where missing).
    notes : list of str
        What a person should confirm or decide.
    stage_codes_found : list of str
        The distinct codes of the reference column as written.
    """

    profile: ImportProfile
    preview: list[dict[str, Any]] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    stage_codes_found: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form."""
        return {"profile": self.profile.to_dict(), "preview": list(self.preview), "notes": list(self.notes),
                "stage_codes_found": list(self.stage_codes_found)}


def _decode(data: bytes, notes: list[str]) -> tuple[str, str]:
    """(text, encoding name for the profile)."""
    if data.startswith(codecs.BOM_UTF8):
        return data.decode("utf-8-sig"), "utf-8-sig"
    if data[:2] in (codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE):
        return data.decode("utf-16"), "utf-16"
    try:
        return data.decode("utf-8"), "utf-8"
    except UnicodeDecodeError:
        notes.append("the file is not UTF-8; it is read as Latin-1 (check letters such as ä, é)")
        return data.decode("latin-1"), "latin-1"


def _layout(lines: list[str]) -> tuple[str, int]:
    """(delimiter, preamble length): the delimiter splitting most lines alike, and where its rows begin."""
    tail = lines[-200:]
    best: tuple[float, int, str] = (-1.0, 0, ",")
    for d in _DELIMITERS:
        counts = Counter(line.count(d) for line in tail)
        mode, hits = max(counts.items(), key=lambda kv: (kv[1], kv[0]))
        if mode and (hits / len(tail), mode) > best[:2]:
            best = (hits / len(tail), mode, d)
    _, mode, sep = best
    first = next((i for i, line in enumerate(lines) if line.count(sep) == mode), 0)
    return sep, first


def _regular(parsed: pd.Series) -> bool:
    steps = np.diff(pd.DatetimeIndex(parsed).as_unit("s").asi8)
    return bool(steps.size and (steps == steps[0]).all() and steps[0] in (15, 30, 60))


def _parses(values: list[str], fmt: str | None) -> pd.Series | None:
    """The values parsed with ``fmt`` (strict ISO 8601 when None), or None if any does not parse.

    The first 50 values are tried before all of them, so a wrong format is dropped quickly.
    """
    parsed = None
    for part in ((values[:50], values) if len(values) > 50 else (values,)):
        series = pd.Series(part, dtype=object)
        if fmt is None:
            if not series.str.fullmatch(ISO_8601_PATTERN).fillna(False).all():
                return None
            parsed = pd.to_datetime(series, format="ISO8601", errors="coerce", utc=True)
        else:
            parsed = pd.to_datetime(series, format=fmt, exact=True, errors="coerce")
        if parsed.isna().any():
            return None
    return parsed


def _times(cols: dict[str, list[str]], notes: list[str]) -> tuple[dict[str, str], str | None, bool]:
    """(columns of the time roles, datetime_format, aware): the reading with regular epochs, preferred in order."""
    candidates: list[tuple[dict[str, str], str | None, pd.Series]] = []
    for name, values in cols.items():
        for fmt in (None, *DATETIME_FORMATS):
            parsed = _parses(values, fmt)
            if parsed is not None:
                candidates.append(({"time": name}, fmt, parsed))
    dates = [(n, f) for n, v in cols.items() for f in DATE_FORMATS if _parses(v, f) is not None]
    clocks = [(n, f) for n, v in cols.items() for f in TIME_OF_DAY_FORMATS if _parses(v, f) is not None]
    for date_name, date_fmt in dates:
        for time_name, time_fmt in clocks:
            if time_name != date_name:
                joined = [f"{a} {b}" for a, b in zip(cols[date_name], cols[time_name], strict=True)]
                parsed = _parses(joined, f"{date_fmt} {time_fmt}")
                if parsed is not None:
                    candidates.append(({"date": date_name, "time": time_name}, f"{date_fmt} {time_fmt}", parsed))
    if not candidates:
        notes.append("no column holds times in a known format: set columns.time and datetime_format")
        return {}, None, False
    regular = [c for c in candidates if _regular(c[2])]
    chosen = (regular or candidates)[0]
    if not regular:
        notes.append("the times are not evenly spaced by 15, 30 or 60 s in the sample; check the time columns")
    others = {c[1] or "ISO 8601" for c in regular if c[0] == chosen[0] and c[1] != chosen[1]}
    if others:
        notes.append(f"the times also read as {sorted(others)!r} (day-first or month-first cannot be told apart "
                     f"in this sample); {chosen[1]!r} was chosen: confirm")
    aware = chosen[1] is None and bool(pd.Series(cols[chosen[0]["time"]]).str.contains(r"(?:Z|[+-]\d\d:?\d\d)$").all())
    return chosen[0], chosen[1], aware


def _numeric(values: list[str], decimal: str) -> np.ndarray | None:
    present = [v for v in values if v != ""]
    if not present or not all(_NUMBER[decimal].match(v) for v in present):
        return None
    return np.array([float(v.replace(",", ".")) if decimal == "," else float(v) for v in present])


def _counts_column(cols: dict[str, list[str]], decimal: str, notes: list[str]) -> str | None:
    numeric = {n: x for n, v in cols.items() if (x := _numeric(v, decimal)) is not None and (x >= 0).all()
               and not looks_like_reference(n)}
    hinted = [n for n in numeric if header_key(n) in COLUMN_ALIASES["counts"]
              or any(h in n.lower() for h in _COUNT_HINTS)]
    if hinted:
        return hinted[0]
    if numeric:
        name = max(numeric, key=lambda n: np.unique(numeric[n]).size)
        notes.append(f"the counts column was taken to be {name!r} (numbers, the most varied): confirm")
        return name
    notes.append("no column holds non-negative numbers for the counts: set columns.counts")
    return None


def _codes(found: list[str], notes: list[str]) -> dict[str, str]:
    """A stage_codes proposal for the codes found in the reference column."""
    numbers = [c for c in found if re.fullmatch(r"\d+(?:\.0+)?", c)]
    out: dict[str, str] = {}
    if numbers and len(numbers) == len(found):
        values = {str(int(float(c))) for c in found}
        if values <= {"0", "1"}:
            notes.append("the reference holds 0/1 codes: their polarity must be confirmed; proposed 1 = sleep (S), "
                         "0 = wake (W)")
            return {c: "S" if int(float(c)) == 1 else "W" for c in found}
        notes.append("the reference holds stage numbers, read as R&K (0 wake, 1-4 stages 1-4 with 3 and 4 as N3, "
                     "5 REM, 6 and 9 unscored): confirm")
        for c in found:
            out[c] = _RK.get(str(int(float(c))), "?")
            if str(int(float(c))) not in _RK:
                notes.append(f"stage number {c!r} is not an R&K code; mapped to unscored (?)")
        return out
    for c in found:
        key = re.sub(r"\s+", " ", c.strip().lower()).removeprefix("sleep ")
        hit = _WORD_CODE.get(key) or _WORD_CODE.get(key.removeprefix("stage "))
        if hit is None and key in ("mt",):
            continue  # read as R&K movement time
        if hit is None:
            notes.append(f"reference code {c!r} is not recognised; mapped to unscored (?): correct it if it is a stage")
            hit = "?"
        out[c] = hit
    return out


def _reference_column(cols: dict[str, list[str]], taken: set[str]) -> tuple[str | None, list[str]]:
    """(the reference column, other reference-like columns)."""
    likely = [n for n in cols if n not in taken and looks_like_reference(n)]
    coded = [n for n in cols if n not in taken and n not in likely and 2 <= len(set(cols[n]) - {""}) <= 12
             and all(re.sub(r"\s+", " ", v.strip().lower()).removeprefix("stage ") in _WORD_CODE
                     for v in set(cols[n]) - {""})]
    order = sorted(likely, key=lambda n: not any(h in n.lower() for h in ("psg", "stage", "stadi", "hypno")))
    ranked = order + coded
    return (ranked[0] if ranked else None), ranked[1:]


def guess_profile(data: bytes, *, name: str = "guessed") -> ProfileGuess:
    """Guess the import profile of a sample export (see the module docstring).

    Parameters
    ----------
    data : bytes
        A whole export, or at least its first rows (an hour or more, so the sample reads back).
    name : str, default="guessed"
        Name of the proposed profile.

    Returns
    -------
    ProfileGuess

    Raises
    ------
    InvalidProfileError
        When ``name`` is not a valid profile name.
    """
    notes: list[str] = []
    text, encoding = _decode(data, notes)
    lines = text.splitlines()[: _SAMPLE_ROWS + 1000]
    while lines and not lines[-1].strip():
        lines.pop()
    if not lines:
        return ProfileGuess(ImportProfile(name=name, encoding=encoding), [], ["the file is empty"], [])
    sep, skip = _layout(lines)
    try:
        rows = list(csv.reader(lines[skip: skip + _SAMPLE_ROWS + 1], delimiter=sep))
    except csv.Error:  # stray carriage returns or NUL bytes: split plainly
        rows = [line.split(sep) for line in lines[skip: skip + _SAMPLE_ROWS + 1]]
    header, body = rows[0], [r for r in rows[1:] if len(r) == len(rows[0])]
    cols = {h: [r[i].strip() for r in body] for i, h in enumerate(header) if h.strip()}
    values = [v for vs in cols.values() for v in vs]
    decimal = "," if sep != "," and any(_DECIMAL_COMMA.match(v) for v in values) else "."
    columns, fmt, aware = _times(cols, notes)
    counts = _counts_column({n: v for n, v in cols.items() if n not in columns.values()}, decimal, notes)
    taken = set(columns.values()) | {counts}
    reference, others = _reference_column(cols, taken - {None})  # type: ignore[arg-type]
    roles = {**columns, **({"counts": counts} if counts else {}), **({"reference": reference} if reference else {})}
    found = sorted(set(cols[reference]) - {""}) if reference else []
    stage_codes = _codes(found, notes) if found else {}
    for other in others:
        if looks_like_reference(other):
            notes.append(f"column {other!r} looks like a reference too; it is ignored: confirm {reference!r} is the "
                         "reference")
    tz = None
    if columns and not aware:
        tz = "UTC"
        notes.append("the times carry no UTC offset; the profile assumes UTC: set tz to the lab's zone "
                     "(e.g. Europe/Berlin)")
    profile = ImportProfile(name=name, delimiter=sep, skip_rows=skip, decimal=decimal, columns=roles,
                            datetime_format=fmt, tz=tz, stage_codes=stage_codes,
                            ignore_columns=tuple(o for o in others if looks_like_reference(o)), encoding=encoding)
    return ProfileGuess(profile, _preview(data, profile, notes), notes, found)


def _preview(data: bytes, profile: ImportProfile, notes: list[str]) -> list[dict[str, Any]]:
    """The first epochs read with the profile (an empty list and a note when it does not read)."""
    try:
        night = night_from_csv(data, profile=profile,
                               options=NightOptions(min_hours=0.0, fill_gaps=True, min_present_pct=0.0))
    except InvalidNightError as exc:
        notes.extend(f"the sample does not read with this profile: {p.message}" for p in exc.problems[:5])
        return []
    times = night.epoch_times()[:_PREVIEW_ROWS]
    counts = night.counts[:_PREVIEW_ROWS].tolist()
    ref = night.reference[:_PREVIEW_ROWS].tolist() if night.reference is not None else [None] * len(counts)
    return [{"time": t.isoformat(), "counts": None if np.isnan(c) else c, "reference": r}
            for t, c, r in zip(times, counts, ref, strict=True)]
