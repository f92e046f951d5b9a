"""Sleep timing across days: the Sleep Regularity Index, mid-sleep, clock-time means and social jetlag.

Sleep Regularity Index (Phillips et al. 2017, Sci Rep 7:3216)
-------------------------------------------------------------
The probability of being in the same state (sleep or wake) at two moments 24 h apart, scaled to
-100 (always the opposite state) .. 100 (perfectly regular)::

    SRI = -100 + 200 / (M (N - 1)) * sum_j=1..N-1 sum_i=1..M delta(s_ij, s_i,j+1)

with M epochs per day, N days and delta = 1 when the two states agree. Here the sum runs over every
pair of epochs exactly 24 h apart of which **both are valid** (worn, with a known state), and it is
divided by the number of such pairs instead of M (N - 1): off-wrist epochs on either day are left
out and the index stays a proportion of the pairs that could be compared. For N whole days with no
invalid epoch the two are the same; a trailing part day adds its pairs with the day before. The pairs
are M epochs (24 h of elapsed time) apart, so the series may start at any time of day; across a change
of the clocks a pair is one hour off the same wall-clock time.

Clock times
-----------
Mid-sleep is halfway between sleep onset and offset. Clock times of several days (hours after local
midnight, in the zone of each time as given) are averaged as angles on the 24-h circle (the mean
direction; Mardia & Jupp 2000), so 23:30 and 00:30 average to 00:00 and not to 12:00; their spread
is the circular standard deviation sqrt(-2 ln R) (R the mean resultant length), in hours.

Social jetlag (Wittmann et al. 2006, Chronobiol Int 23:497): the absolute difference between the
mean mid-sleep of free days and of work days, taken the short way round the clock (at most 12 h).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

__all__ = ["clock_mean_h", "clock_sd_h", "mid_sleep", "sleep_regularity_index", "social_jetlag_h"]

_DAY_S = 86_400


def sleep_regularity_index(sleep: ArrayLike, *, epoch_seconds: int, valid: ArrayLike | None = None) -> float:
    """Sleep Regularity Index of a sleep/wake series (formula and handling of invalid epochs above).

    Parameters
    ----------
    sleep : array_like, shape (n_epochs,)
        1 (sleep) or 0 (wake) per consecutive epoch (e.g. a whole recording); NaN = state unknown (left out).
    epoch_seconds : int
        Epoch length, a divisor of 86 400 (15, 30, 60, ...).
    valid : array_like of bool, shape (n_epochs,), optional
        False where the epoch is invalid (off-wrist); default all valid.

    Returns
    -------
    float
        SRI in [-100, 100]; NaN when no pair of valid epochs 24 h apart exists (less than a day and
        an epoch, or everything invalid).

    Raises
    ------
    ValueError
        Values other than 0, 1 or NaN; ``valid`` of another length; an epoch not dividing a day.
    """
    s = np.asarray(sleep, dtype=np.float64)
    if s.ndim != 1:
        raise ValueError("sleep must be one-dimensional")
    if not isinstance(epoch_seconds, int | np.integer) or epoch_seconds <= 0 or _DAY_S % int(epoch_seconds):
        raise ValueError(f"epoch_seconds must divide a day (86400 s), got {epoch_seconds!r}")
    known = np.isfinite(s)
    if not np.isin(s[known], (0.0, 1.0)).all():
        raise ValueError("sleep must hold 1 (sleep), 0 (wake) or NaN")
    ok = known
    if valid is not None:
        mask = np.asarray(valid, dtype=bool)
        if mask.shape != s.shape:
            raise ValueError(f"valid has {mask.size} values for {s.size} epochs")
        ok = known & mask
    m = _DAY_S // int(epoch_seconds)
    if s.size <= m:
        return float("nan")
    pair = ok[:-m] & ok[m:]
    n_pairs = int(pair.sum())
    if n_pairs == 0:
        return float("nan")
    agree = int((s[:-m][pair] == s[m:][pair]).sum())
    return -100.0 + 200.0 * agree / n_pairs


def mid_sleep(onset: pd.Timestamp, offset: pd.Timestamp) -> pd.Timestamp:
    """Halfway between sleep onset and sleep offset.

    Parameters
    ----------
    onset, offset : pandas.Timestamp
        Both timezone-aware (or both naive); ``offset`` not before ``onset``.

    Returns
    -------
    pandas.Timestamp
        In the zone of ``onset``.
    """
    if offset < onset:
        raise ValueError(f"sleep offset {offset.isoformat()} is before onset {onset.isoformat()}")
    return onset + (offset - onset) / 2


def _clock_hours(times: Sequence[pd.Timestamp | None]) -> NDArray[np.float64]:
    """Clock time of each time in its own zone, hours after midnight, NaN for None/NaT."""
    out = np.full(len(times), np.nan)
    for i, t in enumerate(times):
        if t is None or pd.isna(t):
            continue
        ts = pd.Timestamp(t)  # the wall clock: on a day the clocks change, not the time elapsed since midnight
        out[i] = ts.hour + ts.minute / 60 + (ts.second + ts.microsecond / 1e6) / 3600
    return out


def _resultant(hours: NDArray[np.float64]) -> tuple[float, float]:
    """Mean direction (hours in [0, 24)) and mean resultant length of clock times; NaN when none."""
    h = hours[np.isfinite(hours)]
    if h.size == 0:
        return float("nan"), float("nan")
    angle = h * (2 * math.pi / 24.0)
    c, s = float(np.cos(angle).mean()), float(np.sin(angle).mean())
    length = math.hypot(c, s)
    if length < 1e-12:  # evenly spread: no mean direction
        return float("nan"), 0.0
    return (math.atan2(s, c) * 24.0 / (2 * math.pi)) % 24.0, length


def clock_mean_h(times: Sequence[pd.Timestamp | None]) -> float:
    """Circular mean clock time, hours after midnight in [0, 24); NaN without times (None/NaT skipped)."""
    return _resultant(_clock_hours(times))[0]


def clock_sd_h(times: Sequence[pd.Timestamp | None]) -> float:
    """Circular standard deviation of clock times, hours (sqrt(-2 ln R) on the 24-h circle); NaN without times."""
    length = _resultant(_clock_hours(times))[1]
    if not math.isfinite(length):
        return float("nan")
    if length <= 0.0:
        return float("inf")
    return math.sqrt(max(0.0, -2.0 * math.log(min(1.0, length)))) * 24.0 / (2 * math.pi)


def social_jetlag_h(mid_sleeps: Sequence[pd.Timestamp | None], free_day_mask: ArrayLike) -> float:
    """Social jetlag: |mean mid-sleep on free days - mean mid-sleep on work days|, hours in [0, 12].

    Parameters
    ----------
    mid_sleeps : sequence of pandas.Timestamp or None, length n_days
        Mid-sleep of each day's main sleep (local clock time as given); None/NaT where there is none.
    free_day_mask : array_like of bool, shape (n_days,)
        True for free days (no work or school the next morning), False for work days.

    Returns
    -------
    float
        NaN when free days or work days have no mid-sleep (or their times have no mean direction).
    """
    free = np.asarray(free_day_mask, dtype=bool)
    if free.shape != (len(mid_sleeps),):
        raise ValueError(f"free_day_mask has {free.size} values for {len(mid_sleeps)} mid-sleeps")
    hours = _clock_hours(mid_sleeps)
    msf = _resultant(hours[free])[0]
    msw = _resultant(hours[~free])[0]
    if not (math.isfinite(msf) and math.isfinite(msw)):
        return float("nan")
    return abs((msf - msw + 12.0) % 24.0 - 12.0)
