"""Training rows of nights: whole-night features, reference and the in-bed scored epochs, plus study seeds.

Training rows are the in-bed epochs (``night.in_bed``) whose reference is scored and whose counts
are present: a missing epoch (NaN counts) is never trained on, never validated on and never seen
by a threshold or an offset, whatever its reference says. Features are always computed on the
whole night first and then sliced, so a window near lights-off still sees the epochs before it.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ..features.cache import FeatureCache
from ..features.matrix import FeatureMatrix
from ..features.source import FeatureSource
from ..nights.night import Night
from .config import TrainingConfig, TrainingDataError

__all__ = ["NightRows", "corrected_rows", "iter_prepared", "labelled_nights", "prepare_nights", "study_seed"]


@dataclass(frozen=True, eq=False)
class NightRows:
    """A night ready for training: features, reference and the rows that may be trained on.

    Attributes
    ----------
    night : Night
    features : FeatureMatrix
        Whole-night features, shape (n_epochs, n_features).
    reference : ndarray of float64, shape (n_epochs,) or None
        1 sleep, 0 wake, NaN unscored.
    rows : ndarray of int
        In-bed epochs with a scored reference and present counts (empty for an unlabelled night).
    weight : float, default=1.0
        Sample weight of each of the night's rows: 1 for a PSG reference, less for a night whose
        reference is a reviewed correction (:func:`corrected_rows`).
    """

    night: Night
    features: FeatureMatrix
    reference: NDArray[np.float64] | None
    rows: NDArray[np.intp]
    weight: float = 1.0

    @property
    def labelled(self) -> bool:
        return self.rows.size > 0


def labelled_nights(nights: Sequence[Night], config: TrainingConfig) -> list[Night]:
    """Nights with at least one in-bed epoch that has a scored reference and counts, in chronological order."""
    out = []
    for night in nights:
        ref = night.reference_sleep(movement_time=config.movement_time)
        bed = slice(*night.in_bed)
        if ref is not None and (~np.isnan(ref[bed]) & ~night.missing[bed]).any():
            out.append(night)
    return sorted(out, key=lambda n: n.start)


def iter_prepared(nights: Sequence[Night], config: TrainingConfig, *, feature_cache: FeatureSource | None = None,
                  n_jobs: int = 1) -> Iterator[NightRows]:
    """Features and training rows of each night, in the given order.

    Parameters
    ----------
    nights : sequence of Night
    config : TrainingConfig
    feature_cache : FeatureSource, default=None
        Where the features are looked up and misses kept; None = a :class:`FeatureCache` for
        this call only.
    n_jobs : int, default=1
        Processes computing missing features (:meth:`FeatureSource.features_of`).

    Raises
    ------
    TrainingDataError
        If the nights mix epoch lengths (the feature set depends on the epoch length).
    """
    lengths = sorted({n.epoch_seconds for n in nights})
    if len(lengths) > 1:
        raise TrainingDataError(f"nights mix epoch lengths {lengths} s; aggregate them to one length first",
                                code="mixed_epoch_lengths")
    source = FeatureCache() if feature_cache is None else feature_cache
    features_of = source.features_of(nights, config.features, n_jobs=n_jobs)
    for night, features in zip(nights, features_of, strict=True):
        ref = night.reference_sleep(movement_time=config.movement_time)
        first, stop = night.in_bed
        rows = (np.zeros(0, dtype=np.intp) if ref is None
                else first + np.flatnonzero(~np.isnan(ref[first:stop]) & ~night.missing[first:stop]))
        yield NightRows(night=night, features=features, reference=ref, rows=rows)


def corrected_rows(corrected: Sequence[tuple[Night, NDArray[np.float64]]], config: TrainingConfig, *,
                   weight: float, feature_cache: FeatureSource | None = None) -> list[NightRows]:
    """Training rows of nights labelled by a reviewed correction instead of PSG.

    Parameters
    ----------
    corrected : sequence of (Night, ndarray of shape (n_epochs,))
        A night without PSG and its corrected labels (1 sleep, 0 wake, NaN not judged).
    config : TrainingConfig
    weight : float
        Sample weight of every row of these nights, in (0, 1].
    feature_cache : FeatureSource, default=None

    Returns
    -------
    list of NightRows
        Rows: the in-bed epochs with a judged label and counts; nights without any are left out.
    """
    nights = [n for n, _ in corrected]
    out = []
    source = FeatureCache() if feature_cache is None else feature_cache
    for (night, labels), features in zip(corrected, source.features_of(nights, config.features), strict=True):
        ref = np.asarray(labels, dtype=np.float64)
        first, stop = night.in_bed
        rows = first + np.flatnonzero(~np.isnan(ref[first:stop]) & ~night.missing[first:stop])
        if rows.size:
            out.append(NightRows(night=night, features=features, reference=ref, rows=rows, weight=float(weight)))
    return out


def prepare_nights(nights: Sequence[Night], config: TrainingConfig, *,
                   feature_cache: FeatureSource | None = None) -> list[NightRows]:
    """:func:`iter_prepared` as a list, missing features computed in this process."""
    return list(iter_prepared(nights, config, feature_cache=feature_cache))


def study_seed(seed: int, *keys: int) -> int:
    """A 32-bit seed derived from ``seed`` and integer keys (numpy SeedSequence)."""
    return int(np.random.SeedSequence([int(seed), *keys]).generate_state(1)[0])
