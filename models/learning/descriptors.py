"""Label-free movement descriptors of a participant, the extra inputs of pooled models."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ..nights.night import Night

__all__ = ["DESCRIPTOR_NAMES", "participant_descriptors"]

#: Names of :func:`participant_descriptors`, in column order.
DESCRIPTOR_NAMES: tuple[str, ...] = ("participant_moving_counts_median", "participant_counts_q90",
                                     "participant_moving_share")


def participant_descriptors(nights: Sequence[Night]) -> dict[str, float]:
    """Label-free movement descriptors of a participant, over the in-bed epochs of all nights.

    Parameters
    ----------
    nights : sequence of Night
        All of the participant's nights, labelled or not (labels are never read).

    Returns
    -------
    descriptors : dict of str to float
        ``participant_moving_counts_median``: median counts of in-bed epochs with counts > 0
        (device gain and movement size; 0 without any); ``participant_counts_q90``: 90th
        percentile of in-bed counts; ``participant_moving_share``: share of in-bed epochs with
        counts > 0. Missing (NaN) epochs are left out; all NaN without any observed epoch.

    Examples
    --------
    >>> import pandas as pd
    >>> n = Night("p", pd.Timestamp("2031-01-01 22:00", tz="UTC"), 30, [0, 0, 4, 10, 0])
    >>> participant_descriptors([n])["participant_moving_share"]
    0.4
    """
    parts = [n.counts[slice(*n.in_bed)] for n in nights]
    counts = np.concatenate(parts) if parts else np.zeros(0)
    counts = counts[~np.isnan(counts)]
    if counts.size == 0:
        return dict.fromkeys(DESCRIPTOR_NAMES, float("nan"))
    moving = counts[counts > 0]
    return {
        "participant_moving_counts_median": float(np.median(moving)) if moving.size else 0.0,
        "participant_counts_q90": float(np.percentile(counts, 90)),
        "participant_moving_share": float(moving.size / counts.size),
    }
