"""Held-out predictions of a night and the per-night and summary metric tables built from them."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ..agreement.epoch_metrics import EPOCH_COUNT_NAMES, EPOCH_METRIC_NAMES, epoch_agreement
from ..decoding.intervals import NightIntervals
from .config import TrainingDataError

__all__ = ["HeldOutNight", "night_metrics_table", "summary_table"]


@dataclass(frozen=True, eq=False)
class HeldOutNight:
    """Predictions for one night from a model that never saw it (or its participant).

    Attributes
    ----------
    participant_id : str
    night_hash : str
        ``Night.content_hash``.
    label : str or None
        The lab's id for the night.
    method : str
        ``"personal"``, ``"pooled"`` or ``"pooled+offset"``.
    p_sleep : ndarray of float64, shape (n_epochs,)
        Probability of sleep for every epoch of the night (calibrated when the model has a
        decoding), NaN at missing epochs (unscored).
    sleep : ndarray of float64, shape (n_epochs,)
        The model's calls (:meth:`SleepModel.calls <models.learning.classifier.SleepModel.calls>`):
        1.0 = sleep, 0.0 = wake, NaN at missing epochs.
    reference : ndarray of float64, shape (n_epochs,) or None
        1 = sleep, 0 = wake, NaN = unscored; None for an unlabelled night.
    in_bed : tuple of int
        ``(first, stop)`` in-bed epoch indices.
    threshold : float
        Probability threshold used for the calls.
    offset : float, default=0.0
        Log-odds offset applied (pooled+offset only).
    margin : ndarray of float64, shape (n_epochs,) or None
        Log-odds of sleep before the offset (pooled models; used to estimate offsets), NaN at
        missing epochs.
    intervals : NightIntervals or None, default=None
        Per-night parameter intervals from the same model (None for a model without decoding).
    """

    participant_id: str
    night_hash: str
    label: str | None
    method: str
    p_sleep: NDArray[np.float64] = field(repr=False)
    sleep: NDArray[np.float64] = field(repr=False)
    reference: NDArray[np.float64] | None = field(repr=False)
    in_bed: tuple[int, int]
    threshold: float
    offset: float = 0.0
    margin: NDArray[np.float64] | None = field(default=None, repr=False)
    intervals: NightIntervals | None = field(default=None, repr=False)

    @property
    def night_id(self) -> str:
        """``label`` if set, else the first 12 hex digits of the content hash."""
        return self.label or self.night_hash[:12]

    def agreement(self) -> dict[str, float]:
        """Epoch-by-epoch metrics over the in-bed epochs (:func:`models.agreement.epoch_metrics.epoch_agreement`)."""
        if self.reference is None:
            raise TrainingDataError(f"night {self.night_id} has no reference", code="no_reference")
        bed = slice(*self.in_bed)
        return epoch_agreement(self.reference[bed], self.sleep[bed], score=self.p_sleep[bed])


def night_metrics_table(held_out: Sequence[HeldOutNight]) -> pd.DataFrame:
    """One row per labelled held-out night: ids, the epoch counts and :data:`EPOCH_METRIC_NAMES`.

    Epochs the model left unscored (missing counts) are excluded from the metrics and counted in
    ``unscored_epochs`` (:func:`~models.agreement.epoch_metrics.epoch_agreement`).
    """
    rows = [{"participant_id": h.participant_id, "night_id": h.night_id, "night_hash": h.night_hash,
             "method": h.method, "threshold": h.threshold, "offset": h.offset} | h.agreement()
            for h in held_out if h.reference is not None]
    return pd.DataFrame(rows, columns=["participant_id", "night_id", "night_hash", "method", "threshold", "offset",
                                       *EPOCH_COUNT_NAMES, *EPOCH_METRIC_NAMES])


def summary_table(night_metrics: pd.DataFrame) -> pd.DataFrame:
    """Mean and SD (ddof=1) across nights of every epoch metric; index = metric name."""
    values = night_metrics[list(EPOCH_METRIC_NAMES)].astype(np.float64)
    return pd.DataFrame({"mean": values.mean(), "sd": values.std(ddof=1), "n_nights": values.count()})
