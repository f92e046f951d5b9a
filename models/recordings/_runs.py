"""Runs of a boolean series and rolling statistics over epochs (shared by the recordings modules)."""

from __future__ import annotations

import numpy as np
import pandas as pd
from numpy.typing import NDArray

__all__ = ["above_floor", "active_level", "awake_sides", "close_gaps", "drop_short", "floor_level", "rolling_mean",
           "rolling_median", "runs"]


def runs(mask: NDArray[np.bool_]) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    """(starts, stops) of the runs of True in ``mask``; stops exclusive."""
    edges = np.diff(np.concatenate([[0], np.asarray(mask, dtype=np.int8), [0]]))
    return np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)


def drop_short(mask: NDArray[np.bool_], min_len: int) -> NDArray[np.bool_]:
    """``mask`` without its runs of True shorter than ``min_len``."""
    out = np.zeros(mask.size, dtype=bool)
    for a, b in zip(*runs(mask), strict=True):
        if b - a >= min_len:
            out[a:b] = True
    return out


def close_gaps(mask: NDArray[np.bool_], max_gap: int) -> NDArray[np.bool_]:
    """``mask`` with the runs of False of at most ``max_gap`` between two runs of True set True."""
    out = np.asarray(mask, dtype=bool).copy()
    starts, stops = runs(out)
    for stop, start in zip(stops[:-1], starts[1:], strict=True):
        if start - stop <= max_gap:
            out[stop:start] = True
    return out


def rolling_median(values: NDArray[np.float64], width: int) -> NDArray[np.float64]:
    """Centred rolling median over ``width`` epochs (NaN left out; shorter windows at the edges)."""
    return np.asarray(pd.Series(values).rolling(width, center=True, min_periods=1).median(), dtype=np.float64)


def rolling_mean(values: NDArray[np.float64], width: int) -> NDArray[np.float64]:
    """Centred rolling mean over ``width`` epochs (NaN left out; shorter windows at the edges)."""
    return np.asarray(pd.Series(values).rolling(width, center=True, min_periods=1).mean(), dtype=np.float64)


def active_level(counts: NDArray[np.float64]) -> float:
    """The person's typical moving-epoch level: the median of the non-zero counts (1 when there are none)."""
    moving = counts[np.isfinite(counts) & (counts > 0)]
    return float(np.median(moving)) if moving.size else 1.0


def awake_sides(counts: NDArray[np.float64], start: int, stop: int, edge: int, moving_share: float,
                min_mean: float) -> tuple[bool, bool]:
    """Whether the ``edge`` epochs before ``start`` and after ``stop`` look awake.

    Awake: at least ``moving_share`` of the epochs move and the mean count is at least ``min_mean``.
    A side beyond the recording's start or end counts as awake.
    """
    out = []
    for side in (counts[max(0, start - edge): start], counts[stop: stop + edge]):
        if side.size == 0:
            out.append(True)
            continue
        present = side[np.isfinite(side)]
        out.append(bool(present.size) and float(np.mean(present > 0)) >= moving_share
                   and float(np.mean(present)) >= min_mean)
    return out[0], out[1]


def floor_level(counts: NDArray[np.float64], *, zero_share: float = 0.2, peak_share: float = 0.25) -> float:
    """A device's "zero": 0, or the top of its noise floor when few counts are exactly zero.

    A recording with at least ``zero_share`` exact zeros among its counts has no floor (0). Else the
    floor is read from the recording's own histogram of whole counts: still sleep and off-wrist time
    pile up on the floor's few values, so the most frequent count lies in it, and the floor reaches
    up through the next values as long as each is at least ``peak_share`` as frequent as that peak
    (our design; noise of 1-3 counts gives 3, the same on an offset of 5 gives 8).
    """
    present = counts[np.isfinite(counts)]
    if present.size == 0 or float(np.mean(present == 0)) >= zero_share:
        return 0.0
    freq = np.bincount(np.clip(np.round(present), 0, 1000).astype(np.intp))
    top = peak = int(np.argmax(freq))
    while top + 1 < freq.size and freq[top + 1] >= peak_share * freq[peak]:
        top += 1
    return float(top)


def above_floor(counts: NDArray[np.float64], level: float) -> NDArray[np.float64]:
    """Counts with the epochs at or below the device's floor ``level`` set to 0 (NaN kept)."""
    if level <= 0:
        return counts
    return np.where(np.isnan(counts) | (counts > level), counts, 0.0)
