"""Training rows: labelled nights, whole-night features, scored in-bed epochs."""

from __future__ import annotations

import numpy as np
import pandas as pd

from models.features.cache import FeatureCache
from models.features.matrix import compute_features
from models.learning.config import TrainingConfig
from models.learning.rows import labelled_nights, prepare_nights
from models.nights.night import Night


def _night(reference: list[str] | None, *, day: int = 0, lights_off_s: int | None = None) -> Night:
    start = pd.Timestamp("2031-03-02 22:00", tz="UTC") + pd.Timedelta(days=day)
    n = 40 if reference is None else len(reference)
    counts = np.random.default_rng(day).poisson(3.0, n).astype(float)
    return Night("P", start, 30, counts, reference=None if reference is None else np.array(reference),
                 lights_off=None if lights_off_s is None else start + pd.Timedelta(seconds=lights_off_s))


def test_labelled_nights_need_a_scored_in_bed_epoch_and_come_in_time_order() -> None:
    late = _night(["W"] * 10 + ["N2"] * 30, day=2)
    early = _night(["N2"] * 40, day=1)
    unscored_in_bed = _night(["W"] * 10 + ["?"] * 30, day=0, lights_off_s=300)
    assert labelled_nights([late, _night(None), unscored_in_bed, early], TrainingConfig()) == [early, late]


def test_training_rows_are_scored_in_bed_epochs_of_whole_night_features() -> None:
    night = _night(["W"] * 10 + ["N2", "?"] * 15, lights_off_s=120)  # in bed from epoch 4
    (rows,) = prepare_nights([night], TrainingConfig(), feature_cache=FeatureCache())
    assert rows.rows.tolist() == [4, 5, 6, 7, 8, 9] + list(range(10, 40, 2))
    expected = compute_features(night.counts, 30, lights_off_epoch=4, lights_on_epoch=40)
    np.testing.assert_array_equal(rows.features.values, expected.values)


def test_training_rows_leave_out_epochs_without_counts() -> None:
    night = _night(["W"] * 10 + ["N2"] * 30)
    counts = night.counts.copy()
    counts[[3, 12, 13, 14, 39]] = np.nan  # missing epochs, whatever their reference says
    gapped = Night("P", night.start, 30, counts, reference=night.reference)
    (rows,) = prepare_nights([gapped], TrainingConfig(), feature_cache=FeatureCache())
    assert rows.rows.tolist() == [i for i in range(40) if i not in (3, 12, 13, 14, 39)]
    # a night whose only scored epochs have no counts is not labelled
    blank = np.where(np.arange(40) < 10, np.nan, counts)
    only_missing_scored = Night("P", night.start, 30, blank, reference=np.array(["W"] * 10 + ["?"] * 30))
    assert labelled_nights([only_missing_scored], TrainingConfig()) == []


def test_corrected_rows_take_the_judged_in_bed_epochs_with_the_given_weight_into_the_xgboost_matrices() -> None:
    from models.learning.rows import corrected_rows
    from models.learning.tuning import _InnerData

    config = TrainingConfig()
    psg = prepare_nights([_night(["W"] * 10 + ["N2"] * 30, day=d) for d in (1, 2, 3)], config,
                         feature_cache=FeatureCache())
    labels = np.r_[np.full(5, np.nan), np.zeros(10), np.ones(25)]
    (corrected,) = corrected_rows([(_night(None, day=4), labels)], config, weight=0.25, feature_cache=FeatureCache())
    assert corrected.rows.tolist() == list(range(5, 40)) and corrected.weight == 0.25
    np.testing.assert_array_equal(corrected.reference, labels)
    assert _InnerData(psg, config).w is None  # PSG only: no weights given to XGBoost
    data = _InnerData([*psg, corrected], config)
    expected = np.r_[np.ones(3 * 40), np.full(35, 0.25)]  # nights in start order, the corrected one last
    np.testing.assert_array_equal(data.w, expected)
    train, val = data.splits[-1]
    dtrain, dval = data.matrices(len(data.splits) - 1, 0.0)
    np.testing.assert_array_equal(dtrain.get_weight(), expected[train])  # read back from XGBoost itself
