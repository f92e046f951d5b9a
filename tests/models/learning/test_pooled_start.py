"""Pooled-start personal models: continued boosting, the pooled model each night starts from, no leakage."""

from __future__ import annotations

import math

import numpy as np
import pytest
import xgboost as xgb

from models.features.cache import FeatureCache
from models.learning import pooled_start
from models.learning.config import TrainingConfig, TrainingDataError
from models.learning.personal import train_personal
from models.learning.pooled import train_pooled
from models.learning.pooled_start import PooledBase, StartChoice, continue_boosting, prefer_scratch, start_design
from models.learning.rows import prepare_nights
from models.nights.night import Night
from models.simulation.simulator import CohortSpec, simulate_cohort

CONFIG = TrainingConfig(n_trials=3, max_rounds=60, pooled_folds=3)
#: night features depend on counts only: shared by every training of this module
CACHE = FeatureCache()
FLIP = {"W": "N2", "N1": "W", "N2": "W", "N3": "W", "R": "W", "?": "?"}


def _flipped(night: Night) -> Night:
    assert night.reference is not None
    return Night(participant_id=night.participant_id, start=night.start, epoch_seconds=night.epoch_seconds,
                 counts=night.counts, reference=np.array([FLIP[s] for s in night.reference]),
                 lights_off=night.lights_off, lights_on=night.lights_on, label=night.label)


@pytest.fixture(scope="module")
def cohort() -> dict[str, list[Night]]:
    sims = simulate_cohort(CohortSpec(n_participants=5, nights_min=3, nights_max=4, labelled_share=1.0,
                                      few_labels_participants=0, artefacts=False), seed=57)
    out: dict[str, list[Night]] = {}
    for s in sims:
        out.setdefault(s.night.participant_id, []).append(s.night)
    return out


@pytest.fixture(scope="module")
def pooled(cohort):
    return train_pooled(cohort, config=CONFIG, feature_cache=CACHE)


@pytest.fixture(scope="module")
def pid(cohort) -> str:
    return max(sorted(cohort), key=lambda p: len(cohort[p]))


def test_zero_added_rounds_gives_the_pooled_margins_exactly(pooled, cohort, pid) -> None:
    base = pooled.base_for(pid).held_out
    rows = prepare_nights(cohort[pid], CONFIG, feature_cache=CACHE)
    Z, y, _ = start_design(base, rows, pooled.descriptors[pid])
    copy = continue_boosting(base, Z, y, added_rounds=0, learning_rate=0.1, reg_lambda=1.0, config=CONFIG, seed=0)
    # reference: XGBoost's own margin prediction of the pooled booster
    expected = base.booster_.inplace_predict(Z, predict_type="margin", iteration_range=(0, base.n_rounds_))
    np.testing.assert_array_equal(copy.inplace_predict(Z, predict_type="margin"), expected)
    # and the same through the night-level path of the pooled model
    night, r = cohort[pid][0], rows[0]
    margin = base.decision_function(night, descriptors=pooled.descriptors[pid], features=r.features)
    np.testing.assert_array_equal(copy.inplace_predict(base.design_matrix(r.features, pooled.descriptors[pid]),
                                                       predict_type="margin")[r.rows], margin[r.rows])


def test_added_rounds_equal_boosting_from_the_pooled_margin(pooled, cohort, pid) -> None:
    """XGBoost documents continued training as boosting from the earlier model's margin
    (``base_margin``); a fresh booster trained from that margin must add the same trees."""
    base = pooled.base_for(pid).held_out
    rows = prepare_nights(cohort[pid], CONFIG, feature_cache=CACHE)
    Z, y, _ = start_design(base, rows, pooled.descriptors[pid])
    continued = continue_boosting(base, Z, y, added_rounds=7, learning_rate=0.15, reg_lambda=20.0, config=CONFIG,
                                  seed=3)
    assert continued.num_boosted_rounds() == base.n_rounds_ + 7
    # the pooled trees are untouched and the original booster unchanged
    first = base.booster_.inplace_predict(Z, predict_type="margin", iteration_range=(0, base.n_rounds_))
    np.testing.assert_array_equal(continued.inplace_predict(Z, predict_type="margin",
                                                            iteration_range=(0, base.n_rounds_)), first)
    assert base.booster_.num_boosted_rounds() == base.n_rounds_
    params = pooled_start._params(base, y, learning_rate=0.15, reg_lambda=20.0, config=CONFIG, seed=3)
    fresh = xgb.train(params, xgb.DMatrix(Z, y, base_margin=first, nthread=1), 7)
    reference = fresh.predict(xgb.DMatrix(Z, base_margin=first, nthread=1), output_margin=True)
    np.testing.assert_allclose(continued.inplace_predict(Z, predict_type="margin"), reference, rtol=0, atol=1e-4)


def test_base_for_gives_the_fold_model_that_left_the_participant_out(pooled, cohort) -> None:
    for p in cohort:
        base = pooled.base_for(p)
        assert base.final is pooled.model
        assert base.held_out is pooled.fold_models[pooled.folds[p]]
        assert not {n.content_hash for n in cohort[p]} & set(base.held_out.training_nights_)
        assert {n.content_hash for n in cohort[p]} <= set(base.final.training_nights_)  # control: the final saw them
        assert base.descriptors == pooled.descriptors[p]
    unseen = simulate_cohort(CohortSpec(n_participants=1, nights_min=3, nights_max=3, id_prefix="ZZ",
                                        artefacts=False), seed=5)
    outsider = [s.night for s in unseen]
    base = pooled.base_for("ZZ-01", nights=outsider)
    assert base.held_out is pooled.model
    with pytest.raises(TrainingDataError, match="ZZ-01"):
        pooled.base_for("ZZ-01")


def test_with_no_added_rounds_the_personal_model_is_the_pooled_model(pooled, cohort, pid, monkeypatch) -> None:
    monkeypatch.setattr(pooled_start, "ADDED_ROUNDS", (0,))
    monkeypatch.setattr(pooled_start, "SCRATCH_MARGIN_AUC", math.inf)  # scratch never wins
    result = train_personal(cohort[pid], config=CONFIG, feature_cache=CACHE, base=pooled.base_for(pid))
    assert result.model.info_["start"] == "pooled" and result.model.info_["added_rounds"] == 0
    for mine, theirs in zip(result.outer, pooled.held_out[pid], strict=True):
        np.testing.assert_array_equal(mine.p_sleep, theirs.p_sleep)
        np.testing.assert_array_equal(mine.sleep, theirs.sleep)
    night = cohort[pid][0]
    np.testing.assert_array_equal(result.model.predict_proba(night, descriptors=pooled.descriptors[pid]),
                                  pooled.model.predict_proba(night, descriptors=pooled.descriptors[pid]))


@pytest.fixture
def small_start_grid(monkeypatch) -> None:
    """Two added-round counts and one learning rate/L2 pair: the leakage checks need a pooled start
    with added trees, not the whole grid (which only costs time here)."""
    monkeypatch.setattr(pooled_start, "ADDED_ROUNDS", (0, 10))
    monkeypatch.setattr(pooled_start, "START_GRID", ((0.15, 1.0),))


def _held_out_night(result, night: Night) -> np.ndarray:
    return next(h.p_sleep for h in result.outer if h.night_hash == night.content_hash)


def test_a_held_out_nights_labels_never_reach_its_pooled_start_prediction(pooled, cohort, pid, monkeypatch,
                                                                          small_start_grid) -> None:
    monkeypatch.setattr(pooled_start, "SCRATCH_MARGIN_AUC", math.inf)  # the pooled start is what is tested
    k = 1
    changed = {p: list(v) for p, v in cohort.items()}
    changed[pid][k] = _flipped(cohort[pid][k])
    pooled_changed = train_pooled(changed, config=CONFIG, feature_cache=CACHE)
    assert pooled_changed.folds == pooled.folds
    mine = train_personal(cohort[pid], config=CONFIG, feature_cache=CACHE, base=pooled.base_for(pid))
    other = train_personal(changed[pid], config=CONFIG, feature_cache=CACHE, base=pooled_changed.base_for(pid))
    assert mine.model.info_["start"] == other.model.info_["start"] == "pooled"
    np.testing.assert_array_equal(_held_out_night(mine, cohort[pid][k]), _held_out_night(other, changed[pid][k]))
    # control: starting the held-out nights from the final pooled model, which trained on the flipped
    # labels, lets them reach the prediction; the check above would catch that leak
    def leaky(result):
        return PooledBase(final=result.model, held_out=result.model, descriptors=result.descriptors[pid])
    mine = train_personal(cohort[pid], config=CONFIG, feature_cache=CACHE, base=leaky(pooled))
    other = train_personal(changed[pid], config=CONFIG, feature_cache=CACHE, base=leaky(pooled_changed))
    assert not np.array_equal(_held_out_night(mine, cohort[pid][k]), _held_out_night(other, changed[pid][k]))


def test_another_participants_labels_never_reach_the_fold_that_left_them_out(pooled, cohort, pid, monkeypatch,
                                                                          small_start_grid) -> None:
    """Flipping every label of a participant in the same outer fold changes nothing in ``pid``'s held-out
    predictions (neither their fold model nor the personal part saw that participant)."""
    same_fold = [p for p in sorted(cohort) if p != pid and pooled.folds[p] == pooled.folds[pid]]
    assert same_fold, "the seeded cohort puts another participant in the same fold"
    monkeypatch.setattr(pooled_start, "SCRATCH_MARGIN_AUC", math.inf)  # the deployed model starts from pooled
    q = same_fold[0]
    changed = {p: list(v) for p, v in cohort.items()}
    changed[q] = [_flipped(n) for n in cohort[q]]
    pooled_changed = train_pooled(changed, config=CONFIG, feature_cache=CACHE)
    mine = train_personal(cohort[pid], config=CONFIG, feature_cache=CACHE, base=pooled.base_for(pid))
    other = train_personal(cohort[pid], config=CONFIG, feature_cache=CACHE, base=pooled_changed.base_for(pid))
    for a, b in zip(mine.outer, other.outer, strict=True):
        np.testing.assert_array_equal(a.p_sleep, b.p_sleep)
    # control: the deployed (final) personal model starts from the final pooled model, which saw them
    night = cohort[pid][0]
    assert not np.array_equal(mine.model.predict_proba(night, descriptors=pooled.descriptors[pid]),
                              other.model.predict_proba(night, descriptors=pooled.descriptors[pid]))


def test_scratch_needs_a_clear_lead() -> None:
    start = StartChoice(added_rounds=10, learning_rate=0.05, reg_lambda=1.0, balanced_accuracy=0.9, auc=0.95,
                        base_balanced_accuracy=0.88, n_inner_splits=2)
    assert not prefer_scratch(0.95 + pooled_start.SCRATCH_MARGIN_AUC, start)
    assert prefer_scratch(0.95 + pooled_start.SCRATCH_MARGIN_AUC + 1e-6, start)
    assert not prefer_scratch(float("nan"), start)
