"""Feature cache: LRU by bytes, directory persistence, keys by content hash and version."""

from __future__ import annotations

import numpy as np
import pytest

from models.features.cache import FeatureCache
from models.features.matrix import (
    FeatureConfig,
    FeatureInputError,
    FeatureMatrix,
    FeatureSetMismatchError,
    compute_features,
)


def _matrix(rows: int, version: str = "v1", fill: float = 0.0) -> FeatureMatrix:
    return FeatureMatrix(np.full((rows, 2), fill, dtype=np.float32), ("a", "b"), version)


def test_get_or_compute_computes_once_per_key():
    cache, calls = FeatureCache(), []
    counts = np.random.default_rng(0).poisson(5, 300).astype(float)
    config = FeatureConfig(families=("summary",))

    def compute() -> FeatureMatrix:
        calls.append(1)
        return compute_features(counts, 30, config=config)

    version = config.version + "-30s"
    first = cache.get_or_compute("night1", version, compute)
    again = cache.get_or_compute("night1", version, compute)
    assert again is first and len(calls) == 1
    assert cache.get("night1", FeatureConfig().version + "-30s") is None  # another feature set


def test_lru_drops_least_recently_used_beyond_the_byte_budget():
    one = _matrix(100).values.nbytes
    cache = FeatureCache(max_bytes=2 * one)
    for key in ("a", "b"):
        cache.put(key, "v1", _matrix(100))
    assert cache.get("a", "v1") is not None  # "a" is now the most recent
    cache.put("c", "v1", _matrix(100))
    assert cache.get("b", "v1") is None and cache.get("a", "v1") is not None and len(cache) == 2


def test_directory_entries_survive_a_new_cache(tmp_path):
    fm = _matrix(10, fill=1.5)
    FeatureCache(directory=tmp_path).put("abc123", "v1", fm)
    loaded = FeatureCache(directory=tmp_path).get("abc123", "v1")
    assert loaded is not None and loaded.names == fm.names and loaded.version == "v1"
    np.testing.assert_array_equal(loaded.values, fm.values)
    assert sorted(p.suffix for p in tmp_path.iterdir()) == [".json", ".npy"]


def test_put_refuses_a_version_that_is_not_the_features_version():
    with pytest.raises(FeatureSetMismatchError) as err:
        FeatureCache().put("abc", "v2", _matrix(3, "v1"))
    assert err.value.code == "feature_set_mismatch"


def test_unsafe_keys_are_refused(tmp_path):
    with pytest.raises(FeatureInputError, match="cache key"):
        FeatureCache(directory=tmp_path).get("../escape", "v1")
