"""Shared training pieces: configuration, labelled nights, features through the cache, the task runner."""

from __future__ import annotations

import json
import threading

import numpy as np
import pandas as pd
import pytest

from models.features.cache import FeatureCache
from models.features.matrix import compute_features
from models.nights.night import Night
from models.learning.tasks import Reporter, run_tasks
from models.learning.training import InvalidTrainingConfigError, TrainingConfig, labelled_nights, night_features, prepare_nights


def _night(reference: list[str] | None, *, day: int = 0, lights_off_s: int | None = None) -> Night:
    start = pd.Timestamp("2031-03-02 22:00", tz="UTC") + pd.Timedelta(days=day)
    n = 40 if reference is None else len(reference)
    counts = np.random.default_rng(day).poisson(3.0, n).astype(float)
    return Night("P", start, 30, counts, reference=None if reference is None else np.array(reference),
                 lights_off=None if lights_off_s is None else start + pd.Timedelta(seconds=lights_off_s))


@pytest.mark.parametrize("field, value", [("n_trials", 0), ("min_personal_nights", 2), ("pooled_folds", 1),
                                          ("choice_policy", "accuracy"), ("movement_time", "maybe"),
                                          ("pooled_validation_share", 1.0), ("pooled_params", {"depth": 3}),
                                          ("min_sensitivity", 1.5), ("pooled_max_rows", 10)])
def test_config_rejects_out_of_range_values(field: str, value: object) -> None:
    with pytest.raises(InvalidTrainingConfigError, match=field) as info:
        TrainingConfig(**{field: value})
    assert info.value.code == "invalid_training_config"


def test_config_defaults_and_json_form() -> None:
    config = TrainingConfig()
    assert (config.n_trials, config.min_personal_nights, config.seed, config.n_jobs, config.pooled_folds,
            config.choice_policy) == (30, 3, 0, 1, 5, "balanced_accuracy")
    assert json.loads(json.dumps(config.to_dict()))["features"] == config.features.to_dict()


def test_labelled_nights_need_a_scored_in_bed_epoch_and_come_in_time_order() -> None:
    late = _night(["W"] * 10 + ["N2"] * 30, day=2)
    early = _night(["N2"] * 40, day=1)
    unscored_in_bed = _night(["W"] * 10 + ["?"] * 30, day=0, lights_off_s=300)
    assert labelled_nights([late, _night(None), unscored_in_bed, early], TrainingConfig()) == [early, late]


def test_training_rows_are_scored_in_bed_epochs_of_whole_night_features() -> None:
    night = _night(["W"] * 10 + ["N2", "?"] * 15, lights_off_s=120)  # in bed from epoch 4
    (rows,) = prepare_nights([night], TrainingConfig(), cache=FeatureCache())
    assert rows.rows.tolist() == [4, 5, 6, 7, 8, 9] + list(range(10, 40, 2))
    expected = compute_features(night.counts, 30, lights_off_epoch=4, lights_on_epoch=40)
    np.testing.assert_array_equal(rows.features.values, expected.values)


def test_night_features_are_computed_once_per_cache() -> None:
    cache, night = FeatureCache(), _night(["N2"] * 40)
    first = night_features(night, TrainingConfig().features, cache=cache)
    assert night_features(night, TrainingConfig().features, cache=cache) is first and len(cache) == 1
    assert first.version == cache.get(night.content_hash, first.version).version


def test_run_tasks_keeps_order_reports_in_the_caller_thread_and_propagates_errors() -> None:
    seen: list[int] = []
    caller = threading.get_ident()

    def progress(done: int, total: int, stage: str) -> None:
        assert threading.get_ident() == caller and total == 6
        seen.append(done)

    def task(i: int):
        def run(reporter: Reporter) -> int:
            reporter.tick(f"task {i}")
            reporter.tick(f"task {i}")
            return i * i
        return run

    assert run_tasks([task(i) for i in range(3)], n_jobs=2, total=6, progress=progress) == [0, 1, 4]
    assert seen == [1, 2, 3, 4, 5, 6]

    def broken(reporter: Reporter) -> int:
        raise KeyError("boom")

    with pytest.raises(KeyError, match="boom"):
        run_tasks([task(0), broken], n_jobs=2, total=2, progress=None)
