"""Window arithmetic shared by the count rules: minute sums, missing epochs, renormalised weights.

Private to :mod:`models.scoring` (see :mod:`models.scoring.rules` for the conventions).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..errors import NightbankError

__all__ = ["calls_of", "clean_counts", "minute_counts", "present_weight", "to_epochs", "window_sum"]


def clean_counts(counts: ArrayLike, count_scale: float) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """``(counts, missing)``: scaled counts (0 where missing or negative) and the missing (non-finite) epochs.

    ``count_scale`` must already be checked (positive and finite).
    """
    a = np.asarray(counts, dtype=np.float64)
    if a.ndim != 1:
        raise NightbankError(f"counts must be 1-D, got shape {a.shape}", code="invalid_counts")
    missing = ~np.isfinite(a)
    clean = np.where(~missing & (a > 0), a, 0.0)
    return (clean * count_scale if count_scale != 1.0 else clean), missing


def minute_counts(counts: NDArray[np.float64], missing: NDArray[np.bool_],
                  epoch_seconds: int) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """Sum epochs into minutes: ``(minute counts, minute missing)``.

    A trailing partial minute is completed with (present) zeros; a minute with some missing
    epochs is its present epochs' sum scaled to the whole minute; a minute with no present epoch
    is missing (count 0). ``counts`` holds 0 at missing epochs.
    """
    per_min = 60 // epoch_seconds
    if per_min == 1:
        return counts, missing
    short = -counts.size % per_min
    full = np.concatenate((counts, np.zeros(short))) if short else counts
    total = full[0::per_min].copy()
    for offset in range(1, per_min):  # at most 4 strided slices, not a loop over epochs
        total += full[offset::per_min]
    if not missing.any():
        return total, np.zeros(total.size, dtype=bool)
    n_missing = np.concatenate((missing, np.zeros(short, dtype=bool))).reshape(-1, per_min).sum(axis=1)
    partial = (n_missing > 0) & (n_missing < per_min)
    total[partial] *= per_min / (per_min - n_missing[partial])
    return total, n_missing == per_min


def to_epochs(per_minute: NDArray[np.float64], epoch_seconds: int, n_epochs: int) -> NDArray[np.float64]:
    per_min = 60 // epoch_seconds
    return per_minute if per_min == 1 else np.repeat(per_minute, per_min)[:n_epochs]


def window_sum(x: NDArray[np.float64], before: int, after: int) -> NDArray[np.float64]:
    """Sum of ``x[t-before .. t+after]`` for every t, values outside ``x`` counting as zero."""
    return np.convolve(x, np.ones(before + after + 1), mode="full")[after:after + x.size]


def present_weight(missing: NDArray[np.bool_], weights: NDArray[np.float64], before: int) -> NDArray[np.float64]:
    """Per position, the summed weights of the window's present values (positions outside count as present).

    ``weights[j]`` applies to offset ``j - before``; the result is ``sum(weights)`` where no value of the
    window is missing.
    """
    n = missing.size
    lost = np.convolve(missing.astype(np.float64), weights[::-1], mode="full")[weights.size - 1 - before:][:n]
    return float(weights.sum()) - lost


def calls_of(sleep: NDArray[np.bool_], score: NDArray[np.float64],
             missing: NDArray[np.bool_] | None) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Calls as float64 (1.0 sleep, 0.0 wake) and the score, both NaN at missing epochs."""
    calls = sleep.astype(np.float64)
    if missing is not None and missing.any():
        calls[missing] = np.nan
        score = np.where(missing, np.nan, score)
    return calls, score
