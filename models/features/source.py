"""Where training and prediction get a night's features: the FeatureSource interface and its precomputed mapping.

:func:`night_features` is the one way a night's features are computed (the whole night, with the
lights-off/on epochs of ``night.in_bed``). A :class:`FeatureSource` decides whether they must be:
it looks features up and keeps those computed on a miss. Implementations write the two abstract
methods, :meth:`~FeatureSource.lookup` and :meth:`~FeatureSource.keep`; everything else is built
on them here.

==================================================  ============================================
source                                              holds
==================================================  ============================================
:class:`~models.features.cache.FeatureCache`        an in-memory LRU bounded in bytes (the
                                                    default of every training call, one per call)
:class:`PrecomputedFeatures`                        a plain mapping of matrices computed
                                                    beforehand (e.g. loaded from a database),
                                                    picklable so it can travel with a task
==================================================  ============================================

A source is keyed by ``(Night.content_hash, FeatureConfig.version_for(epoch_seconds))``: the
content hash covers counts, epoch length and lights-off/on, the version the configuration and the
feature code revision, so a source never returns features of another night or feature set.
"""

from __future__ import annotations

import abc
from collections.abc import Iterator, Mapping, Sequence

from joblib import Parallel, delayed

from ..nights.night import Night
from .matrix import FeatureConfig, FeatureMatrix, compute_features

__all__ = ["FeatureSource", "PrecomputedFeatures", "night_features"]


def night_features(night: Night, config: FeatureConfig) -> FeatureMatrix:
    """Compute the features of the whole night, lights-off/on from ``night.in_bed``.

    Parameters
    ----------
    night : Night
    config : FeatureConfig

    Returns
    -------
    FeatureMatrix
        Shape (n_epochs, n_features); version ``config.version_for(night.epoch_seconds)``.
    """
    first, stop = night.in_bed
    return compute_features(night.counts, night.epoch_seconds, config=config, lights_off_epoch=first,
                            lights_on_epoch=stop)


class FeatureSource(abc.ABC):
    """Night features looked up by night and configuration, computed with :func:`night_features` on a miss.

    Implementations must be safe to call from several threads (training looks features up from
    its worker threads) and must only return what :func:`night_features` would compute for the
    same night and configuration.
    """

    @abc.abstractmethod
    def lookup(self, night: Night, config: FeatureConfig) -> FeatureMatrix | None:
        """The features of ``night`` for ``config`` if this source holds them, else None."""

    @abc.abstractmethod
    def keep(self, night: Night, features: FeatureMatrix) -> None:
        """Remember ``features`` just computed for ``night`` (a source may also drop them later)."""

    def features(self, night: Night, config: FeatureConfig) -> FeatureMatrix:
        """The features of ``night``: looked up, or computed and kept.

        Parameters
        ----------
        night : Night
        config : FeatureConfig

        Returns
        -------
        FeatureMatrix
            Shape (n_epochs, n_features).
        """
        found = self.lookup(night, config)
        if found is None:
            found = night_features(night, config)
            self.keep(night, found)
        return found

    def features_of(self, nights: Sequence[Night], config: FeatureConfig, *,
                    n_jobs: int = 1) -> Iterator[FeatureMatrix]:
        """The features of each night, in order; misses computed on ``n_jobs`` processes and kept.

        Feature code is numpy on short arrays and holds the GIL most of the time, so threads do not
        speed it up; with ``n_jobs > 1`` and several misses, joblib worker processes compute them.

        Parameters
        ----------
        nights : sequence of Night
        config : FeatureConfig
        n_jobs : int, default=1
            Processes computing the misses.

        Yields
        ------
        FeatureMatrix
            One per night, shape (n_epochs, n_features).
        """
        found = [self.lookup(n, config) for n in nights]
        missing = [n for n, f in zip(nights, found, strict=True) if f is None]
        if n_jobs > 1 and len(missing) > 1:
            computed: Iterator[FeatureMatrix] = iter(Parallel(n_jobs=n_jobs, return_as="generator")(
                delayed(night_features)(n, config) for n in missing))
        else:
            computed = (night_features(n, config) for n in missing)
        for night, features in zip(nights, found, strict=True):
            if features is None:
                features = next(computed)
                self.keep(night, features)
            yield features


class PrecomputedFeatures(FeatureSource):
    """Feature matrices computed beforehand, by night content hash; misses are computed and added.

    Parameters
    ----------
    features : mapping of str to FeatureMatrix, default=None
        Night content hash -> that night's features. A matrix only answers for configurations
        whose :meth:`~models.features.matrix.FeatureConfig.version_for` the night's epoch length
        equals its ``version``; for any other configuration the night is a miss.

    Notes
    -----
    Holds plain dicts of numpy arrays, so it pickles (a training task sent to another process
    takes its features along) and reads and writes are atomic under the GIL.

    Examples
    --------
    >>> import pandas as pd
    >>> night = Night("p", pd.Timestamp("2031-01-01 22:00", tz="UTC"), 30, [0.0, 3.0, 9.0, 0.0] * 30)
    >>> config = FeatureConfig(families=("summary",))
    >>> source = PrecomputedFeatures({night.content_hash: night_features(night, config)})
    >>> source.lookup(night, config) is not None, source.lookup(night, FeatureConfig()) is None
    (True, True)
    """

    def __init__(self, features: Mapping[str, FeatureMatrix] | None = None) -> None:
        self._entries: dict[tuple[str, str], FeatureMatrix] = {
            (content_hash, matrix.version): matrix for content_hash, matrix in (features or {}).items()}

    def __len__(self) -> int:
        return len(self._entries)

    def lookup(self, night: Night, config: FeatureConfig) -> FeatureMatrix | None:
        return self._entries.get((night.content_hash, config.version_for(night.epoch_seconds)))

    def keep(self, night: Night, features: FeatureMatrix) -> None:
        self._entries[(night.content_hash, features.version)] = features
