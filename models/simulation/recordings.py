"""Simulated continuous recordings: weeks of wear with days, nights, naps, off-wrist time, diaries, PSG.

Everything here is SIMULATED (invented participants). One participant's recording runs from noon of
the first day to noon after the last, in 30-s epochs. Each noon-to-noon day holds:

* day activity: alternating active and sedentary bouts (the sedentary ones still move most epochs);
* one main sleep period from :func:`~models.simulation.simulator.simulate_night` (active wake, in bed
  lying still before sleep, sleep cycles with awakenings and postural shifts, quiet final wake);
  bed times follow the person's chronotype, an hour later before free days (Saturday, Sunday);
* sometimes a nap (lying down, a few quiet minutes, light sleep), sometimes a short doze (< 20 min);
* sometimes an off-wrist interval (exact zero counts): by day (shower, charging; active on both
  sides), in the evening until bed time (charging), in the morning after rising, or taken off in
  the night after getting up (then sleep goes on unobserved);
* event markers (button presses) at some bed and rise times;
* a sleep diary with rounding, small and occasional large errors, blank days and forgotten naps;
* on a few nights a PSG hypnogram on the PSG system's own clock: the true stages, their start
  written ``clock_offset_s`` seconds early (add the offset to PSG times to get actigraph times).

The ground truth (bed, rise, sleep onset and offset per day, naps, non-wear, sleep per epoch, PSG
clock offsets) comes with each recording. Seeded: the same spec and seed give the same recordings
bit for bit; the night simulator's cohorts are not touched (own random streams).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ..recordings.diary import DiaryDay, read_diary
from ..recordings.recording import Recording
from ._recording_variants import bed_offwrist, diary_shift_min, late_night_hours, night_edges, noise_floor
from .simulator import _EMISSION, PersonTraits, _sleep_stages, _traits, simulate_night

__all__ = ["RecordingSpec", "SimulatedDay", "SimulatedPsg", "SimulatedRecording", "simulate_recordings"]

_EPOCH = 30
_PER_MIN = 2
_DAY = 2880  # epochs per day


@dataclass(frozen=True)
class RecordingSpec:
    """Shape of a set of simulated recordings (documented defaults).

    Parameters
    ----------
    n_participants : int, default=6
    n_days : int, default=28
    nap_rate : float, default=0.25
        Chance of a nap (>= 20 min) per day.
    doze_rate : float, default=0.1
        Chance of a doze under 20 min per day.
    offwrist_rate : float, default=0.25
        Chance of an off-wrist interval per day.
    diary_blank_rate : float, default=0.12
        Chance a diary day is left blank.
    diary_error_min : float, default=10.0
        SD of the diary's small errors, minutes (before rounding to 5 min).
    diary_gross_rate : float, default=0.06
        Chance of a gross diary error (45-120 min off).
    marker_rate : float, default=0.5
        Chance of a button press at bed time (and, separately, at rise time).
    psg_nights : int, default=2
        Nights per participant with a PSG hypnogram.
    spread : float, default=1.0
        Person-to-person spread of the night simulator's traits.
    id_prefix : str, default="RC"
    first_date : str, default="2031-05-05"
    tz : str, default="Europe/Oslo"
    bed_wake_minutes : tuple of float, default=(0, 0)
        Range of a night's quiet wake in bed (reading, a phone) before its own sleep latency, drawn
        per night; (0, 0) for none. This and the options below make harder variants, all off by
        default (:mod:`models.simulation._recording_variants`).
    morning_still_minutes : tuple of float, default=(0, 0)
        Range of lying awake and still before rising.
    gradual_minutes : float, default=0
        Day activity fades over up to this long before bed and rises again after getting up.
    late_night_rate : float, default=0
        Chance of a late night (bed 3-5 h late, the night cut short at 11:00).
    noise_floor_rate : float, default=0
        Chance a participant's device has a noise floor (counts never exactly zero) ...
    noise_floor_counts : int, default=3
        ... adding 1 .. this many counts to every epoch ...
    noise_offset_rate : float, default=0.3
        ... and, with this chance, a constant 2-8 counts on top.
    bed_offwrist_rate : float, default=0
        Chance per night the device is taken off in bed (charging) and put on after rising.
    diary_shift_rate : float, default=0
        Chance per diary time of an extra error of 15-45 min.
    """

    n_participants: int = 6
    n_days: int = 28
    nap_rate: float = 0.25
    doze_rate: float = 0.1
    offwrist_rate: float = 0.25
    diary_blank_rate: float = 0.12
    diary_error_min: float = 10.0
    diary_gross_rate: float = 0.06
    marker_rate: float = 0.5
    psg_nights: int = 2
    spread: float = 1.0
    id_prefix: str = "RC"
    first_date: str = "2031-05-05"
    tz: str = "Europe/Oslo"
    bed_wake_minutes: tuple[float, float] = (0.0, 0.0)
    morning_still_minutes: tuple[float, float] = (0.0, 0.0)
    gradual_minutes: float = 0.0
    late_night_rate: float = 0.0
    noise_floor_rate: float = 0.0
    noise_floor_counts: int = 3
    noise_offset_rate: float = 0.3
    bed_offwrist_rate: float = 0.0
    diary_shift_rate: float = 0.0


@dataclass(frozen=True)
class SimulatedDay:
    """Truth of one noon-to-noon day (epoch indexes into the recording; stops exclusive).

    ``observable`` is False when the device was taken off during the main period (its sleep after
    that is not in the counts).
    """

    date: dt.date
    bed_epoch: int
    rise_epoch: int
    onset_epoch: int
    offset_epoch: int
    free_day: bool
    observable: bool
    naps: tuple[tuple[int, int], ...] = ()


@dataclass(frozen=True)
class SimulatedPsg:
    """A PSG hypnogram on the PSG clock: ``start`` is the true start minus ``clock_offset_s``."""

    date: dt.date
    start: pd.Timestamp
    epoch_seconds: int
    stages: NDArray[np.str_] = field(repr=False)
    clock_offset_s: float
    true_start: pd.Timestamp

    def to_json(self) -> dict[str, object]:
        """``{"start", "epoch_seconds", "stages"}`` as a hypnogram file holds them."""
        return {"start": self.start.isoformat(), "epoch_seconds": self.epoch_seconds,
                "stages": self.stages.tolist()}


@dataclass(frozen=True)
class SimulatedRecording:
    """One simulated participant's recording with its diary, markers, PSG nights and ground truth."""

    recording: Recording
    diary: list[DiaryDay]
    diary_csv: str = field(repr=False)
    days: tuple[SimulatedDay, ...]
    nonwear: tuple[tuple[int, int, str], ...]  # (start, stop, kind)
    sleep: NDArray[np.bool_] = field(repr=False)  # true sleep per epoch while worn
    psg: tuple[SimulatedPsg, ...]
    traits: PersonTraits = field(repr=False)


def _emit(rng: np.random.Generator, prob: NDArray[np.float64], mean: NDArray[np.float64],
          gain: float) -> NDArray[np.float64]:
    moving = rng.random(prob.size) < prob
    rate = rng.gamma(1.5, mean / 1.5) * gain
    return np.where(moving, rng.poisson(rate), 0).astype(np.float64)


def _day_activity(rng: np.random.Generator, n: int, gain: float) -> NDArray[np.float64]:
    """Alternating active (10-60 min) and sedentary (10-90 min) bouts."""
    prob = np.empty(n)
    mean = np.empty(n)
    at, active = 0, bool(rng.random() < 0.5)
    while at < n:
        length = int(rng.integers(10, 60 if active else 90)) * _PER_MIN
        prob[at: at + length], mean[at: at + length] = (_EMISSION["active"] if active else (0.75, 45.0))
        at += length
        active = not active
    return _emit(rng, prob, mean, gain)


def _nap(rng: np.random.Generator, traits: PersonTraits, sleep_len: int) -> tuple[NDArray[np.float64], int, int]:
    """Counts of a nap episode (lying down, quiet minutes, light sleep, quiet) and its sleep epochs."""
    settle = int(rng.integers(2, 8)) * _PER_MIN
    tail = int(rng.integers(1, 4)) * _PER_MIN
    stages = _sleep_stages(rng, sleep_len)
    states = np.concatenate([np.full(settle, "quiet"), np.where(stages == "N3", "N2", stages),
                             np.full(tail, "quiet")])
    prob = np.array([_EMISSION[s][0] for s in states]) * np.where(states == "quiet", traits.quiet_wake_movement,
                                                                  traits.sleep_movement)
    mean = np.array([_EMISSION[s][1] for s in states])
    return _emit(rng, np.minimum(prob, 1.0), mean, traits.gain), settle, settle + sleep_len


def _clock_epoch(day0: pd.Timestamp, day: int, hours: float, tz: str) -> int:
    """Epoch of a local clock time ``hours`` after midnight starting day ``day`` (day 0 = first noon's date)."""
    when = (day0.tz_localize(None).normalize() + pd.Timedelta(days=day, hours=hours)).tz_localize(
        tz, ambiguous=True, nonexistent="shift_forward")
    return int(round((when - day0).total_seconds() / _EPOCH))


def _participant(rng: np.random.Generator, spec: RecordingSpec, pid: str,
                 extra: np.random.Generator) -> SimulatedRecording:
    traits = _traits(rng, spec.spread)
    day0 = pd.Timestamp(f"{spec.first_date} 12:00").tz_localize(spec.tz)
    n = _clock_epoch(day0, spec.n_days, 12.0, spec.tz)
    counts = _day_activity(rng, n, traits.gain)
    sleep = np.zeros(n, dtype=bool)
    markers = np.zeros(n, dtype=bool)
    chrono_h = float(rng.normal(0.0, 0.6))
    days: list[SimulatedDay] = []
    stages_of: dict[int, tuple[int, NDArray[np.str_]]] = {}
    for d in range(spec.n_days):
        date = (day0 + pd.Timedelta(days=d)).date()
        free = (date + dt.timedelta(days=1)).weekday() >= 5  # the morning after is Saturday or Sunday
        bed_h = 23.0 + chrono_h + (1.0 if free else 0.0) + float(rng.normal(0.0, 0.5))
        late_h = late_night_hours(extra, spec)
        bed_h += late_h
        pre = int(rng.integers(10, 40))
        start = _clock_epoch(day0, d, bed_h, spec.tz) - pre * _PER_MIN
        sim = simulate_night(rng, traits, participant_id=pid, start=day0 + pd.Timedelta(seconds=start * _EPOCH),
                             labelled=True)
        stop = min(n, start + sim.night.n_epochs, _clock_epoch(day0, d + 1, 11.0, spec.tz) if late_h else n)
        counts[start:stop] = sim.night.counts[: stop - start]
        asleep = sim.stages[: stop - start] != "W"
        sleep[start:stop] = asleep
        first, stop_in_bed = sim.night.in_bed
        bed, rise = start + first, min(stop, start + stop_in_bed)
        idx = np.flatnonzero(asleep)
        bed, rise = night_edges(extra, spec, counts, sleep, bed, rise, start + int(idx[0]), start + int(idx[-1]) + 1,
                                traits.gain, traits.quiet_wake_movement)
        stages_of[d] = (start, sim.stages[: stop - start])
        naps: list[tuple[int, int]] = []
        for kind, rate in (("nap", spec.nap_rate), ("doze", spec.doze_rate)):
            if rng.random() >= rate:
                continue
            length = int(rng.integers(25, 90) if kind == "nap" else rng.integers(6, 16)) * _PER_MIN
            at = _clock_epoch(day0, d, float(rng.uniform(13.0, 17.5)), spec.tz)
            if naps and abs(at - naps[0][0]) < 240:
                continue
            nap_counts, s0, s1 = _nap(rng, traits, length)
            counts[at: at + nap_counts.size] = nap_counts
            sleep[at + s0: at + s1] = True
            naps.append((at + s0, at + s1))
        for epoch in (bed, rise):
            if rng.random() < spec.marker_rate:
                markers[min(n - 1, epoch + int(rng.integers(-2, 3)))] = True
        days.append(SimulatedDay(date=date, bed_epoch=bed, rise_epoch=rise, onset_epoch=start + int(idx[0]),
                                 offset_epoch=start + int(idx[-1]) + 1, free_day=free, observable=True,
                                 naps=tuple(sorted(naps))))
    nonwear = _offwrist(rng, spec, day0, days, counts, sleep, markers, traits.gain)
    nonwear = sorted(nonwear + bed_offwrist(extra, spec, days, nonwear, counts, sleep, markers, traits.gain))
    noise_floor(extra, spec, counts)
    for a, _, kind in nonwear:
        if kind in ("night", "bed"):
            i = next(i for i, day in enumerate(days) if day.bed_epoch <= a < day.rise_epoch)
            days[i] = replace(days[i], observable=False)
    recording = Recording(participant_id=pid, start=day0, epoch_seconds=_EPOCH, counts=counts, markers=markers,
                          source_name=f"simulated-{pid}.csv")
    diary_csv = _diary_csv(rng, spec, day0, days, extra)
    diary = read_diary(diary_csv.encode(), tz=spec.tz)
    psg = _psg(rng, spec, day0, stages_of, days)
    return SimulatedRecording(recording=recording, diary=diary, diary_csv=diary_csv, days=tuple(days),
                              nonwear=tuple(nonwear), sleep=sleep, psg=psg, traits=traits)


def _offwrist(rng: np.random.Generator, spec: RecordingSpec, day0: pd.Timestamp, days: list[SimulatedDay],
              counts: NDArray[np.float64], sleep: NDArray[np.bool_],
              markers: NDArray[np.bool_], gain: float) -> list[tuple[int, int, str]]:
    """Off-wrist intervals (zero counts, no markers); each kind's sides as people take devices off."""
    out: list[tuple[int, int, str]] = []
    nights = [(d.bed_epoch - 60, d.rise_epoch + 60) for d in days]
    naps = [(a - 60, b + 60) for d in days for a, b in d.naps]
    for d, day in enumerate(days[:-1]):
        if rng.random() >= spec.offwrist_rate:
            continue
        kind = str(rng.choice(["day", "day", "evening", "morning", "night", "short"]))
        if kind in ("day", "short"):
            length = int(rng.integers(90, 240) if kind == "day" else rng.integers(20, 60)) * _PER_MIN
            a = _clock_epoch(day0, d + 1, float(rng.uniform(9.5, 18.0)), spec.tz)
        elif kind == "evening":  # charging until bed time
            length = int(rng.integers(90, 180)) * _PER_MIN
            a = day.bed_epoch - length
        elif kind == "morning":  # taken off at rising, put on again later
            length = int(rng.integers(90, 150)) * _PER_MIN
            a = day.rise_epoch + int(rng.integers(2, 10)) * _PER_MIN
        else:  # got up in the night, took it off, put it on again after rising
            low, high = day.onset_epoch + 180 * _PER_MIN, day.offset_epoch - 120 * _PER_MIN
            if high <= low:
                continue
            a = int(rng.integers(low, high))
            length = day.rise_epoch + 15 * _PER_MIN - a
        b = a + length
        blocked = naps + (nights if kind in ("day", "short") else [])
        if any(x < b and a < y for x, y in blocked) or (out and a < out[-1][1] + 120):
            continue
        if kind == "night":  # up and about before taking it off
            counts[a - 8 * _PER_MIN: a] = _emit(rng, np.full(8 * _PER_MIN, 0.95), np.full(8 * _PER_MIN, 200.0), gain)
            sleep[a - 8 * _PER_MIN: a] = False
        counts[a:b] = 0.0
        markers[a:b] = False
        sleep[a:b] = False
        out.append((a, b, kind))
    return out


def _hhmm(recording_start: pd.Timestamp, epoch: int, error_min: float) -> str:
    when = recording_start + pd.Timedelta(seconds=epoch * _EPOCH + error_min * 60)
    return when.round("5min").strftime("%H:%M")


def _diary_csv(rng: np.random.Generator, spec: RecordingSpec, day0: pd.Timestamp,
               days: list[SimulatedDay], extra: np.random.Generator) -> str:
    """Diary text: rounded times with small errors, some gross errors, blank days and forgotten naps."""
    n_naps = max((len(d.naps) for d in days), default=0)
    head = ["date", "bed_time", "rise_time"] + [f"nap{k + 1}_{p}" for k in range(n_naps) for p in ("start", "end")]
    lines = [",".join(head)]
    for day in days:
        cells = [day.date.isoformat()]
        if rng.random() < spec.diary_blank_rate:
            cells += ["", ""]
        else:
            for epoch in (day.bed_epoch, day.rise_epoch):
                err = float(rng.normal(0.0, spec.diary_error_min))
                if rng.random() < spec.diary_gross_rate:
                    err = float(rng.choice([-1, 1]) * rng.uniform(45, 120))
                err += diary_shift_min(extra, spec)
                cells.append(_hhmm(day0, epoch, err))
        for k in range(n_naps):
            if k < len(day.naps) and rng.random() < 0.75:
                a, b = day.naps[k]
                cells += [_hhmm(day0, a, float(rng.normal(0, 5))), _hhmm(day0, b, float(rng.normal(0, 5)))]
            else:
                cells += ["", ""]
        lines.append(",".join(cells))
    return "\n".join(lines) + "\n"


def _psg(rng: np.random.Generator, spec: RecordingSpec, day0: pd.Timestamp,
         stages_of: dict[int, tuple[int, NDArray[np.str_]]], days: list[SimulatedDay]) -> tuple[SimulatedPsg, ...]:
    """PSG on ``spec.psg_nights`` observable nights: stages from lights-off to lights-on, offset clock."""
    usable = [d for d, day in enumerate(days) if day.observable]
    chosen = sorted(rng.choice(usable, size=min(spec.psg_nights, len(usable)), replace=False).tolist())
    out = []
    for d in chosen:
        start, stages = stages_of[d]
        day = days[d]
        first, stop = day.bed_epoch - start, day.rise_epoch - start
        if first < 0 or stop > stages.size:  # in bed beyond the night's own stages (quiet or still wake): awake
            padded = np.full(stop - first, "W", dtype=stages.dtype)
            lo, hi = max(first, 0), min(stop, stages.size)
            padded[lo - first: hi - first] = stages[lo:hi]
            stages, first, stop = padded, 0, stop - first
        offset = float(np.round(rng.choice([-1, 1]) * rng.uniform(20, 240), 1))
        true_start = day0 + pd.Timedelta(seconds=day.bed_epoch * _EPOCH)
        out.append(SimulatedPsg(date=day.date, start=true_start - pd.Timedelta(seconds=offset), epoch_seconds=_EPOCH,
                                stages=np.asarray(stages[first:stop]), clock_offset_s=offset,
                                true_start=true_start))
    return tuple(out)


def simulate_recordings(spec: RecordingSpec = RecordingSpec(), *, seed: int = 20310505) -> list[SimulatedRecording]:
    """Simulate one recording per participant; the same ``spec`` and ``seed`` give the same output bit for bit."""
    rng = np.random.default_rng(seed)
    return [_participant(np.random.default_rng(rng.integers(2**63)), spec, f"{spec.id_prefix}-{p + 1:02d}",
                         np.random.default_rng([seed, p, 7]))  # the variants' own stream
            for p in range(spec.n_participants)]
