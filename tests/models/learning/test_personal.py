"""Personal models: nested leave-one-night-out evaluation without leakage, reproducibility, progress."""

from __future__ import annotations

import threading

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import roc_auc_score

from models.learning.artifacts import model_to_bytes
from models.learning.config import TrainingConfig, TrainingDataError
from models.learning.personal import train_personal
from models.nights.night import Night
from models.simulation.simulator import CohortSpec, simulate_cohort

CONFIG = TrainingConfig(n_trials=3, max_rounds=60)


def _with_reference(night: Night, reference: np.ndarray) -> Night:
    return Night(participant_id=night.participant_id, start=night.start, epoch_seconds=night.epoch_seconds,
                 counts=night.counts, reference=reference, lights_off=night.lights_off, lights_on=night.lights_on,
                 label=night.label)


@pytest.fixture(scope="module")
def nights() -> list[Night]:
    sims = simulate_cohort(CohortSpec(n_participants=1, nights_min=5, nights_max=5, labelled_share=1.0,
                                      few_labels_participants=0, artefacts=False), seed=21)
    return [s.night for s in sims]


@pytest.fixture(scope="module")
def result(nights):
    return train_personal(nights, config=CONFIG)


def test_personal_result_layout(result, nights) -> None:
    assert [h.label for h in result.outer] == [n.label for n in sorted(nights, key=lambda n: n.start)]
    assert list(result.trials["study"]) == [n.label for n in nights] + ["final"]
    assert (result.trials["n_trials"] == CONFIG.n_trials).all()
    assert result.model.kind_ == "personal" and result.model.participant_id_ == nights[0].participant_id
    assert 0.0 < result.model.threshold_ < 1.0
    assert set(result.best_params) >= {"max_depth", "learning_rate", "class_balance", "pca_variance", "n_rounds"}
    assert result.summary.loc["balanced_accuracy", "n_nights"] == len(nights)
    # summary = mean of the per-night figures (pandas reference)
    assert result.summary.loc["auc", "mean"] == pytest.approx(result.night_metrics["auc"].mean())
    for h in result.outer:
        assert h.p_sleep.shape == h.sleep.shape == (next(n for n in nights if n.label == h.label).n_epochs,)
        assert np.isin(h.sleep[~np.isnan(h.p_sleep)], (0.0, 1.0)).all()
        assert (np.isnan(h.sleep) == np.isnan(h.p_sleep)).all()  # decoded calls, unscored where p is


def test_held_out_night_labels_never_reach_its_prediction(result, nights) -> None:
    k = 2
    rng = np.random.default_rng(0)
    changed = list(nights)
    changed[k] = _with_reference(nights[k], rng.permutation(np.array(["W", "N2"] * (nights[k].n_epochs // 2 + 1)))
                                 [: nights[k].n_epochs])
    other = train_personal(changed, config=CONFIG)
    np.testing.assert_array_equal(other.outer[k].p_sleep, result.outer[k].p_sleep)
    # the changed labels did reach the models of the other nights (the check can fail)
    pairs = enumerate(zip(result.outer, other.outer, strict=True))
    assert any(not np.array_equal(a.p_sleep, b.p_sleep) for i, (a, b) in pairs if i != k)


def test_same_data_and_seed_give_identical_bytes_whatever_n_jobs(result, nights) -> None:
    again = train_personal(nights, config=TrainingConfig(n_trials=3, max_rounds=60, n_jobs=2))
    raw_a, meta_a = model_to_bytes(result.model)
    raw_b, meta_b = model_to_bytes(again.model)
    assert raw_a == raw_b and meta_a == meta_b
    pd.testing.assert_frame_equal(result.night_metrics, again.night_metrics)


def test_labels_shuffled_within_nights_give_chance_outer_auc(nights) -> None:
    rng = np.random.default_rng(1)
    shuffled = []
    for night in nights:
        ref = night.reference.copy()
        first, stop = night.in_bed
        ref[first:stop] = rng.permutation(ref[first:stop])
        shuffled.append(_with_reference(night, ref))
    res = train_personal(shuffled, config=CONFIG)
    aucs = [roc_auc_score(h.reference[slice(*h.in_bed)], h.p_sleep[slice(*h.in_bed)]) for h in res.outer]  # sklearn
    assert abs(np.mean(aucs) - 0.5) <= 0.05


def test_progress_runs_in_the_callers_thread_and_a_raise_stops_training(nights) -> None:
    calls: list[tuple[int, int, str]] = []
    caller = threading.get_ident()

    class Stop(Exception):
        pass

    def progress(done: int, total: int, stage: str) -> None:
        assert threading.get_ident() == caller
        calls.append((done, total, stage))
        if len(calls) == 2:
            raise Stop

    with pytest.raises(Stop):
        train_personal(nights, config=TrainingConfig(n_trials=3, max_rounds=60, n_jobs=2), progress=progress)
    assert len(calls) == 2
    assert calls[0][1] == (len(nights) + 1) * (CONFIG.n_trials + 1)


def test_personal_refuses_unusable_nights(nights) -> None:
    with pytest.raises(TrainingDataError) as info:
        train_personal(nights[:2], config=CONFIG)
    assert info.value.code == "too_few_labelled_nights"
    stranger = Night(participant_id="someone-else", start=nights[0].start, epoch_seconds=30, counts=nights[0].counts,
                     reference=nights[0].reference)
    with pytest.raises(TrainingDataError) as info:
        train_personal([*nights, stranger], config=CONFIG)
    assert info.value.code == "mixed_participants"
    unlabelled = [_with_reference(n, None) for n in nights[:2]]
    with pytest.raises(TrainingDataError, match="needs 3 labelled nights, got 1"):
        train_personal([nights[0], *unlabelled], config=CONFIG)
