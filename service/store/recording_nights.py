"""What a stored recording gives: non-wear, sleep periods and the nights of its main periods.

Pure computation (no database): :func:`derive` runs non-wear detection and period finding
(:func:`models.detect_nonwear`, :func:`models.find_periods`, model-free) on a recording with its
diary, and makes each main period a night (:func:`models.period_night`: the rest interval's
epochs, non-wear epochs without counts). A posted PSG reference (a :class:`ReferenceRecord`)
labels the main period it overlaps most, so recomputing the periods (a new diary) keeps the
labels wherever the period still covers the reference.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import pandas as pd

from models import (
    DiaryDay,
    Hypnogram,
    Night,
    NonwearInterval,
    Recording,
    SleepPeriod,
    check_reference,
    detect_nonwear,
    find_periods,
    hypnogram_on_epochs,
    nonwear_mask,
    period_night,
    quality_flags,
)

__all__ = ["Derived", "PeriodNight", "derive", "hypnogram_from_record", "hypnogram_record", "label_night",
           "reference_overlap"]


@dataclass(frozen=True)
class PeriodNight:
    """The night of main period ``period_index`` of a recording; ``first_epoch`` its first epoch there."""

    period_index: int
    night: Night
    first_epoch: int
    qc: list[dict[str, Any]]
    reference_index: int | None = None


@dataclass(frozen=True)
class Derived:
    """Non-wear intervals, sleep periods (in time order) and the nights of the main periods."""

    nonwear: list[NonwearInterval]
    periods: list[SleepPeriod]
    nights: list[PeriodNight]


def hypnogram_record(hypnogram: Hypnogram, *, clock_offset_s: float, quality: float | None,
                     accept_implausible: bool) -> dict[str, Any]:
    """The stored form of a posted reference: the hypnogram on its own clock and the offset applied to it."""
    return {"start": pd.Timestamp(hypnogram.start).isoformat(), "epoch_seconds": int(hypnogram.epoch_seconds),
            "stages": [str(s) for s in hypnogram.stages], "clock_offset_s": float(clock_offset_s),
            "alignment_quality": None if quality is None else float(quality),
            "accept_implausible": bool(accept_implausible)}


def hypnogram_from_record(record: dict[str, Any]) -> Hypnogram:
    return Hypnogram(start=pd.Timestamp(record["start"]), epoch_seconds=int(record["epoch_seconds"]),
                     stages=np.array(record["stages"], dtype="<U3"))


def reference_overlap(record: dict[str, Any], *, start: pd.Timestamp, end: pd.Timestamp) -> float:
    """Seconds of [start, end) covered by a stored reference once its clock offset is applied."""
    first = pd.Timestamp(record["start"]) + pd.Timedelta(seconds=float(record["clock_offset_s"]))
    last = first + pd.Timedelta(seconds=int(record["epoch_seconds"]) * len(record["stages"]))
    return max(0.0, (min(last, end) - max(first, start)).total_seconds())


def label_night(night: Night, record: dict[str, Any]) -> tuple[Night, list[dict[str, Any]]]:
    """The night with the stored reference on its epochs, and the reference's plausibility flag (if any).

    Raises
    ------
    InvalidNightError
        ``reference_implausible`` (:func:`models.check_reference`) unless the reference was posted
        with ``accept_implausible``.
    """
    stages = hypnogram_on_epochs(hypnogram_from_record(record), start=night.start, epoch_seconds=night.epoch_seconds,
                                 n_epochs=night.n_epochs, clock_offset_s=float(record["clock_offset_s"]))
    labelled = replace(night, reference=np.asarray(stages, dtype="<U3"))
    flag = check_reference(labelled, accept=bool(record.get("accept_implausible", False)))
    return labelled, [] if flag is None else [flag.to_dict()]


def derive(recording: Recording, *, diary: list[DiaryDay] | None = None,
           references: Sequence[dict[str, Any]] = ()) -> Derived:
    """Non-wear, periods and the main periods' nights of ``recording``.

    Parameters
    ----------
    recording : Recording
        At the study's epoch length.
    diary : list of DiaryDay, optional
        The participant's diary for the recording (bed and rise times, naps).
    references : list of dict
        Stored references (:func:`hypnogram_record`); each labels the main period it overlaps
        most (none when it overlaps no main period).

    Raises
    ------
    InvalidNightError
        If a reference fails the plausibility check on its night (see :func:`label_night`).
    """
    nonwear = detect_nonwear(recording)
    periods = sorted(find_periods(recording, diary=diary or None, nonwear=nonwear),
                     key=lambda p: (p.start_epoch, p.end_epoch))
    mask = nonwear_mask(recording.n_epochs, nonwear)
    step = pd.Timedelta(seconds=recording.epoch_seconds)
    mains = [(i, p) for i, p in enumerate(periods) if p.kind == "main"]
    owner: dict[int, int] = {}
    for r, record in enumerate(references):
        spans = [(reference_overlap(record, start=recording.start + p.start_epoch * step,
                                    end=recording.start + p.end_epoch * step), i) for i, p in mains]
        best = max(spans, default=(0.0, -1))
        if best[0] > 0:
            owner.setdefault(best[1], r)
    nights = []
    for i, period in mains:
        night = period_night(recording, period, nonwear_mask=mask)
        flags: list[dict[str, Any]] = []
        if i in owner:
            night, flags = label_night(night, references[owner[i]])
        qc = [f.to_dict() for f in quality_flags(night)] + flags
        first = int(round((night.start - recording.start) / step))
        nights.append(PeriodNight(period_index=i, night=night, first_epoch=first, qc=qc,
                                  reference_index=owner.get(i)))
    return Derived(nonwear=nonwear, periods=periods, nights=nights)
