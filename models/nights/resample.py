"""Aggregation of short epochs into longer ones (15 s -> 30 s or 60 s; 30 s -> 60 s)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..errors import NightbankError
from .night import STAGE_CODES, Night

__all__ = ["aggregate_epochs", "majority_stage"]


def majority_stage(groups: np.ndarray) -> np.ndarray:
    """One stage per group of sub-epoch stages, by the AASM majority rule.

    Parameters
    ----------
    groups : ndarray of str, shape (n_groups, k)
        Canonical stage codes of the k sub-epochs of each new epoch.

    Returns
    -------
    stages : ndarray of str, shape (n_groups,)

    Notes
    -----
    A stage held by more than half of the sub-epochs wins (AASM: an epoch is staged by the
    majority of its time; Iber et al. 2007, from memory). Without such a majority, the epoch is
    sleep when sleep sub-epochs outnumber wake ones (AASM rule for epochs that meet three or more
    stages) and takes the most frequent sleep stage; otherwise, or on a sleep/wake tie, it takes
    the stage of the last sub-epoch (common practice). Unscored sub-epochs ("?") count as a stage
    of their own.
    """
    codes = np.unique(groups)
    ids = np.searchsorted(codes, groups)
    n_groups, k = groups.shape
    tally = np.zeros((n_groups, codes.size), dtype=np.int64)
    for j in range(k):  # k <= 4
        tally[np.arange(n_groups), ids[:, j]] += 1
    best = tally.argmax(axis=1)
    has_majority = tally[np.arange(n_groups), best] * 2 > k
    is_sleep = np.array([STAGE_CODES.get(c) == 1 for c in codes])
    is_wake = np.array([STAGE_CODES.get(c) == 0 for c in codes])
    n_sleep = tally[:, is_sleep].sum(axis=1)
    n_wake = tally[:, is_wake].sum(axis=1)
    sleep_tally = np.where(is_sleep[None, :], tally, -1)
    best_sleep = sleep_tally.argmax(axis=1)
    out = np.where(has_majority, best, np.where(n_sleep > n_wake, best_sleep, ids[:, -1]))
    return codes[out]


def aggregate_epochs(night: Night, epoch_seconds: int) -> Night:
    """Sum counts into longer epochs.

    Parameters
    ----------
    night : Night
    epoch_seconds : int
        New epoch length, a whole multiple of ``night.epoch_seconds`` (30 or 60).

    Returns
    -------
    Night
        Counts summed per new epoch (a new epoch with any missing sub-epoch is missing);
        reference by :func:`majority_stage`. A trailing incomplete group is dropped and
        ``lights_on`` is clipped to the new end.
    """
    k, rem = divmod(epoch_seconds, night.epoch_seconds)
    if rem or k < 1 or epoch_seconds not in (30, 60):
        raise NightbankError(f"cannot aggregate {night.epoch_seconds}-s epochs into {epoch_seconds}-s epochs",
                             code="invalid_aggregation")
    if k == 1:
        return night
    n = night.n_epochs // k
    counts = night.counts[: n * k].reshape(n, k).sum(axis=1)
    reference = None if night.reference is None else majority_stage(night.reference[: n * k].reshape(n, k))
    end = night.start + pd.Timedelta(seconds=n * epoch_seconds)
    lights_on = night.lights_on if night.lights_on is None or night.lights_on <= end else end
    return Night(participant_id=night.participant_id, start=night.start, epoch_seconds=epoch_seconds,
                 counts=counts, reference=reference, lights_off=night.lights_off, lights_on=lights_on,
                 label=night.label)
