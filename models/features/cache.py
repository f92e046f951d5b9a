"""The in-memory feature cache: an LRU of feature matrices bounded in bytes, a :class:`FeatureSource`.

Hyper-parameter tuning scores the same nights many times with the same feature set; the cache
makes every night's features computed once per training call. Entries are keyed by (night
content hash, feature-set version), see :mod:`models.features.source`.
"""

from __future__ import annotations

import threading
from collections import OrderedDict

from ..nights.night import Night
from .matrix import FeatureConfig, FeatureMatrix
from .source import FeatureSource

__all__ = ["FeatureCache"]


class FeatureCache(FeatureSource):
    """In-memory LRU of :class:`~models.features.matrix.FeatureMatrix` by night and feature set.

    Parameters
    ----------
    max_bytes : int, default=256 * 2**20
        Memory budget (sum of ``values.nbytes``); least recently used entries are dropped first.
        A single larger entry is kept until the next one arrives.

    Notes
    -----
    Thread-safe.

    Examples
    --------
    >>> import pandas as pd
    >>> night = Night("p", pd.Timestamp("2031-01-01 22:00", tz="UTC"), 30, [0.0, 3.0, 9.0, 0.0] * 30)
    >>> config = FeatureConfig(families=("summary",))
    >>> cache = FeatureCache()
    >>> cache.lookup(night, config) is None
    True
    >>> first = cache.features(night, config)
    >>> cache.features(night, config) is first, len(cache)
    (True, 1)
    """

    def __init__(self, *, max_bytes: int = 256 * 2**20) -> None:
        self.max_bytes = int(max_bytes)
        self._entries: OrderedDict[tuple[str, str], FeatureMatrix] = OrderedDict()
        self._bytes = 0
        self._lock = threading.Lock()

    def __len__(self) -> int:
        with self._lock:
            return len(self._entries)

    def lookup(self, night: Night, config: FeatureConfig) -> FeatureMatrix | None:
        key = (night.content_hash, config.version_for(night.epoch_seconds))
        with self._lock:
            found = self._entries.get(key)
            if found is not None:
                self._entries.move_to_end(key)
            return found

    def keep(self, night: Night, features: FeatureMatrix) -> None:
        key = (night.content_hash, features.version)
        with self._lock:
            old = self._entries.pop(key, None)
            if old is not None:
                self._bytes -= old.values.nbytes
            self._entries[key] = features
            self._bytes += features.values.nbytes
            while self._bytes > self.max_bytes and len(self._entries) > 1:
                _, dropped = self._entries.popitem(last=False)
                self._bytes -= dropped.values.nbytes
