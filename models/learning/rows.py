"""Training rows of nights: whole-night features, reference and the in-bed scored epochs, plus study seeds.

Training rows are the in-bed epochs (``night.in_bed``) whose reference is scored; features are
always computed on the whole night first and then sliced, so a window near lights-off still sees
the epochs before it.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np
from joblib import Parallel, delayed
from numpy.typing import NDArray

from ..features.cache import FeatureCache
from ..features.matrix import FeatureConfig, FeatureMatrix, compute_features
from ..nights.night import Night
from .config import TrainingConfig, TrainingDataError

__all__ = ["NightRows", "iter_night_features", "iter_prepared", "labelled_nights", "night_features",
           "prepare_nights", "study_seed"]

#: In-memory feature cache shared by training and prediction in this process (256 MB LRU).
DEFAULT_FEATURE_CACHE = FeatureCache()


def _compute(night: Night, config: FeatureConfig) -> FeatureMatrix:
    first, stop = night.in_bed
    return compute_features(night.counts, night.epoch_seconds, config=config, lights_off_epoch=first,
                            lights_on_epoch=stop)


def night_features(night: Night, config: FeatureConfig, *, cache: FeatureCache | None = None) -> FeatureMatrix:
    """Features of the whole night (lights indices from ``night.in_bed``), through a cache.

    Parameters
    ----------
    night : Night
    config : FeatureConfig
    cache : FeatureCache, default=None
        None uses :data:`DEFAULT_FEATURE_CACHE`, shared by every training call in the process.

    Returns
    -------
    FeatureMatrix
        Shape (n_epochs, n_features).
    """
    store = DEFAULT_FEATURE_CACHE if cache is None else cache
    return store.get_or_compute(night.content_hash, config.version_for(night.epoch_seconds), lambda: _compute(night, config))


def iter_night_features(nights: Sequence[Night], config: FeatureConfig, *, cache: FeatureCache | None = None,
                        n_jobs: int = 1) -> Iterator[FeatureMatrix]:
    """Features of each night, in order; cache misses computed on ``n_jobs`` processes.

    Feature code is numpy on short arrays and holds the GIL most of the time, so threads do not
    speed it up; with ``n_jobs > 1`` and several misses, joblib worker processes compute them.
    Every computed matrix is stored in the cache.
    """
    store = DEFAULT_FEATURE_CACHE if cache is None else cache
    found = [store.get(n.content_hash, config.version_for(n.epoch_seconds)) for n in nights]
    missing = [n for n, f in zip(nights, found, strict=True) if f is None]
    if n_jobs > 1 and len(missing) > 1:
        computed: Iterator[FeatureMatrix] = iter(Parallel(n_jobs=n_jobs, return_as="generator")(
            delayed(_compute)(n, config) for n in missing))
    else:
        computed = (_compute(n, config) for n in missing)
    for night, features in zip(nights, found, strict=True):
        if features is None:
            features = next(computed)
            store.put(night.content_hash, features.version, features)
        yield features


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
        In-bed epochs with a scored reference (empty for an unlabelled night).
    """

    night: Night
    features: FeatureMatrix
    reference: NDArray[np.float64] | None
    rows: NDArray[np.intp]

    @property
    def labelled(self) -> bool:
        return self.rows.size > 0


def labelled_nights(nights: Sequence[Night], config: TrainingConfig) -> list[Night]:
    """Nights with at least one scored in-bed reference epoch, in chronological order."""
    out = []
    for night in nights:
        ref = night.reference_sleep(movement_time=config.movement_time)
        if ref is not None and not np.isnan(ref[slice(*night.in_bed)]).all():
            out.append(night)
    return sorted(out, key=lambda n: n.start)


def iter_prepared(nights: Sequence[Night], config: TrainingConfig, *, cache: FeatureCache | None = None,
                  n_jobs: int = 1) -> Iterator[NightRows]:
    """Features (through ``cache``) and training rows of each night, in the given order.

    Raises
    ------
    TrainingDataError
        If the nights mix epoch lengths (the feature set depends on the epoch length).
    """
    lengths = sorted({n.epoch_seconds for n in nights})
    if len(lengths) > 1:
        raise TrainingDataError(f"nights mix epoch lengths {lengths} s; aggregate them to one length first",
                                code="mixed_epoch_lengths")
    features_of = iter_night_features(nights, config.features, cache=cache, n_jobs=n_jobs)
    for night, features in zip(nights, features_of, strict=True):
        ref = night.reference_sleep(movement_time=config.movement_time)
        first, stop = night.in_bed
        rows = np.zeros(0, dtype=np.intp) if ref is None else first + np.flatnonzero(~np.isnan(ref[first:stop]))
        yield NightRows(night=night, features=features, reference=ref, rows=rows)


def prepare_nights(nights: Sequence[Night], config: TrainingConfig, *,
                   cache: FeatureCache | None = None) -> list[NightRows]:
    """:func:`iter_prepared` as a list, features computed in this process."""
    return list(iter_prepared(nights, config, cache=cache))


def study_seed(seed: int, *keys: int) -> int:
    """A 32-bit seed derived from ``seed`` and integer keys (numpy SeedSequence)."""
    return int(np.random.SeedSequence([int(seed), *keys]).generate_state(1)[0])
