"""Reviewers' corrections: labels from intervals (end exclusive, sleep over wake, NaN outside rest), their
parameters by the study's one definition (models.scoring.parameters.sleep_parameters), and two reviews
compared (Cohen's kappa against scikit-learn's cohen_kappa_score)."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import cohen_kappa_score

from models.review.corrections import (
    InvalidReviewError,
    judged_span,
    labels_from_review,
    review_discrepancy,
    review_parameters,
)
from models.scoring.parameters import sleep_parameters
from models.scoring.protocol import StudyProtocol


def _iv(start: int, end: int) -> dict[str, int]:
    return {"start_epoch": start, "end_epoch": end}


def test_labels_from_review_end_is_exclusive_and_sleep_wins_overlaps() -> None:
    base = [1.0] * 10
    out = labels_from_review(10, base_calls=base, wake_intervals=[_iv(2, 6)], sleep_intervals=[_iv(4, 5)])
    # written out by hand: wake on 2, 3, (4 overridden by sleep), 5; epoch 6 untouched (end exclusive)
    assert out.tolist() == [1, 1, 0, 0, 1, 0, 1, 1, 1, 1]


def test_labels_from_review_outside_rest_is_not_judged() -> None:
    out = labels_from_review(8, base_calls=[0, 0, 1, 1, 1, 1, 0, 0], rest_interval=_iv(1, 7))
    assert np.isnan(out[0]) and np.isnan(out[7])
    assert out[1:7].tolist() == [0, 1, 1, 1, 1, 0]
    assert judged_span(out) == (1, 7)


def test_labels_from_review_keeps_unscored_base_epochs() -> None:
    out = labels_from_review(4, base_calls=[1, None, float("nan"), 0])
    assert out[0] == 1 and np.isnan(out[1]) and np.isnan(out[2]) and out[3] == 0


@pytest.mark.parametrize(("kwargs", "field"), [
    ({"wake_intervals": [_iv(0, 2), _iv(3, 11)]}, "wake_intervals[1].end_epoch"),
    ({"sleep_intervals": [_iv(5, 5)]}, "sleep_intervals[0]"),
    ({"sleep_intervals": [_iv(-1, 3)]}, "sleep_intervals[0].start_epoch"),
    ({"wake_intervals": [{"start_epoch": 1}]}, "wake_intervals[0].end_epoch"),
    ({"wake_intervals": [{"start_epoch": 1.5, "end_epoch": 3}]}, "wake_intervals[0].start_epoch"),
    ({"wake_intervals": [{"start_epoch": True, "end_epoch": 3}]}, "wake_intervals[0].start_epoch"),
    ({"rest_interval": _iv(4, 2)}, "rest_interval"),
    ({"labels": [1, 0, 2] + [1] * 7}, "labels[2]"),
    ({"labels": [1] * 9}, "labels"),
    ({"labels": [1] * 10, "rest_interval": _iv(0, 5)}, "labels"),
])
def test_labels_from_review_names_the_field_and_index(kwargs: dict, field: str) -> None:
    with pytest.raises(InvalidReviewError) as err:
        labels_from_review(10, base_calls=[1] * 10, **kwargs)
    assert err.value.code == "invalid_review" and err.value.status == 422
    assert field in str(err.value)
    assert any(p.location["field"] == field for p in err.value.problems)


def test_labels_from_review_takes_per_epoch_labels() -> None:
    out = labels_from_review(4, base_calls=[1, 1, 1, 1], labels=[None, 0, 1, 1])
    assert np.isnan(out[0]) and out[1:].tolist() == [0, 1, 1]


def test_base_calls_of_wrong_length_are_refused() -> None:
    with pytest.raises(InvalidReviewError, match="base_calls: has 3 values for a night of 4 epochs"):
        labels_from_review(4, base_calls=[1, 1, 1])


def test_review_parameters_are_sleep_parameters_over_the_judged_span() -> None:
    rng = np.random.default_rng(3)
    calls = (rng.random(600) < 0.8).astype(float)
    labels = labels_from_review(600, base_calls=calls, wake_intervals=[_iv(50, 90)], rest_interval=_iv(30, 560))
    protocol = StudyProtocol(min_awakening_epochs=2, waso_end="final_awakening")
    got = review_parameters(labels, epoch_seconds=30, protocol=protocol)
    # the one definition of the study, in-bed interval = the rest interval
    want = sleep_parameters(labels, 30, lights_off_idx=30, lights_on_idx=560, protocol=protocol).as_dict()
    assert got.keys() == want.keys()
    for k in want:
        assert got[k] == pytest.approx(want[k], nan_ok=True)
    # an explicit in-bed interval is used as given
    given = review_parameters(labels, epoch_seconds=30, lights_off_idx=0, lights_on_idx=600)
    assert given["time_in_bed_min"] == 300.0


def test_review_discrepancy_kappa_matches_scikit_learn() -> None:
    rng = np.random.default_rng(7)
    a = (rng.random(400) < 0.7).astype(float)
    b = a.copy()
    flip = rng.random(400) < 0.15
    b[flip] = 1 - b[flip]
    a[:20] = np.nan  # not judged by a: left out of the comparison
    d = review_discrepancy(a, b, epoch_seconds=30)
    both = ~np.isnan(a)
    assert d["epochs_compared"] == 380 and d["epochs_judged_by_one"] == 20
    assert d["epochs_differing"] == int((a[both] != b[both]).sum())
    assert d["kappa"] == pytest.approx(cohen_kappa_score(a[both], b[both]))  # scikit-learn reference
    covered = sum(iv["end_epoch"] - iv["start_epoch"] for iv in d["differing_intervals"])
    assert covered == d["epochs_differing"]
    for iv in d["differing_intervals"]:
        assert np.all(a[iv["start_epoch"]:iv["end_epoch"]] != b[iv["start_epoch"]:iv["end_epoch"]])
    tst_a = sleep_parameters(a, 30, lights_off_idx=20, lights_on_idx=400).tst_min
    tst_b = sleep_parameters(b, 30).tst_min
    assert d["parameter_differences"]["tst_min"] == pytest.approx(tst_b - tst_a)


def test_review_discrepancy_of_identical_reviews() -> None:
    a = np.array([0, 0, 1, 1, 1, 0, 1, 1], dtype=float)
    d = review_discrepancy(a, a.copy(), epoch_seconds=60)
    assert d["kappa"] == pytest.approx(1.0) and d["differing_intervals"] == [] and d["epochs_differing"] == 0
    assert all(v == 0 for v in d["parameter_differences"].values() if np.isfinite(v))


def test_review_discrepancy_kappa_undefined_for_one_label_throughout() -> None:
    d = review_discrepancy([1, 1, 1], [1, 1, 1], epoch_seconds=30)
    assert np.isnan(d["kappa"])


def test_review_discrepancy_refuses_different_lengths() -> None:
    with pytest.raises(InvalidReviewError, match="labels_b"):
        review_discrepancy([1, 0], [1, 0, 1], epoch_seconds=30)


def test_review_discrepancy_over_a_given_in_bed_interval() -> None:
    a = np.array([0, 0, 1, 1, 1, 1, 0, 1, 1, 0], dtype=float)
    b = np.array([0, 1, 1, 1, 0, 1, 0, 1, 1, 0], dtype=float)
    d = review_discrepancy(a, b, epoch_seconds=60, lights_off_idx=1, lights_on_idx=9)
    for key, labels in (("parameters_a", a), ("parameters_b", b)):
        want = sleep_parameters(labels, 60, lights_off_idx=1, lights_on_idx=9).as_dict()
        assert d[key]["sol_min"] == want["sol_min"] and d[key]["waso_min"] == want["waso_min"]
    assert d["differing_intervals"] == [{"start_epoch": 1, "end_epoch": 2}, {"start_epoch": 4, "end_epoch": 5}]
