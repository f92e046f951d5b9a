"""Feature sources: one contract run against every implementation (the in-memory cache, precomputed features)."""

from __future__ import annotations

import pickle

import numpy as np
import pandas as pd
import pytest
from factories import make_night

from models.features.cache import FeatureCache
from models.features.matrix import FeatureConfig, FeatureMatrix, compute_features
from models.features.source import FeatureSource, PrecomputedFeatures, night_features
from models.nights.night import Night

CONFIG = FeatureConfig(families=("summary",))
SOURCES = {"cache": FeatureCache, "precomputed": PrecomputedFeatures}


@pytest.fixture(params=sorted(SOURCES))
def source(request: pytest.FixtureRequest) -> FeatureSource:
    return SOURCES[request.param]()


def _in_bed_from(night: Night, lights_off_epoch: int) -> Night:
    return Night(participant_id=night.participant_id, start=night.start, epoch_seconds=night.epoch_seconds,
                 counts=night.counts, reference=night.reference,
                 lights_off=night.start + pd.Timedelta(seconds=night.epoch_seconds * lights_off_epoch))


def test_night_features_are_whole_night_features_with_the_in_bed_lights() -> None:
    night = _in_bed_from(make_night(200, seed=4), 20)
    # reference: compute_features called directly with the lights-off epoch (common practice)
    expected = compute_features(night.counts, 30, config=CONFIG, lights_off_epoch=20, lights_on_epoch=200)
    got = night_features(night, CONFIG)
    np.testing.assert_array_equal(got.values, expected.values)
    assert (got.names, got.version) == (expected.names, CONFIG.version_for(30))


def test_a_miss_is_computed_once_and_kept(source: FeatureSource) -> None:
    night = make_night(160, seed=5)
    assert source.lookup(night, CONFIG) is None
    first = source.features(night, CONFIG)
    np.testing.assert_array_equal(first.values, night_features(night, CONFIG).values)
    assert source.lookup(night, CONFIG) is first and source.features(night, CONFIG) is first


def test_another_feature_set_or_other_lights_are_a_miss(source: FeatureSource) -> None:
    night = make_night(160, seed=6)
    source.features(night, CONFIG)
    assert source.lookup(night, FeatureConfig()) is None
    assert source.lookup(_in_bed_from(night, 10), CONFIG) is None  # content hash covers lights-off


def test_features_of_keeps_order_and_does_not_depend_on_n_jobs(source: FeatureSource) -> None:
    nights = [make_night(120 + 10 * k, seed=k) for k in range(4)]
    cached = source.features(nights[2], CONFIG)
    got = list(source.features_of(nights, CONFIG, n_jobs=2))
    assert got[2] is cached
    for night, features in zip(nights, got, strict=True):
        np.testing.assert_array_equal(features.values, night_features(night, CONFIG).values)
        assert source.lookup(night, CONFIG) is features


def test_precomputed_features_answer_from_their_mapping_and_pickle() -> None:
    night = make_night(120, seed=7)
    real = night_features(night, CONFIG)
    stored = FeatureMatrix(np.zeros_like(real.values), real.names, real.version)  # recognisably not computed
    source = PrecomputedFeatures({night.content_hash: stored})
    assert source.features(night, CONFIG) is stored and len(source) == 1
    other = make_night(120, seed=8)
    source.features(other, CONFIG)
    restored = pickle.loads(pickle.dumps(source))  # e.g. sent along with a training task
    assert len(restored) == 2
    np.testing.assert_array_equal(restored.lookup(night, CONFIG).values, stored.values)
