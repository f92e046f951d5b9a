"""Validation of night fields.

Validation refuses a night: :func:`validate_night_fields` collects *every* problem of the input
(never stopping at the first) and raises :class:`~models.errors.InvalidNightError`. Quality
control, which only warns, is in :mod:`models.nights.quality`.
"""

from __future__ import annotations

from collections.abc import Collection, Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ..errors import InvalidNightError, Problem
from .night import SUPPORTED_EPOCH_SECONDS, MovementTimePolicy, Night, canonical_stage

__all__ = ["MAX_LABEL_CHARS", "CodedLabels", "NightOptions", "validate_night_fields"]

MAX_LISTED = 5  # offending values / locations quoted in one message
#: longest night label, characters (what every database backend stores)
MAX_LABEL_CHARS = 200


@dataclass(frozen=True)
class NightOptions:
    """How nights are read and validated (documented defaults).

    Parameters
    ----------
    min_hours : float, default=1.0
        Shortest accepted recording, hours.
    max_hours : float, default=48.0
        Longest accepted recording, hours.
    max_epochs : int, default=200_000
        Hard limit on epochs, checked before anything else is parsed.
    fill_gaps : bool, default=False
        Fill whole-epoch gaps in CSV/Parquet timestamps with missing epochs (NaN counts,
        unscored reference, flagged ``missing_epochs``) instead of refusing the file.
    tz : str, optional
        IANA time zone for naive timestamps (``Europe/Berlin``). Naive times without it are refused.
    movement_time : {"wake", "sleep", "exclude"}, default="wake"
        Mapping of R&K movement-time epochs to sleep/wake.
    aggregate_to : int, optional
        Sum epochs into this longer length (30 or 60 s) after reading.
    time_column, counts_column, reference_column : str, optional
        Explicit column names; by default found through :data:`models.nights.columns.COLUMN_ALIASES`.
        An import profile's ``columns`` take precedence.
    max_counts_per_second : float, default=10_000.0
        Largest plausible count per second of epoch length (300,000 in a 30-s epoch); larger
        counts, 1e308 among them, are refused (``implausible_count``) with their epochs. Common
        practice: more than twice what a 16-bit count register holds per 15-s epoch (65,535,
        about 4,400 counts/s), so no count device reaches it.
    min_present_pct : float, default=50.0
        Smallest accepted share (%) of present epochs, i.e. epochs whose counts are not missing
        (missing epochs come from gap filling or, with ``fill_gaps``, empty count cells). A night
        whose counts are all missing is refused whatever this is (common practice: a night with
        less than half of its epochs recorded is not scored).
    """

    min_hours: float = 1.0
    max_hours: float = 48.0
    max_epochs: int = 200_000
    fill_gaps: bool = False
    tz: str | None = None
    movement_time: MovementTimePolicy = "wake"
    aggregate_to: int | None = None
    time_column: str | None = None
    counts_column: str | None = None
    reference_column: str | None = None
    min_present_pct: float = 50.0
    max_counts_per_second: float = 10_000.0


def _first(idx: NDArray[np.intp]) -> list[int]:
    return [int(i) for i in idx[:MAX_LISTED]]


def _counts_problems(counts: Collection[object], field_name: str,
                     allow_missing: bool) -> tuple[NDArray[np.float64] | None, list[Problem]]:
    """Convert counts to float64 and list every defect (types, NaN/inf, negatives).

    With ``allow_missing`` NaN marks a missing epoch (gap filling) and is accepted.
    """
    problems: list[Problem] = []
    if isinstance(counts, np.ndarray) and counts.dtype.kind in "iuf":
        values = counts.astype(np.float64, copy=False)
    else:
        seq = list(counts)
        kinds = set(map(type, seq))
        if kinds <= {int, float}:
            values = np.asarray(seq, dtype=np.float64)
        else:
            bad = [i for i, v in enumerate(seq) if type(v) not in (int, float)]
            problems.append(Problem(
                "non_numeric_count",
                f"{len(bad)} count value(s) are not numbers, first at epoch {bad[0]}: "
                f"{[seq[i] for i in bad[:MAX_LISTED]]!r}",
                {"field": field_name, "epoch": bad[0], "values": [repr(seq[i]) for i in bad[:MAX_LISTED]]},
            ))
            return None, problems
    finite = np.isfinite(values)
    nonfinite = np.zeros(0, dtype=np.intp) if finite.all() else \
        np.flatnonzero(np.isinf(values) if allow_missing else ~finite)
    if nonfinite.size:
        problems.append(Problem(
            "non_finite_count",
            f"{nonfinite.size} count(s) are NaN or infinite, first at epoch {nonfinite[0]}",
            {"field": field_name, "epoch": int(nonfinite[0]), "epochs": _first(nonfinite)},
        ))
    below = values < 0
    negative = np.flatnonzero(below) if below.any() else np.zeros(0, dtype=np.intp)
    if negative.size:
        problems.append(Problem(
            "negative_count",
            f"{negative.size} count(s) are negative, first at epoch {negative[0]} "
            f"(value {values[negative[0]]:g}); counts must be >= 0",
            {"field": field_name, "epoch": int(negative[0]), "epochs": _first(negative),
             "values": [float(values[i]) for i in negative[:MAX_LISTED]]},
        ))
    return values, problems


@dataclass(frozen=True)
class CodedLabels:
    """Reference labels as integer codes into a list of categories (code -1 = missing/unscored)."""

    codes: NDArray[np.signedinteger[Any]]
    categories: list[object]

    def __len__(self) -> int:
        return int(self.codes.shape[0])

    def __iter__(self) -> Iterator[object]:
        cats = np.asarray([*self.categories, ""], dtype=object)
        return iter(cats[self.codes].tolist())


def _label_key(value: object) -> str:
    """Text form of one reference label; non-label types get a key no stage code matches."""
    if isinstance(value, str):
        return value
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return ""
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return str(int(value)) if float(value).is_integer() else str(value)
    return f"<{type(value).__name__}: {value!r}>"


def _reference_problems(reference: Sequence[object] | CodedLabels,
                        n_epochs: int) -> tuple[NDArray[np.str_] | None, list[Problem]]:
    """Canonical stage codes (n_epochs,) or the problems; ``reference`` may be :class:`CodedLabels`."""
    if len(reference) != n_epochs:
        return None, [Problem(
            "reference_length",
            f"reference has {len(reference)} labels but there are {n_epochs} epochs; give one label per epoch",
            {"field": "reference", "values": [len(reference), n_epochs]},
        )]
    if isinstance(reference, CodedLabels):
        inverse, uniq = reference.codes, [_label_key(v) for v in reference.categories]
        if (inverse < 0).any():  # missing values: unscored
            inverse = np.where(inverse < 0, len(uniq), inverse)
            uniq = [*uniq, ""]
        keys = None
    else:
        seq = list(reference)
        keys = np.asarray(seq if set(map(type, seq)) <= {str} else [_label_key(v) for v in seq], dtype=object)
        inverse, uniq_keys = pd.factorize(keys)
        uniq = [str(u) for u in uniq_keys]
    mapped = [None if u.startswith("<") else canonical_stage(u) for u in uniq]
    unknown = [str(u) for u, m in zip(uniq, mapped, strict=True) if m is None]
    if unknown:
        bad = np.flatnonzero(np.isin(np.asarray(uniq, dtype=object)[inverse], unknown))
        return None, [Problem(
            "unknown_stage",
            f"{bad.size} reference label(s) use unknown codes {unknown[:MAX_LISTED]!r}, first at epoch {bad[0]}; "
            "allowed: W N1 N2 N3 R (AASM), S1 S2 S3 S4 REM MT (R&K), S/W, 1/0, and ? U - or empty for unscored",
            {"field": "reference", "epoch": int(bad[0]), "values": unknown[:MAX_LISTED]},
        )]
    return np.asarray(mapped, dtype="<U3")[inverse], []


def validate_night_fields(
    *,
    participant_id: str,
    start: pd.Timestamp | None,
    epoch_seconds: object,
    counts: Collection[object] | None,
    reference: Sequence[object] | CodedLabels | None = None,
    lights_off: pd.Timestamp | None = None,
    lights_on: pd.Timestamp | None = None,
    label: str | None = None,
    options: NightOptions = NightOptions(),
    problems: list[Problem] | None = None,
    source: str | None = None,
    unused_columns: Sequence[str] = (),
    source_name: str | None = None,
) -> Night:
    """Check every field of a night and build it, or raise with every problem found.

    Parameters
    ----------
    start : pandas.Timestamp or None
        Timezone-aware start of the first epoch (None when an earlier parse step failed and
        already recorded a problem).
    epoch_seconds : int
        One of :data:`~models.nights.night.SUPPORTED_EPOCH_SECONDS`.
    counts : sequence of numbers, shape (n_epochs,), or None
        None when the reader found no usable counts (its problem is already in ``problems``).
    reference : sequence of labels, shape (n_epochs,), optional
    problems : list of Problem, optional
        Problems already found by the format reader; they are reported together.
    source : str, optional
        Where the input came from, for the error message.
    unused_columns : sequence of str, default=()
        Kept as :attr:`Night.unused_columns <models.nights.night.Night.unused_columns>`.
    source_name : str, optional
        Kept as :attr:`Night.source_name <models.nights.night.Night.source_name>`.

    Raises
    ------
    InvalidNightError
        With the complete list of problems.
    """
    problems = list(problems or [])
    seconds: int | None = None  # the epoch length once accepted
    if isinstance(epoch_seconds, (int, np.integer)) and not isinstance(epoch_seconds, bool) \
            and int(epoch_seconds) in SUPPORTED_EPOCH_SECONDS:
        seconds = int(epoch_seconds)
    elif epoch_seconds is not None:  # None: the reader could not establish it and already said why
        problems.append(Problem(
            "unsupported_epoch_length",
            f"epoch length {epoch_seconds!r} s is not supported; use one of {list(SUPPORTED_EPOCH_SECONDS)} s",
            {"field": "epoch_seconds", "values": [repr(epoch_seconds)]},
        ))
    if counts is None:  # the reader could not find counts and already said why
        raise InvalidNightError(problems, source=source)
    n = len(counts)
    if n > options.max_epochs:
        problems.append(Problem(
            "too_many_epochs", f"{n} epochs exceed the limit of {options.max_epochs}",
            {"field": "counts", "values": [n, options.max_epochs]}))
        raise InvalidNightError(problems, source=source)
    values, count_problems = _counts_problems(counts, "counts", options.fill_gaps)
    problems += count_problems
    if values is not None and n:
        problems += _presence_problems(values, options.min_present_pct)
    if values is not None and seconds is not None:
        problems += _plausibility_problems(values, seconds, options.max_counts_per_second, start)
    if n == 0:
        problems.append(Problem("empty_recording", "the recording has no epochs", {"field": "counts"}))
    elif seconds is not None:
        hours = n * seconds / 3600
        if hours < options.min_hours:
            problems.append(Problem(
                "too_short", f"recording lasts {hours:.2f} h, shorter than the minimum {options.min_hours:g} h",
                {"field": "counts", "values": [n]}))
        if hours > options.max_hours:
            problems.append(Problem(
                "too_long", f"recording lasts {hours:.2f} h, longer than the maximum {options.max_hours:g} h",
                {"field": "counts", "values": [n]}))
    canon = None
    if reference is not None:
        canon, ref_problems = _reference_problems(reference, n)
        problems += ref_problems
    if label is not None and (len(label) > MAX_LABEL_CHARS or "\x00" in label):
        problems.append(Problem("invalid_label", "label contains a NUL character (\\u0000)" if "\x00" in label
                                else f"label has {len(label)} characters; at most {MAX_LABEL_CHARS}",
                                {"field": "label"}))
    for column in unused_columns:
        if "\x00" in column:
            problems.append(Problem("nul_character", f"column header {column.replace(chr(0), '?')!r} contains a NUL "
                                    "character (\\u0000)", {"field": "columns", "column": column.replace(chr(0), "?")}))
    if start is not None and seconds is not None and (lights_off is not None or lights_on is not None):
        end = start + pd.Timedelta(seconds=seconds * n)
        for name, ts in (("lights_off", lights_off), ("lights_on", lights_on)):
            if ts is not None and not (start <= ts <= end):
                problems.append(Problem(
                    "lights_outside_recording",
                    f"{name} {ts.isoformat()} is outside the recording {start.isoformat()} .. {end.isoformat()}",
                    {"field": name, "time": ts.isoformat()}))
        if lights_off is not None and lights_on is not None and lights_off >= lights_on:
            problems.append(Problem(
                "lights_order", f"lights_off {lights_off.isoformat()} is not before lights_on {lights_on.isoformat()}",
                {"field": "lights_off", "time": lights_off.isoformat()}))
    if problems or start is None or seconds is None or values is None:
        raise InvalidNightError(problems, source=source)
    return Night(participant_id=participant_id, start=start, epoch_seconds=seconds, counts=values,
                 reference=canon, lights_off=lights_off, lights_on=lights_on, label=label,
                 unused_columns=tuple(unused_columns), source_name=source_name)


def _presence_problems(values: NDArray[np.float64], min_present_pct: float) -> list[Problem]:
    """``too_few_present_epochs`` when the share of non-missing counts is below the minimum or zero."""
    missing = np.isnan(values)
    if not missing.any():
        return []
    n_present = int(values.size - missing.sum())
    pct = 100.0 * n_present / values.size
    if n_present and pct >= min_present_pct:
        return []
    return [Problem(
        "too_few_present_epochs",
        f"only {n_present} of {values.size} epochs ({pct:.1f}%) have counts; at least {min_present_pct:g}% "
        "must be present" + ("" if n_present else " and a night needs at least one"),
        {"field": "counts", "values": [n_present, int(values.size)]},
    )]


def _plausibility_problems(values: NDArray[np.float64], epoch_seconds: int, max_per_second: float,
                           start: pd.Timestamp | None) -> list[Problem]:
    """``implausible_count`` for counts above ``max_per_second * epoch_seconds``, naming their epochs."""
    limit = max_per_second * epoch_seconds
    with np.errstate(invalid="ignore"):
        above = np.flatnonzero(np.isfinite(values) & (values > limit))
    if not above.size:
        return []
    first = int(above[0])
    where: dict[str, Any] = {"field": "counts", "epoch": first, "epochs": _first(above),
                             "values": [float(values[i]) for i in above[:MAX_LISTED]]}
    if start is not None:
        where["time"] = (start + pd.Timedelta(seconds=epoch_seconds * first)).isoformat()
    return [Problem(
        "implausible_count",
        f"{above.size} count(s) exceed {limit:g} per {epoch_seconds}-s epoch ({max_per_second:g} counts per second), "
        f"first at epoch {first} (value {values[first]:g}); no count device reports that many",
        where,
    )]
