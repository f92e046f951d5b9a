"""Aggregation of short epochs into longer ones (15 s -> 30 s or 60 s; 30 s -> 60 s) and the study's epoch."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ..errors import InvalidNightError, NightbankError, Problem
from .night import STAGE_CODES, SUPPORTED_EPOCH_SECONDS, Night

__all__ = ["aggregate_epochs", "majority_stage", "to_study_epoch"]


def majority_stage(groups: NDArray[np.str_]) -> NDArray[np.str_]:
    """One stage per group of sub-epoch stages, by the majority of the *scored* sub-epochs.

    Parameters
    ----------
    groups : ndarray of str, shape (n_groups, k)
        Canonical stage codes of the k sub-epochs of each new epoch.

    Returns
    -------
    stages : ndarray of str, shape (n_groups,)

    Notes
    -----
    Unscored sub-epochs (``"?"``) are ignored; a group with no scored sub-epoch is ``"?"``. The
    others decide sleep or wake first: the new epoch is sleep when its sleep sub-epochs outnumber
    its wake ones (wake: ``W``, ``0`` and movement time ``MT``), and **wake on a tie** (conservative,
    common practice: an epoch half awake is not called sleep). The stage is then the most frequent
    one of the winning side (AASM: an epoch takes the stage that fills most of it; Iber et al. 2007,
    from memory); between equally frequent stages of that side the one of the later sub-epoch wins.
    """
    groups = np.asarray(groups)
    codes = np.unique(groups)
    ids = np.searchsorted(codes, groups)
    n_groups, k = groups.shape
    rows = np.arange(n_groups)
    tally = np.zeros((n_groups, codes.size), dtype=np.int64)
    last = np.full((n_groups, codes.size), -1, dtype=np.int64)
    for j in range(k):  # k <= 4
        tally[rows, ids[:, j]] += 1
        last[rows, ids[:, j]] = j
    is_sleep = np.array([STAGE_CODES.get(str(c)) == 1 for c in codes])
    is_scored = codes != "?"
    is_wake = is_scored & ~is_sleep
    n_sleep = tally[:, is_sleep].sum(axis=1)
    n_wake = tally[:, is_wake].sum(axis=1)
    side = np.where((n_sleep > n_wake)[:, None], is_sleep[None, :], is_wake[None, :])
    rank = np.where(side & (tally > 0), tally * (k + 1) + last, -1)  # frequency first, later sub-epoch on ties
    out = codes[rank.argmax(axis=1)]
    return np.where(n_sleep + n_wake == 0, "?", out)


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
        Counts summed per new epoch; **a new epoch with any missing sub-epoch is missing** (NaN:
        a partial sum would understate the movement). Reference by :func:`majority_stage`. A
        trailing incomplete group is dropped and ``lights_on`` is clipped to the new end.
        ``source_epoch_seconds`` keeps the recorded epoch length; label, source name and unused
        columns are kept.

    Raises
    ------
    NightbankError
        ``invalid_aggregation`` when ``epoch_seconds`` is not 30 or 60 or not a multiple of the
        night's epoch length.
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
    return replace(night, epoch_seconds=epoch_seconds, counts=counts, reference=reference, lights_on=lights_on,
                   source_epoch_seconds=night.source_epoch_seconds or night.epoch_seconds)


def to_study_epoch(night: Night, epoch_seconds: int) -> Night:
    """The night in the study's epoch length.

    Parameters
    ----------
    night : Night
    epoch_seconds : int
        The study's epoch length, one of :data:`~models.nights.night.SUPPORTED_EPOCH_SECONDS`.

    Returns
    -------
    Night
        ``night`` itself when the lengths agree; aggregated by :func:`aggregate_epochs` when the
        night's epochs are shorter and divide the study's.

    Raises
    ------
    InvalidNightError
        Problem ``epoch_length_mismatch`` (field ``epoch_seconds``) when the night's epochs are longer
        than the study's or do not divide them.
    """
    if epoch_seconds == night.epoch_seconds:
        return night
    if epoch_seconds in SUPPORTED_EPOCH_SECONDS and epoch_seconds > night.epoch_seconds \
            and epoch_seconds % night.epoch_seconds == 0:
        return aggregate_epochs(night, epoch_seconds)
    raise InvalidNightError([Problem(
        "epoch_length_mismatch",
        f"the study uses {epoch_seconds}-s epochs but the night has {night.epoch_seconds}-s epochs; only shorter "
        "epochs that divide the study's are summed into it",
        {"field": "epoch_seconds", "values": [epoch_seconds, night.epoch_seconds]},
    )], source=night.source_name)
