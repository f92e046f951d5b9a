"""Cache of computed feature matrices keyed by (night content hash, feature-set version).

Hyper-parameter tuning scores the same nights many times with the same feature set; the cache
makes every night's features computed once. Entries live in an in-memory LRU bounded in bytes
and, optionally, in a directory of ``.npy`` files (values) with a ``.json`` sidecar (names and
version) so they survive the process.

The content hash must identify everything the features depend on besides the configuration:
counts, epoch length and lights-off/on (``Night.content_hash`` covers all three).
"""

from __future__ import annotations

import json
import os
import re
import threading
from collections import OrderedDict
from collections.abc import Callable
from pathlib import Path

import numpy as np

from .matrix import FeatureInputError, FeatureMatrix, FeatureSetMismatchError

__all__ = ["FeatureCache"]

_SAFE_KEY = re.compile(r"^[A-Za-z0-9._-]+$")


class FeatureCache:
    """In-memory LRU of :class:`~models.features.matrix.FeatureMatrix`, optionally backed by a directory.

    Parameters
    ----------
    max_bytes : int, default=256 * 2**20
        Memory budget for the in-memory entries (sum of ``values.nbytes``); least recently used
        entries are dropped first. A single larger entry is kept until the next insertion.
    directory : str or Path or None, default=None
        If given, entries are also written there and read back on a memory miss.

    Notes
    -----
    Thread-safe. Keys are ``(content_hash, version)``; both must consist of letters, digits,
    ``.``, ``_`` or ``-`` (they become file names).

    Examples
    --------
    >>> cache = FeatureCache()
    >>> fm = FeatureMatrix(np.zeros((2, 1), np.float32), ("a",), "v1")
    >>> cache.get("abc", "v1") is None
    True
    >>> cache.put("abc", "v1", fm); cache.get("abc", "v1") is fm
    True
    """

    def __init__(self, *, max_bytes: int = 256 * 2**20, directory: str | Path | None = None) -> None:
        self.max_bytes = int(max_bytes)
        self.directory = Path(directory) if directory is not None else None
        self._entries: OrderedDict[tuple[str, str], FeatureMatrix] = OrderedDict()
        self._bytes = 0
        self._lock = threading.Lock()
        if self.directory is not None:
            self.directory.mkdir(parents=True, exist_ok=True)

    def __len__(self) -> int:
        with self._lock:
            return len(self._entries)

    @staticmethod
    def _check_key(content_hash: str, version: str) -> None:
        for part in (content_hash, version):
            if not _SAFE_KEY.match(part):
                raise FeatureInputError(f"cache key parts must match {_SAFE_KEY.pattern}, got {part!r}")

    def _paths(self, content_hash: str, version: str) -> tuple[Path, Path]:
        assert self.directory is not None
        stem = self.directory / f"{content_hash}__{version}"
        return stem.with_suffix(".npy"), stem.with_suffix(".json")

    def _remember(self, key: tuple[str, str], features: FeatureMatrix) -> None:
        old = self._entries.pop(key, None)
        if old is not None:
            self._bytes -= old.values.nbytes
        self._entries[key] = features
        self._bytes += features.values.nbytes
        while self._bytes > self.max_bytes and len(self._entries) > 1:
            _, dropped = self._entries.popitem(last=False)
            self._bytes -= dropped.values.nbytes

    def get(self, content_hash: str, version: str) -> FeatureMatrix | None:
        """The cached features of a night, or None.

        Parameters
        ----------
        content_hash : str
            Content hash of the night.
        version : str
            Feature-set version (``FeatureMatrix.version``).

        Returns
        -------
        FeatureMatrix or None

        Raises
        ------
        FeatureInputError
            If a key part has characters other than letters, digits, ``.``, ``_`` or ``-``.
        """
        self._check_key(content_hash, version)
        key = (content_hash, version)
        with self._lock:
            if key in self._entries:
                self._entries.move_to_end(key)
                return self._entries[key]
        if self.directory is None:
            return None
        values_path, meta_path = self._paths(content_hash, version)
        if not (values_path.exists() and meta_path.exists()):
            return None
        meta = json.loads(meta_path.read_text())
        features = FeatureMatrix(np.load(values_path, allow_pickle=False), tuple(meta["names"]), meta["version"])
        with self._lock:
            self._remember(key, features)
        return features

    def put(self, content_hash: str, version: str, features: FeatureMatrix) -> None:
        """Store the features of a night.

        Raises
        ------
        FeatureSetMismatchError
            If ``version`` differs from ``features.version``.
        FeatureInputError
            If a key part has characters other than letters, digits, ``.``, ``_`` or ``-``.
        """
        self._check_key(content_hash, version)
        if features.version != version:
            raise FeatureSetMismatchError(f"features have version {features.version!r}, not {version!r}")
        with self._lock:
            self._remember((content_hash, version), features)
        if self.directory is not None:
            values_path, meta_path = self._paths(content_hash, version)
            tmp_values = values_path.with_name(values_path.name + f".{os.getpid()}.tmp")
            with open(tmp_values, "wb") as fh:
                np.save(fh, features.values, allow_pickle=False)
            tmp_meta = meta_path.with_name(meta_path.name + f".{os.getpid()}.tmp")
            tmp_meta.write_text(json.dumps({"names": list(features.names), "version": features.version}))
            os.replace(tmp_values, values_path)  # values first: a reader needs both files
            os.replace(tmp_meta, meta_path)

    def get_or_compute(self, content_hash: str, version: str, compute: Callable[[], FeatureMatrix]) -> FeatureMatrix:
        """Cached features, computing and storing them on a miss.

        Parameters
        ----------
        content_hash, version : str
            The key.
        compute : callable returning FeatureMatrix
            Called only on a miss; its result must carry ``version``.
        """
        features = self.get(content_hash, version)
        if features is None:
            features = compute()
            self.put(content_hash, version, features)
        return features
