"""The in-memory feature cache: least recently used entries go first once the byte budget is spent."""

from __future__ import annotations

from factories import make_night

from models.features.cache import FeatureCache
from models.features.matrix import FeatureConfig

CONFIG = FeatureConfig(families=("summary",))


def test_lru_drops_least_recently_used_beyond_the_byte_budget() -> None:
    a, b, c = (make_night(120, seed=seed) for seed in (1, 2, 3))
    one = FeatureCache().features(a, CONFIG).values.nbytes
    cache = FeatureCache(max_bytes=2 * one)
    first_a, _ = cache.features(a, CONFIG), cache.features(b, CONFIG)
    assert cache.lookup(a, CONFIG) is first_a  # "a" is now the most recent
    cache.features(c, CONFIG)
    assert cache.lookup(b, CONFIG) is None and cache.lookup(a, CONFIG) is first_a and len(cache) == 2


def test_an_entry_larger_than_the_budget_stays_until_the_next_one() -> None:
    a, b = make_night(120, seed=1), make_night(120, seed=2)
    cache = FeatureCache(max_bytes=1)
    kept = cache.features(a, CONFIG)
    assert cache.lookup(a, CONFIG) is kept
    cache.features(b, CONFIG)
    assert cache.lookup(a, CONFIG) is None and len(cache) == 1
