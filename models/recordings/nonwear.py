"""Non-wear (off-wrist) intervals: the Choi zero-count rule, then the wrist context that tells still sleep apart.

Step 1, candidates: the count rule of Choi et al. 2011 (Med Sci Sports Exerc 43:357; from memory),
on the recording's own epochs. A candidate is a stretch of at least 90 min of zero counts that may
contain interruptions of at most 2 min of non-zero counts, each allowed only when the 30 min before
and the 30 min after it are all zero counts. The durations are converted to epochs (a 2-min
allowance is 4 epochs of 30 s, 8 of 15 s); a missing epoch (NaN) counts as zero (nothing says the
device was worn). The rule was derived for hip-worn devices, where still wear is rare.

A device with a noise floor never gives exact zeros (our adaptation, our design): when fewer than
``floor_zero_share`` (20 %) of the counts are exactly zero, the counts at or below the floor's top
are its zeros for every step here. The top is read from the recording's own histogram of whole
counts (still sleep and off-wrist time pile up on the floor's few values: the most frequent count
and the values above it at least ``floor_peak_share`` (a quarter) as frequent). Off the wrist the
counts then stay on the floor; still sleep rises above it with its sparse twitches (the flatness
test below).

Step 2, wrist context. On the wrist, still sleep also gives long runs of zeros, so a candidate is
kept as non-wear only on further evidence (our own design; thresholds are common practice unless
a source is named):

* ``long``: it lasts at least ``long_minutes`` (240 min), far beyond the still stretches of sleep,
  which a postural shift or a small movement interrupts within the hour or two (common practice);
* ``between active stretches``: the ``edge_minutes`` (10 min) on both sides are awake activity: at
  least half of their epochs move (``edge_moving_share``) and their mean count is at least
  ``active_fraction`` (0.1) of the person's moving level, the median of the recording's non-zero
  counts. A device is taken off and put on by someone awake, whereas sleep is entered and left
  through quiet wake with sparse small movements. A side at the recording's start or end counts as
  active (a device lies switched on before and after it is worn);
* ``flat``: at most ``flat_per_hour`` (0.25) non-zero epochs per hour inside: a device on a table is
  exactly still; sleep's still stretches carry sparse small counts.

A candidate counts as *at rest* when it lies mostly (at least half) inside a rest interval given
by the caller (``rest``, e.g. detected main sleep periods) or, without one, in the person's rest
hours: the 30-min clock bins whose mean count over the recording (candidates left out) is below
``rest_fraction`` (0.2) of the median bin; bins the recording never covers fall back to the
clock window ``night_hours`` (22:00-08:00 local). At rest a candidate needs more evidence: flat,
and long or between active stretches (Choi's allowances can chain a very still sleeper's night into
hours of "zeros", but such a stretch still carries its sparse movements; its longest run of exact
zeros, when it lasts the minimum, is judged on its own). Out of rest it needs to
be long or to have an active side (flatness alone is not enough: a very still sleeper gives flat
stretches early in the night, when the bins of the rest hours still mix evenings awake and asleep).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ._runs import above_floor, active_level, awake_sides, floor_level, runs
from .recording import Recording

__all__ = ["NonwearConfig", "NonwearInterval", "choi_candidates", "detect_nonwear", "nonwear_mask"]


@dataclass(frozen=True)
class NonwearInterval:
    """Epochs ``start_epoch .. end_epoch - 1`` off the wrist, with the evidence that decided it."""

    start_epoch: int
    end_epoch: int
    reason: str


@dataclass(frozen=True)
class NonwearConfig:
    """Thresholds of :func:`detect_nonwear` (documented defaults; sources in the module docstring).

    Parameters
    ----------
    min_minutes : float, default=90
        Shortest candidate (Choi et al. 2011).
    spike_minutes : float, default=2
        Longest allowed interruption of non-zero counts (Choi et al. 2011).
    window_minutes : float, default=30
        Zero-count window required before and after an interruption (Choi et al. 2011).
    long_minutes : float, default=240
        A candidate this long is non-wear out of rest, and at rest when flat (common practice).
    edge_minutes : float, default=10
        Window on each side whose activity tells an abrupt edge (common practice).
    edge_moving_share : float, default=0.5
        An edge is active when at least this share of its epochs move (awake people move in most
        epochs, quiet wake and sleep in a third or less; our design) ...
    active_fraction : float, default=0.1
        ... and its mean count is at least this share of the person's moving level (our design).
    flat_per_hour : float, default=0.25
        At most this many non-zero epochs per hour make a candidate flat (one bump in four hours;
        our design).
    rest_fraction : float, default=0.2
        A 30-min clock bin is a rest hour when its mean count is below this share of the median bin
        (our design).
    night_hours : tuple of int, default=(22, 8)
        Local clock window taken as rest for bins the recording does not cover (common practice).
    floor_zero_share : float, default=0.2
    floor_peak_share : float, default=0.25
        A device with fewer exact zeros than ``floor_zero_share`` of its counts has a noise floor;
        counts up to the floor's top (the most frequent whole count and the values above it at
        least this share as frequent) are its zeros for every step above (our design,
        :func:`~._runs.floor_level`).
    """

    min_minutes: float = 90.0
    spike_minutes: float = 2.0
    window_minutes: float = 30.0
    long_minutes: float = 240.0
    edge_minutes: float = 10.0
    edge_moving_share: float = 0.5
    active_fraction: float = 0.1
    flat_per_hour: float = 0.25
    rest_fraction: float = 0.2
    night_hours: tuple[int, int] = (22, 8)
    floor_zero_share: float = 0.2
    floor_peak_share: float = 0.25


def choi_candidates(counts: NDArray[np.float64], epoch_seconds: int, *, min_minutes: float = 90.0,
                    spike_minutes: float = 2.0, window_minutes: float = 30.0) -> list[tuple[int, int]]:
    """Choi et al. 2011 non-wear periods on any epoch length, as ``(start, stop)`` epoch pairs.

    Parameters
    ----------
    counts : ndarray of float64, shape (n_epochs,)
        NaN (missing) counts as zero.
    epoch_seconds : int
    min_minutes, spike_minutes, window_minutes : float
        Shortest period, longest interruption and the zero window on both sides of it.

    Returns
    -------
    list of (int, int)
        Stop exclusive; each period starts and ends with a zero epoch.
    """
    per_min = 60.0 / epoch_seconds
    spike = int(round(spike_minutes * per_min))
    window = int(round(window_minutes * per_min))
    shortest = int(round(min_minutes * per_min))
    zero = ~(np.asarray(counts) > 0)  # NaN compares False: missing counts as zero
    starts, stops = runs(zero)
    out: list[tuple[int, int]] = []
    i = 0
    while i < starts.size:
        first, last = i, i
        while last + 1 < starts.size and starts[last + 1] - stops[last] <= spike \
                and stops[last] - starts[last] >= window and stops[last + 1] - starts[last + 1] >= window:
            last += 1
        if stops[last] - starts[first] >= shortest:
            out.append((int(starts[first]), int(stops[last])))
        i = last + 1
    return out


def _rest_hours(recording: Recording, candidates: list[tuple[int, int]], config: NonwearConfig) -> NDArray[np.bool_]:
    """Per epoch: whether its 30-min clock bin is one of the person's rest hours (module docstring)."""
    clock = recording.timestamps()
    bins = np.asarray(clock.hour * 2 + clock.minute // 30)
    counts = recording.counts.copy()
    for a, b in candidates:
        counts[a:b] = np.nan
    ok = np.isfinite(counts)
    total = np.bincount(bins[ok], weights=counts[ok], minlength=48)
    n = np.bincount(bins[ok], minlength=48)
    covered = n >= 60 * 60 // recording.epoch_seconds  # at least an hour of data in the bin
    profile = np.where(covered, total / np.maximum(n, 1), np.nan)
    start, stop = config.night_hours
    hours = np.arange(48) / 2
    night = (hours >= start) | (hours < stop) if start > stop else (hours >= start) & (hours < stop)
    rest_bins = night.copy()
    if covered.sum() >= 8:
        rest_bins[covered] = profile[covered] < config.rest_fraction * float(np.median(profile[covered]))
    return np.asarray(rest_bins[bins], dtype=bool)


def detect_nonwear(recording: Recording, *, config: NonwearConfig = NonwearConfig(),
                   rest: Sequence[tuple[int, int]] | None = None) -> list[NonwearInterval]:
    """Off-wrist intervals of a recording (rule in the module docstring).

    Parameters
    ----------
    recording : Recording
    config : NonwearConfig
    rest : sequence of (int, int), optional
        Rest intervals (start, stop epochs); without them the clock window ``config.night_hours``
        stands for rest.

    Returns
    -------
    list of NonwearInterval
        In time order, not overlapping.
    """
    zero = floor_level(recording.counts, zero_share=config.floor_zero_share, peak_share=config.floor_peak_share)
    counts = above_floor(recording.counts, zero)  # a device's noise floor is its zero
    per_min = 60.0 / recording.epoch_seconds
    level = active_level(counts)
    edge = max(1, int(round(config.edge_minutes * per_min)))
    candidates = choi_candidates(counts, recording.epoch_seconds, min_minutes=config.min_minutes,
                                 spike_minutes=config.spike_minutes, window_minutes=config.window_minutes)
    if rest is not None:
        rest_mask = np.zeros(recording.n_epochs, dtype=bool)
        for a, b in rest:
            rest_mask[max(a, 0): max(b, 0)] = True
    else:
        rest_mask = _rest_hours(recording, candidates, config) if candidates else np.zeros(0, dtype=bool)
    out = []
    for a, b in candidates:
        at_rest = float(rest_mask[a:b].mean()) >= 0.5
        found = _judge(counts, a, b, at_rest, per_min, edge, level, config, zero)
        if found is None and at_rest:  # the flat core of a chained candidate may still be off the wrist
            starts, stops = runs(~(counts[a:b] > 0))
            k = int(np.argmax(stops - starts))
            if (stops[k] - starts[k]) >= config.min_minutes * per_min:
                found = _judge(counts, a + int(starts[k]), a + int(stops[k]), True, per_min, edge, level, config, zero)
        if found is not None:
            out.append(found)
    return out


def _judge(counts: NDArray[np.float64], a: int, b: int, at_rest: bool, per_min: float, edge: int, level: float,
           config: NonwearConfig, zero: float = 0.0) -> NonwearInterval | None:
    """The candidate ``[a, b)`` as non-wear with its evidence, or None (rule in the module docstring)."""
    minutes = (b - a) / per_min
    active = awake_sides(counts, a, b, edge, config.edge_moving_share, config.active_fraction * level)
    flat = int(np.count_nonzero(counts[a:b] > 0)) <= config.flat_per_hour * minutes / 60.0
    long = minutes >= config.long_minutes
    evidence = ["longer than still sleep lasts"] if long else []
    if all(active):
        evidence.append("between active stretches")
    elif any(active):
        evidence.append("active on one side")
    if flat:
        evidence.append("flat")
    keep = flat and (long or all(active)) if at_rest else long or any(active)
    if not keep:
        return None
    where = "at rest" if at_rest else "out of rest"
    what = "zero counts" if zero <= 0 else f"counts at the device's floor (<= {zero:g})"
    return NonwearInterval(a, b, f"{what} for {minutes:.0f} min (Choi rule), {where}: " + ", ".join(evidence))


def nonwear_mask(n_epochs: int, intervals: Sequence[NonwearInterval]) -> NDArray[np.bool_]:
    """Boolean mask, shape (n_epochs,): True on the epochs of ``intervals``."""
    mask = np.zeros(n_epochs, dtype=bool)
    for iv in intervals:
        mask[max(iv.start_epoch, 0): max(iv.end_epoch, 0)] = True
    return mask
