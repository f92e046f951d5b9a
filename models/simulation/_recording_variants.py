"""Harder SIMULATED recording variants (private to :mod:`models.simulation.recordings`).

Each variant is switched on by a :class:`~models.simulation.recordings.RecordingSpec` option whose
default leaves it off; every variant draws from its own random stream, so with the defaults the
recordings are bit for bit those without variants. The variants:

* quiet wake in bed before the night's own sleep latency (reading, a phone: sparse small
  movements, their amount varying per night), so bed time and sleep onset lie apart;
* lying awake and still in bed in the morning before rising;
* gradual activity changes: day activity fading before bed and rising again after getting up;
* late nights: bed hours later than usual and the night cut short before noon (no clear main sleep);
* a device noise floor: counts never exactly zero (1 .. ``noise_floor_counts`` added to every
  epoch, off the wrist too), some devices with a constant offset on top;
* the device taken off in bed (charging) soon after going to bed and put on again after rising;
* diary errors of 15-45 min.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Protocol

import numpy as np
from numpy.typing import NDArray

__all__ = ["bed_offwrist", "diary_shift_min", "late_night_hours", "night_edges", "noise_floor"]

_PER_MIN = 2


class RecordingSpec(Protocol):
    """The options of :class:`~models.simulation.recordings.RecordingSpec` the variants read."""

    @property
    def bed_wake_minutes(self) -> tuple[float, float]: ...
    @property
    def morning_still_minutes(self) -> tuple[float, float]: ...
    @property
    def gradual_minutes(self) -> float: ...
    @property
    def late_night_rate(self) -> float: ...
    @property
    def noise_floor_rate(self) -> float: ...
    @property
    def noise_floor_counts(self) -> int: ...
    @property
    def noise_offset_rate(self) -> float: ...
    @property
    def bed_offwrist_rate(self) -> float: ...
    @property
    def diary_shift_rate(self) -> float: ...


class SimulatedDay(Protocol):
    """The truth of a day the variants read (:class:`~models.simulation.recordings.SimulatedDay`)."""

    @property
    def bed_epoch(self) -> int: ...
    @property
    def rise_epoch(self) -> int: ...
    @property
    def onset_epoch(self) -> int: ...


def _emit_low(rng: np.random.Generator, n: int, prob: float, mean: float, gain: float) -> NDArray[np.float64]:
    moving = rng.random(n) < prob
    return np.where(moving, rng.poisson(rng.gamma(1.5, mean / 1.5, n) * gain), 0).astype(np.float64)


def late_night_hours(extra: np.random.Generator, spec: RecordingSpec) -> float:
    """Hours a night starts late (0 on a usual night)."""
    if spec.late_night_rate <= 0 or extra.random() >= spec.late_night_rate:
        return 0.0
    return float(extra.uniform(3.0, 5.0))


def night_edges(extra: np.random.Generator, spec: RecordingSpec, counts: NDArray[np.float64],
                sleep: NDArray[np.bool_], bed: int, rise: int, onset: int, offset: int, gain: float,
                quiet_movement: float) -> tuple[int, int]:
    """Quiet wake before the night, still wake before rising and gradual edges; the new (bed, rise)."""
    n = counts.size
    lo, hi = spec.bed_wake_minutes
    if hi > 0:
        length = int(extra.uniform(lo, hi)) * _PER_MIN
        a = max(0, bed - length)
        prob, mean = float(extra.uniform(0.25, 0.55)), float(extra.uniform(8.0, 30.0))
        counts[a:bed] = _emit_low(extra, bed - a, prob, mean, gain)
        sleep[a:bed] = False
        bed = a
    lo, hi = spec.morning_still_minutes
    if hi > 0 and rise < n:
        length = min(int(extra.uniform(lo, hi)) * _PER_MIN, n - rise)
        prob = min(1.0, float(extra.uniform(0.15, 0.3)) * quiet_movement)
        counts[rise: rise + length] = _emit_low(extra, length, prob, 10.0, gain)
        sleep[rise: rise + length] = False
        rise += length
    if spec.gradual_minutes > 0:
        ramp = int(extra.uniform(0.5, 1.0) * spec.gradual_minutes) * _PER_MIN
        a = max(0, bed - ramp)
        counts[a:bed] = np.round(counts[a:bed] * np.linspace(1.0, 0.15, bed - a))
        b = min(n, rise + ramp)
        counts[rise:b] = np.round(counts[rise:b] * np.linspace(0.15, 1.0, b - rise))
    return bed, rise


def bed_offwrist(extra: np.random.Generator, spec: RecordingSpec, days: Sequence[SimulatedDay],
                 taken: list[tuple[int, int, str]], counts: NDArray[np.float64], sleep: NDArray[np.bool_],
                 markers: NDArray[np.bool_], gain: float) -> list[tuple[int, int, str]]:
    """Nights the device is taken off in bed (charging) and put on again after rising: kind ``"bed"``."""
    out: list[tuple[int, int, str]] = []
    if spec.bed_offwrist_rate <= 0:
        return out
    for day in days[:-1]:
        if extra.random() >= spec.bed_offwrist_rate:
            continue
        room = max(3, (day.onset_epoch - day.bed_epoch) // _PER_MIN)
        a = day.bed_epoch + int(extra.integers(2, room)) * _PER_MIN
        b = min(counts.size, day.rise_epoch + int(extra.integers(1, 10)) * _PER_MIN)
        if any(x < b + 120 and a - 120 < y for x, y, _ in taken + out):
            continue
        counts[a - _PER_MIN: a] = _emit_low(extra, _PER_MIN, 1.0, 120.0, gain)  # taking it off moves it
        counts[a:b] = 0.0
        sleep[a - _PER_MIN: b] = False
        markers[a:b] = False
        out.append((a, b, "bed"))
    return out


def noise_floor(extra: np.random.Generator, spec: RecordingSpec, counts: NDArray[np.float64]) -> None:
    """Add a device's noise floor to its counts in place (some devices only, see the spec)."""
    if spec.noise_floor_rate <= 0 or extra.random() >= spec.noise_floor_rate:
        return
    counts += extra.integers(1, spec.noise_floor_counts + 1, counts.size)
    if extra.random() < spec.noise_offset_rate:
        counts += float(extra.integers(2, 9))


def diary_shift_min(extra: np.random.Generator, spec: RecordingSpec) -> float:
    """An extra diary error of 15-45 min (either way) with the spec's rate, else 0."""
    if spec.diary_shift_rate <= 0 or extra.random() >= spec.diary_shift_rate:
        return 0.0
    return float(extra.choice([-1, 1]) * extra.uniform(15.0, 45.0))
