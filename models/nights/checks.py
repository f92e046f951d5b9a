"""Validation of night fields and quality-control flags.

Validation refuses a night: :func:`validate_night_fields` collects *every* problem of the input
(never stopping at the first) and raises :class:`~models.errors.InvalidNightError`.
Quality control only warns: :func:`quality_flags` returns flags stored with the night and never
changes its data.
"""

from __future__ import annotations

from collections.abc import Collection, Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from ..errors import InvalidNightError, Problem
from .night import SUPPORTED_EPOCH_SECONDS, MovementTimePolicy, Night, canonical_stage

__all__ = ["CodedLabels", "NightOptions", "QCConfig", "QCFlag", "quality_flags", "validate_night_fields"]

MAX_LISTED = 5  # offending values / locations quoted in one message


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
        Explicit column names; by default found through :data:`models.nights.tabular.COLUMN_ALIASES`.
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


@dataclass(frozen=True)
class QCConfig:
    """Thresholds of the quality flags (documented defaults).

    Parameters
    ----------
    off_wrist_min : float, default=60.0
        A run of exact zero counts at least this long (minutes) is flagged as suspected
        off-wrist (common practice; device dependent).
    spike_ceiling : float, default=20000.0
        Counts per epoch above this are flagged as spikes (common practice for count devices).
    spike_factor : float, default=10.0
        Counts above ``spike_factor`` × the night's 99th percentile are flagged as spikes too.
    stuck_run : int, default=10
        This many identical non-zero values in a row are flagged as a stuck sensor.
    unscored_max_pct : float, default=10.0
        A reference with more than this share (%) of unscored epochs is flagged low coverage.
    """

    off_wrist_min: float = 60.0
    spike_ceiling: float = 20000.0
    spike_factor: float = 10.0
    stuck_run: int = 10
    unscored_max_pct: float = 10.0


@dataclass(frozen=True)
class QCFlag:
    """A quality warning: its code, a sentence, epoch ranges ``[start, stop)`` and the threshold used."""

    code: str
    message: str
    ranges: list[tuple[int, int]] = field(default_factory=list)
    threshold: dict[str, float] = field(default_factory=dict)

    @property
    def n_epochs(self) -> int:
        return int(sum(b - a for a, b in self.ranges))

    def to_dict(self) -> dict[str, Any]:
        return {
            "code": self.code,
            "message": self.message,
            "ranges": [list(r) for r in self.ranges],
            "n_epochs": self.n_epochs,
            "threshold": dict(self.threshold),
        }


def _runs_of(mask: ArrayLike) -> NDArray[np.intp]:
    """Runs of True in a boolean vector.

    Returns
    -------
    runs : ndarray of intp, shape (n_runs, 2)
        ``[start, stop)`` epoch indices of each run.
    """
    m = np.concatenate(([False], np.asarray(mask, dtype=bool), [False]))
    edges = np.flatnonzero(m[1:] != m[:-1])
    return edges.reshape(-1, 2)


def _ranges(mask: ArrayLike) -> list[tuple[int, int]]:
    """:func:`_runs_of` as a list of ``(start, stop)`` pairs of Python ints."""
    return [(int(a), int(b)) for a, b in _runs_of(mask)]


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
    nonfinite = np.flatnonzero(np.isinf(values) if allow_missing else ~np.isfinite(values))
    if nonfinite.size:
        problems.append(Problem(
            "non_finite_count",
            f"{nonfinite.size} count(s) are NaN or infinite, first at epoch {nonfinite[0]}",
            {"field": field_name, "epoch": int(nonfinite[0]), "epochs": _first(nonfinite)},
        ))
    negative = np.flatnonzero(values < 0)
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
    if start is not None and seconds is not None:
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
                 reference=canon, lights_off=lights_off, lights_on=lights_on, label=label)


def quality_flags(night: Night, *, config: QCConfig = QCConfig()) -> list[QCFlag]:
    """Quality warnings of a night; the data are never changed.

    Returns
    -------
    flags : list of QCFlag
        Codes: ``off_wrist``, ``spike``, ``stuck_sensor``, ``missing_epochs``,
        ``low_reference_coverage``, ``movement_time``.
    """
    flags: list[QCFlag] = []
    counts = night.counts
    epoch_min = night.epoch_seconds / 60
    min_epochs = int(np.ceil(config.off_wrist_min / epoch_min - 1e-9))
    long_zero = [(a, b) for a, b in _ranges(counts == 0) if b - a >= min_epochs]
    if long_zero:
        total = sum(b - a for a, b in long_zero) * epoch_min
        flags.append(QCFlag("off_wrist", f"{len(long_zero)} run(s) of exact zeros of >= {config.off_wrist_min:g} min "
                            f"({total:g} min in all): device possibly off the wrist",
                            long_zero, {"off_wrist_min": config.off_wrist_min}))
    finite = counts[np.isfinite(counts)]
    q99 = float(np.quantile(finite, 0.99)) if finite.size else 0.0
    limit = min(config.spike_ceiling, config.spike_factor * q99) if q99 > 0 else config.spike_ceiling
    spikes = _ranges(counts > limit)
    if spikes:
        flags.append(QCFlag("spike", f"{sum(b - a for a, b in spikes)} epoch(s) above {limit:g} counts",
                            spikes, {"spike_ceiling": config.spike_ceiling, "spike_factor": config.spike_factor,
                                     "limit": limit}))
    same = np.concatenate(([False], (counts[1:] == counts[:-1]) & (counts[1:] > 0)))
    stuck: list[tuple[int, int]] = []
    for a, b in _runs_of(same):  # a run of k equal pairs is k+1 equal values starting at a-1
        if b - a + 1 >= config.stuck_run:
            stuck.append((int(a - 1), int(b)))
    if stuck:
        flags.append(QCFlag("stuck_sensor", f"{len(stuck)} run(s) of >= {config.stuck_run} identical non-zero counts",
                            stuck, {"stuck_run": config.stuck_run}))
    missing = _ranges(night.missing)
    if missing:
        flags.append(QCFlag("missing_epochs", f"{sum(b - a for a, b in missing)} epoch(s) were filled as missing",
                            missing, {}))
    if night.reference is not None:
        unscored = night.reference == "?"
        pct = 100 * float(unscored.mean()) if unscored.size else 0.0
        if pct > config.unscored_max_pct:
            flags.append(QCFlag("low_reference_coverage",
                                f"{pct:.1f}% of reference epochs are unscored (limit {config.unscored_max_pct:g}%)",
                                _ranges(unscored),
                                {"unscored_max_pct": config.unscored_max_pct}))
        mt = night.reference == "MT"
        if mt.any():
            flags.append(QCFlag("movement_time", f"{int(mt.sum())} movement-time epoch(s) in the reference",
                                _ranges(mt), {}))
    return flags
