"""Sleep periods of a recording: one main period per noon-to-noon day, plus naps; and the night of a period.

Detection (model-free, our design on published principles; thresholds in :class:`DetectionConfig`):

1. *Rest blocks*: a rolling median of the counts under a person-specific threshold (a share of the
   recording's typical level), blocks of at least 30 min, gaps up to 60 min merged, never across
   non-wear (the principle of van Hees et al. 2018 carried over to counts).
2. *Sleep calls* per epoch: a model's sleep probability ``p_sleep`` when given, else the share of
   moving epochs in a 10-min window (sleep moves in a few percent of its epochs, quiet wake in bed
   in about a third); an epoch moves when its count is above zero, or, for a device whose
   counts never fall to zero (a noise floor), above the floor's top read from the recording's
   histogram (those counts are its zeros for rest blocks, sleep calls and naps alike).
3. The *main period* of a noon-to-noon day (the day of the evening it starts) is its longest rest
   block (by its midpoint) that holds sleep and lasts at least ``min_main_minutes``; sleep onset is
   the first epoch of the first run of sleep calls of at least 10 min within it, sleep offset the
   end of the last such run.

Anchors, where the lab has them, set the rest interval (in bed):

* an event marker within ``marker_tolerance_minutes`` (30) of a detected block's start or end
  replaces that boundary (source ``"marker"``);
* a diary bed (rise) time within ``diary_tolerance_minutes`` (30) of the detected block's start
  (end) confirms it and the diary's time is used (source ``"diary"``, common practice: the diary
  is the lab's record of time in bed); a diary time farther away is reported as a conflict, e.g.
  ``"diary bed time 70 min from detected rest"``, and detection is kept; except a bed time before
  the detected rest (a rise time after it) within ``diary_quiet_minutes`` (90) across quiet wake
  (at most ``diary_quiet_share`` of the epochs between move): reading or lying awake in bed,
  which detection leaves out of rest, is in bed all the same (our design);
* a day the diary gives bed and rise times for but detection finds no main period is taken from
  the diary when it holds sleep (source ``"diary"``).

Onset and offset are searched over the union of the detected block and the anchored interval,
and the rest interval widened to hold them; where the diary set a boundary, onset is the first
persistent sleep after the diary's bed time (offset the last before its rise time), less a slack of
``diary_slack_minutes`` for the diary's rounding, so quiet wake in bed after the bed time written
down is never taken for sleep. *Naps* are runs of sleep calls of at least
``nap_min_minutes`` (20, common practice; wake calls up to 5 min bridged) outside the main
periods (with a margin of 30 min),
except a run without any movement right between moving minutes (a short spell off the wrist);
a diary nap overlapping one confirms it (source ``"diary"``); a diary nap with no detected sleep
is reported on that day's main period.
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ..nights import Night
from ._detect import DetectionConfig, moving_floor, rest_blocks, sleep_bounds, sleep_calls
from ._runs import above_floor, awake_sides, close_gaps, runs
from .diary import DiaryDay
from .nonwear import NonwearConfig, NonwearInterval, detect_nonwear, nonwear_mask
from .recording import Recording

__all__ = ["DetectionConfig", "PeriodConfig", "SleepPeriod", "find_periods", "period_night"]


@dataclass(frozen=True)
class SleepPeriod:
    """One sleep period of a recording (epoch indexes; stops exclusive).

    Parameters
    ----------
    kind : {"main", "nap"}
    day : datetime.date
        The noon-to-noon day, named by the date of its evening.
    start_epoch, end_epoch : int
        Rest interval (in bed); ``start_epoch <= onset_epoch < offset_epoch <= end_epoch``.
    onset_epoch, offset_epoch : int
        First sleep epoch and the epoch after the last one.
    source : {"diary", "marker", "detected"}
        What set the rest interval.
    conflicts : tuple of str
        Disagreements between the anchors and detection, as sentences.
    """

    kind: str
    day: dt.date
    start_epoch: int
    end_epoch: int
    onset_epoch: int
    offset_epoch: int
    source: str
    conflicts: tuple[str, ...] = ()


@dataclass(frozen=True)
class PeriodConfig:
    """Options of :func:`find_periods` (documented defaults; sources in the module docstring).

    Parameters
    ----------
    detection : DetectionConfig
    nonwear : NonwearConfig
        Used when ``find_periods`` detects non-wear itself.
    diary_tolerance_minutes : float, default=30
        A diary time this close to a detected boundary confirms it (common practice: diaries are
        written in rounded clock times and from memory).
    marker_tolerance_minutes : float, default=30
        A marker this close to a detected boundary replaces it (common practice).
    min_main_minutes : float, default=120
        Shortest rest block taken as a main period (common practice).
    nap_min_minutes : float, default=20
        Shortest nap (common practice; 15-20 min are usual).
    nap_margin_minutes : float, default=30
        A nap starts or ends at least this far from a main period (our design: sleep right beside
        the main period belongs to it).
    nap_gap_minutes : float, default=5
        Wake calls up to this long inside a nap are bridged (a brief movement does not end a nap;
        common practice, as the merging of rest blocks).
    spell_edge_minutes : float, default=2
    spell_edge_share : float, default=0.75
        A nap candidate without any movement whose zero run has at least this share of moving
        epochs in the ``spell_edge_minutes`` on both sides is a short spell off the wrist (taking a
        device off and putting it on moves it; settling into a nap is quiet). Our design.
    diary_slack_minutes : float, default=15
        Where the diary set the rest start (end), sleep onset (offset) is searched from this long
        before its bed time (up to this long after its rise time) only; with no sleep there, over
        the whole search span (our design: diaries are written in rounded times).
    diary_quiet_minutes : float, default=90
    diary_quiet_share : float, default=0.6
        A diary bed time before the detected rest (a rise time after it) farther than the
        tolerance but within ``diary_quiet_minutes`` is still taken when at most this share of the
        epochs between them move: quiet wake in bed (reading, lying awake) moves in a third to a
        half of its 30-s epochs, sitting up awake in most (our design).
    """

    detection: DetectionConfig = field(default_factory=DetectionConfig)
    nonwear: NonwearConfig = field(default_factory=NonwearConfig)
    diary_tolerance_minutes: float = 30.0
    marker_tolerance_minutes: float = 30.0
    min_main_minutes: float = 120.0
    nap_min_minutes: float = 20.0
    nap_margin_minutes: float = 30.0
    nap_gap_minutes: float = 5.0
    spell_edge_minutes: float = 2.0
    spell_edge_share: float = 0.75
    diary_slack_minutes: float = 15.0
    diary_quiet_minutes: float = 90.0
    diary_quiet_share: float = 0.6


def _day_of(recording: Recording, epoch: int) -> dt.date:
    """Noon-to-noon day of an epoch: the local date 12 h earlier."""
    return (recording.time_at(epoch) - pd.Timedelta(hours=12)).date()


@dataclass
class _Main:
    start: int
    end: int
    search: tuple[int, int]
    source: str = "detected"
    conflicts: list[str] = field(default_factory=list)
    diary_sides: set[str] = field(default_factory=set)


def _anchor_markers(main: _Main, markers: NDArray[np.intp], tol: int) -> None:
    for side in ("start", "end"):
        at = getattr(main, side)
        near = markers[np.abs(markers - at) <= tol]
        if near.size:
            setattr(main, side, int(near[np.argmin(np.abs(near - at))]) + (1 if side == "end" else 0))
            main.source = "marker"


def _quiet_outside(main: _Main, side: str, at: int, moving: NDArray[np.bool_], far: int, share: float) -> bool:
    """Whether ``at`` lies outside the block on ``side``, within ``far``, across quiet wake (few moving epochs)."""
    span = moving[at: main.start] if side == "start" else moving[main.end: at]
    gap = main.start - at if side == "start" else at - main.end
    return 0 < gap <= far and span.size > 0 and float(np.mean(span)) <= share


def _anchor_diary(main: _Main, day: DiaryDay, recording: Recording, tol: int, per_min: float,
                  moving: NDArray[np.bool_], config: PeriodConfig) -> None:
    far = int(config.diary_quiet_minutes * per_min)
    for side, when, name in (("start", day.bed_time, "bed"), ("end", day.rise_time, "rise")):
        if when is None:
            continue
        at = recording.epoch_at(when)
        gap = abs(at - getattr(main, side))
        if gap <= tol or _quiet_outside(main, side, at, moving, far, config.diary_quiet_share):
            if main.source in ("detected", "diary"):
                setattr(main, side, at)
                main.source = "diary"
                main.diary_sides.add(side)
            main.search = (min(main.search[0], at), max(main.search[1], at))
        else:
            main.conflicts.append(f"diary {name} time {math.ceil(gap / per_min - 1e-9)} min from detected rest")


def find_periods(recording: Recording, *, diary: Sequence[DiaryDay] | None = None,
                 nonwear: Sequence[NonwearInterval] | None = None, p_sleep: NDArray[np.float64] | None = None,
                 config: PeriodConfig = PeriodConfig()) -> list[SleepPeriod]:
    """Main sleep periods and naps of a recording (method in the module docstring).

    Parameters
    ----------
    recording : Recording
    diary : sequence of DiaryDay, optional
    nonwear : sequence of NonwearInterval, optional
        Off-wrist intervals; None detects them with :func:`~models.recordings.nonwear.detect_nonwear`'s
        defaults (pass ``[]`` for none). Non-worn and missing epochs are neither rest nor sleep.
    p_sleep : ndarray of float64, shape (n_epochs,), optional
        A model's sleep probability per epoch; used for the sleep calls instead of the counts rule.
    config : PeriodConfig

    Returns
    -------
    list of SleepPeriod
        Sorted by start; at most one ``"main"`` per day.
    """
    n, es = recording.n_epochs, recording.epoch_seconds
    per_min = 60.0 / es
    if p_sleep is not None and np.shape(p_sleep) != (n,):
        raise ValueError(f"p_sleep has shape {np.shape(p_sleep)}, the recording {n} epochs")
    intervals = detect_nonwear(recording, config=config.nonwear) if nonwear is None else nonwear
    worn = ~nonwear_mask(n, intervals) & np.isfinite(recording.counts)
    det = config.detection
    counts = above_floor(recording.counts, moving_floor(recording.counts, worn, det))  # a noise floor is 0
    blocks = rest_blocks(counts, worn, es, det)
    calls = sleep_calls(counts, worn, es, det, None if p_sleep is None else np.asarray(p_sleep, float), blocks)
    mains: dict[dt.date, _Main] = {}
    for a, b in blocks:
        if b - a < config.min_main_minutes * per_min or sleep_bounds(calls, a, b, es, det) is None:
            continue
        day = _day_of(recording, (a + b) // 2)
        if day not in mains or b - a > mains[day].end - mains[day].start:
            mains[day] = _Main(a, b, (a, b))
    marker_epochs = np.flatnonzero(recording.markers)
    for main in mains.values():
        _anchor_markers(main, marker_epochs, int(config.marker_tolerance_minutes * per_min))
        main.search = (min(main.search[0], main.start), max(main.search[1], main.end))
    diary_days = {d.date: d for d in diary or ()}
    for date, entry in diary_days.items():
        if date in mains:
            _anchor_diary(mains[date], entry, recording, int(config.diary_tolerance_minutes * per_min), per_min,
                          worn & (counts > 0), config)
        elif entry.bed_time is not None and entry.rise_time is not None:
            a, b = recording.epoch_at(entry.bed_time), recording.epoch_at(entry.rise_time)
            if b - a >= config.min_main_minutes * per_min and sleep_bounds(calls, a, b, es, det) is not None:
                mains[date] = _Main(a, b, (a, b), "diary")
    out: list[SleepPeriod] = []
    slack = int(round(config.diary_slack_minutes * per_min))
    for date, main in mains.items():
        first, last = main.search
        if "start" in main.diary_sides:  # sleep onset: the first persistent sleep after the diary's bed time
            first = max(first, main.start - slack)
        if "end" in main.diary_sides:  # sleep offset: the last before its rise time
            last = min(last, main.end + slack)
        bounds = sleep_bounds(calls, first, last, es, det) if last > first else None
        bounds = bounds or sleep_bounds(calls, *main.search, es, det)
        if bounds is None:
            continue
        onset, offset = bounds
        out.append(SleepPeriod("main", date, min(main.start, onset), max(main.end, offset), onset, offset,
                               main.source, tuple(main.conflicts)))
    out += _naps(recording, counts, calls, out, diary_days, config)
    return sorted(out, key=lambda p: (p.start_epoch, p.kind))


def _naps(recording: Recording, counts: NDArray[np.float64], calls: NDArray[np.bool_], mains: list[SleepPeriod],
          diary_days: dict[dt.date, DiaryDay], config: PeriodConfig) -> list[SleepPeriod]:
    per_min = 60.0 / recording.epoch_seconds
    margin = int(config.nap_margin_minutes * per_min)
    free = close_gaps(calls, int(round(config.nap_gap_minutes * per_min)))
    for p in mains:
        free[max(0, p.start_epoch - margin): p.end_epoch + margin] = False
    diary_naps = [(recording.epoch_at(a), recording.epoch_at(b)) for d in diary_days.values() for a, b in d.naps]
    used = [False] * len(diary_naps)
    naps = []
    edge = max(1, int(round(config.spell_edge_minutes * per_min)))
    for a, b in zip(*runs(free), strict=True):
        if b - a < config.nap_min_minutes * per_min:
            continue
        if not np.any(counts[a:b] > 0):
            first, stop = int(a), int(b)
            while first > 0 and counts[first - 1] == 0:
                first -= 1
            while stop < counts.size and counts[stop] == 0:
                stop += 1
            # the epochs bounding a zero run always move: judge the minutes beyond them
            if all(awake_sides(counts, first - 1, stop + 1, edge, config.spell_edge_share, 0.0)):
                continue  # exactly still and moving right before and after: off the wrist a while, not asleep
        source = "detected"
        for k, (x, y) in enumerate(diary_naps):
            if x < b and a < y:
                used[k], source = True, "diary"
        naps.append(SleepPeriod("nap", _day_of(recording, int(a)), int(a), int(b), int(a), int(b), source))
    missing = [(x, y) for (x, y), hit in zip(diary_naps, used, strict=True) if not hit]
    if missing:  # diary naps without detected sleep: said on that day's main period
        by_day = {p.day: i for i, p in enumerate(mains)}
        for x, y in missing:
            day = _day_of(recording, x)
            if day in by_day:
                i = by_day[day]
                text = (f"diary nap {recording.time_at(x).strftime('%H:%M')}-{recording.time_at(y).strftime('%H:%M')} "
                        "without detected sleep")
                mains[i] = SleepPeriod(**{**mains[i].__dict__, "conflicts": (*mains[i].conflicts, text)})
    return naps


def period_night(recording: Recording, period: SleepPeriod, *,
                 nonwear_mask: NDArray[np.bool_] | None = None) -> Night:
    """The night of a period's rest interval: epochs ``[start_epoch, end_epoch)`` of the recording.

    Parameters
    ----------
    recording : Recording
    period : SleepPeriod
    nonwear_mask : ndarray of bool, shape (n_epochs,), optional
        Off-wrist epochs of the recording; their counts become NaN (missing) in the night.

    Returns
    -------
    Night
        ``lights_off`` / ``lights_on`` at the rest interval's ends (the whole night is in bed);
        label ``"<participant>-<day>[-nap]"``. Its ``night_id`` comes from the content hash (start
        time, epoch length, counts, lights), so the same period of the same recording always
        gives the same id.
    """
    a, b = period.start_epoch, period.end_epoch
    counts = recording.counts[a:b].copy()
    if nonwear_mask is not None:
        counts[np.asarray(nonwear_mask, dtype=bool)[a:b]] = np.nan
    start = recording.time_at(a)
    label = f"{recording.participant_id}-{period.day.isoformat()}" + ("" if period.kind == "main" else "-nap")
    return Night(participant_id=recording.participant_id, start=start, epoch_seconds=recording.epoch_seconds,
                 counts=counts, lights_off=start, lights_on=recording.time_at(b), label=label,
                 source_name=recording.source_name, source_epoch_seconds=recording.source_epoch_seconds)
