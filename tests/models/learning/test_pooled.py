"""Pooled model: leave-participants-out predictions, descriptors, folds, errors."""

from __future__ import annotations

import numpy as np
import pytest

from models.learning.artifacts import model_to_bytes
from models.learning.config import TrainingConfig, TrainingDataError
from models.learning.descriptors import DESCRIPTOR_NAMES, participant_descriptors
from models.learning.pooled import train_pooled
from models.nights.night import Night
from models.simulation.simulator import CohortSpec, simulate_cohort

CONFIG = TrainingConfig(pooled_folds=3, max_rounds=80)


def _by_participant(nights: list[Night]) -> dict[str, list[Night]]:
    out: dict[str, list[Night]] = {}
    for n in nights:
        out.setdefault(n.participant_id, []).append(n)
    return out


@pytest.fixture(scope="module")
def cohort() -> dict[str, list[Night]]:
    sims = simulate_cohort(CohortSpec(n_participants=5, nights_min=2, nights_max=3, labelled_share=0.7,
                                      few_labels_participants=1, artefacts=False), seed=31)
    return _by_participant([s.night for s in sims])


@pytest.fixture(scope="module")
def result(cohort):
    return train_pooled(cohort, config=CONFIG)


def test_pooled_result_layout(result, cohort) -> None:
    assert result.model.kind_ == "pooled" and result.model.descriptor_names_ == DESCRIPTOR_NAMES
    assert result.model.feature_names_[-1] != DESCRIPTOR_NAMES[-1]  # descriptors are extra inputs
    assert sorted(result.folds) == sorted(result.held_out) == sorted(cohort)
    assert len(set(result.folds.values())) == CONFIG.pooled_folds
    for pid, nights in cohort.items():
        labelled = [n for n in nights if n.reference is not None]
        assert [h.night_hash for h in result.held_out[pid]] == \
            [n.content_hash for n in sorted(labelled, key=lambda n: n.start)]
        assert result.descriptors[pid] == participant_descriptors(nights)  # unlabelled nights included
    methods = set(result.night_metrics["method"])
    assert methods == {"pooled", "pooled+offset"}
    assert set(result.summary.index.get_level_values(0)) == methods


def test_a_participants_labels_never_reach_their_held_out_predictions(result, cohort) -> None:
    pid = sorted(cohort)[1]
    flipped = {k: list(v) for k, v in cohort.items()}
    flip = {"W": "N2", "N1": "W", "N2": "W", "N3": "W", "R": "W", "?": "?"}
    flipped[pid] = [n if n.reference is None else Night(
        participant_id=n.participant_id, start=n.start, epoch_seconds=n.epoch_seconds, counts=n.counts,
        reference=np.array([flip[s] for s in n.reference]), lights_off=n.lights_off, lights_on=n.lights_on,
        label=n.label) for n in cohort[pid]]
    other = train_pooled(flipped, config=CONFIG)
    for a, b in zip(result.held_out[pid], other.held_out[pid], strict=True):
        np.testing.assert_array_equal(a.p_sleep, b.p_sleep)
        assert a.threshold == b.threshold
    # the flipped labels did change the final model, which trains on everybody
    assert model_to_bytes(result.model)[0] != model_to_bytes(other.model)[0]


def test_pooled_is_reproducible(result, cohort) -> None:
    again = train_pooled(cohort, config=CONFIG)
    assert model_to_bytes(again.model) == model_to_bytes(result.model)
    assert again.offsets == result.offsets and again.shrinkage == result.shrinkage


def test_descriptors_by_hand() -> None:
    import pandas as pd

    counts = np.array([0.0, 5.0, np.nan, 0.0, 9.0, 100.0, 3.0, 0.0])
    night = Night("p", pd.Timestamp("2031-01-01 22:00", tz="UTC"), 30, counts,
                  lights_off=pd.Timestamp("2031-01-01 22:00:30", tz="UTC"))
    observed = np.array([5.0, 0.0, 9.0, 100.0, 3.0, 0.0])  # in bed from epoch 1, NaN left out
    d = participant_descriptors([night])
    assert d["participant_moving_share"] == pytest.approx(4 / 6)
    assert d["participant_moving_counts_median"] == pytest.approx(np.median([5.0, 9.0, 100.0, 3.0]))  # numpy
    assert d["participant_counts_q90"] == pytest.approx(np.percentile(observed, 90))  # numpy


def test_pooled_needs_three_labelled_participants(cohort) -> None:
    two = dict(list(cohort.items())[:2])
    with pytest.raises(TrainingDataError) as info:
        train_pooled(two, config=CONFIG)
    assert info.value.code == "too_few_participants"
