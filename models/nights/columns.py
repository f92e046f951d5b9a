"""Columns of a tabular night: which header plays which role, and which columns are left over.

A column is found for a role by, in this order: the import profile's ``columns``, the explicit
names of :class:`~models.nights.checks.NightOptions`, then the header aliases of
:data:`COLUMN_ALIASES`. Aliases are compared after lower-casing, dropping a trailing unit in
brackets or parentheses (``Activity [counts]``, ``counts (n)``) and writing blanks and hyphens as
``_``. Every column is accounted for: a column no role uses is listed in
:attr:`Night.unused_columns <models.nights.night.Night.unused_columns>` unless the profile ignores
it, and one whose header looks like a reference (:func:`looks_like_reference`) is refused unless it
is the reference or ignored, so a second scoring is never dropped without a word.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache

from ..errors import Problem
from .checks import NightOptions
from .profiles import ImportProfile

__all__ = ["COLUMN_ALIASES", "REFERENCE_HINTS", "looks_like_reference"]

#: accepted header names per role, compared as described in the module docstring, first match wins
COLUMN_ALIASES: dict[str, tuple[str, ...]] = {
    "time": ("time", "timestamp", "datetime", "date_time", "epoch_start", "start"),
    "counts": ("counts", "count", "activity", "activity_counts", "movement"),
    "reference": ("reference", "stage", "stages", "sleep_stage", "psg", "psg_stage", "label"),
}
#: parts of a header that mark a reference-like column (scored sleep stages or sleep/wake), lower case
REFERENCE_HINTS: tuple[str, ...] = ("stage", "stadi", "psg", "scor", "hypno", "sleep", "wake", "schlaf", "label",
                                    "reference", "aasm", "r&k")
_UNIT = re.compile(r"\s*[\[(][^\[\]()]*[\])]\s*$")
_BLANKS = re.compile(r"[\s\-]+")
_ROLES = ("time", "date", "counts", "reference")


@lru_cache(maxsize=4096)  # the same headers come back file after file
def header_key(name: str) -> str:
    """A header as compared with the aliases: lower case, trailing unit dropped, blanks as ``_``."""
    text = _UNIT.sub("", str(name).strip().lower()) or str(name).strip().lower()
    return _BLANKS.sub("_", text.strip())


@lru_cache(maxsize=4096)
def looks_like_reference(name: str) -> bool:
    """Whether a header names a reference-like column (any of :data:`REFERENCE_HINTS`)."""
    text = str(name).strip().lower()
    return any(hint in text for hint in REFERENCE_HINTS)


@dataclass(frozen=True)
class ColumnRoles:
    """The header of each role (None when absent) and the columns left unused."""

    time: str | None
    date: str | None
    counts: str | None
    reference: str | None
    unused: tuple[str, ...]

    def used(self) -> list[str]:
        """Headers used, in role order (time, date, counts, reference)."""
        return [c for c in (self.time, self.date, self.counts, self.reference) if c is not None]


_FOUND: dict[tuple[object, ...], ColumnRoles] = {}  # headers read without a problem, file after file
_MAX_FOUND = 1024


def find_columns(names: Sequence[str], options: NightOptions, profile: ImportProfile | None, header_row: int,
                 problems: list[Problem]) -> ColumnRoles:
    """Find the column of every role in a header; record every problem in ``problems``.

    Parameters
    ----------
    names : sequence of str
        The header, as the table names its columns.
    header_row : int
        1-based file line of the header (0 for a format without lines), for the problems.

    Returns
    -------
    ColumnRoles
        ``time`` or ``counts`` is None when missing (a ``missing_column`` problem says so).
    """
    key = (tuple(names), header_row, options.time_column, options.counts_column, options.reference_column,
           None if profile is None else (profile.name, tuple(profile.columns.items()), profile.ignore_columns))
    roles = _FOUND.get(key)
    if roles is not None:
        return roles
    found: list[Problem] = []
    roles = _find_columns(names, options, profile, header_row, found)
    if not found:
        if len(_FOUND) >= _MAX_FOUND:
            _FOUND.clear()
        _FOUND[key] = roles
    problems.extend(found)
    return roles


def _find_columns(names: Sequence[str], options: NightOptions, profile: ImportProfile | None, header_row: int,
                  problems: list[Problem]) -> ColumnRoles:
    """:func:`find_columns` without the memory of headers seen before."""
    exact: dict[str, str] = {}
    normal: dict[str, str] = {}
    for n in names:
        exact.setdefault(str(n).strip().lower(), n)
        normal.setdefault(header_key(n), n)
    ignored = {header_key(c) for c in profile.ignore_columns} if profile is not None else set()
    explicit: dict[str, str | None] = {"time": options.time_column, "date": None, "counts": options.counts_column,
                                       "reference": options.reference_column}
    if profile is not None:
        explicit.update(profile.columns)
    where = {"row": header_row} if header_row else {}
    found: dict[str, str | None] = {}
    for role in _ROLES:
        named = explicit.get(role)
        taken = set(found.values())
        if named is not None:
            hit = exact.get(named.strip().lower()) or normal.get(header_key(named))
            if hit is None:
                by = f"profile {profile.name!r}" if profile is not None and role in profile.columns else "the options"
                problems.append(Problem("missing_column", f"column {named!r} that {by} names for {role} is not in "
                                        f"the header {list(map(str, names))!r}", {"field": named, **where}))
        elif role == "date":
            hit = None
        else:
            hit = next((normal[a] for a in COLUMN_ALIASES[role]
                        if a in normal and normal[a] not in taken and a not in ignored), None)
            if hit is None and role != "reference":
                problems.append(Problem("missing_column", f"no {role} column: the header {list(map(str, names))!r} "
                                        f"has none of {list(COLUMN_ALIASES[role])!r}", {"field": role, **where}))
        found[role] = hit
    used = {v for v in found.values() if v is not None}
    unused = tuple(n for n in names if n not in used and header_key(n) not in ignored and str(n).strip())
    for n in unused:
        if looks_like_reference(n):
            problems.append(Problem(
                "unmapped_reference_column",
                f"column {n!r} looks like a reference (sleep stages or sleep/wake) but is not the reference column; "
                "map it as the reference or list it in the profile's ignore_columns",
                {"field": n, **where}))
    return ColumnRoles(time=found["time"], date=found["date"], counts=found["counts"],
                       reference=found["reference"], unused=unused)
