"""Deployed pooled offsets of trained-on participants follow the stated cross-fitting rule."""

from __future__ import annotations

import numpy as np
import pytest

from models.learning.artifacts import model_from_bytes, model_to_bytes
from models.learning.config import TrainingConfig
from models.learning.offset import estimate_offset
from models.learning.pooled import OFFSET_RULE, train_pooled
from models.simulation.simulator import CohortSpec, simulate_cohort


@pytest.fixture(scope="module")
def trained():
    sims = simulate_cohort(CohortSpec(n_participants=5, nights_min=2, nights_max=3, labelled_share=1.0,
                                      few_labels_participants=0, artefacts=False), seed=91)
    nights: dict[str, list] = {}
    for s in sims:
        nights.setdefault(s.night.participant_id, []).append(s.night)
    return nights, train_pooled(nights, config=TrainingConfig(pooled_folds=3, max_rounds=60))


def _scored(h) -> tuple[np.ndarray, np.ndarray]:
    bed = slice(*h.in_bed)
    keep = np.isfinite(h.reference[bed]) & np.isfinite(h.margin[bed])
    return h.margin[bed][keep], h.reference[bed][keep]


def test_deployed_offset_is_cross_fitted_on_the_fold_model_that_left_the_participant_out(trained) -> None:
    nights, result = trained
    assert result.offset_rule == OFFSET_RULE and OFFSET_RULE.startswith("cross-fitted")
    differs = 0
    for pid in nights:
        # the documented rule: out-of-fold margins (+ that fold model's baseline), penalty chosen on everyone
        parts = [_scored(h) for h in result.held_out[pid]]
        margin = np.concatenate([m for m, _ in parts]) + result.baselines[pid]
        reference = np.concatenate([y for _, y in parts])
        assert result.offsets[pid] == pytest.approx(estimate_offset(margin, reference, shrinkage=result.shrinkage),
                                                    abs=1e-12)
        # control: the final model's own (in-sample) margins would give another offset
        in_sample_m, in_sample_y = [], []
        for night in nights[pid]:
            ref = night.reference_sleep()
            m = result.model.decision_function(night, descriptors=result.descriptors[pid])
            bed = slice(*night.in_bed)
            keep = np.isfinite(ref[bed]) & np.isfinite(m[bed])
            in_sample_m.append(m[bed][keep])
            in_sample_y.append(ref[bed][keep])
        leaky = estimate_offset(np.concatenate(in_sample_m) + result.model.offset_baseline_,
                                np.concatenate(in_sample_y), shrinkage=result.shrinkage)
        differs += abs(leaky - result.offsets[pid]) > 1e-6
    assert differs > 0


def test_the_rule_is_stored_with_the_model_and_old_metadata_still_loads(trained) -> None:
    _, result = trained
    raw, meta = model_to_bytes(result.model)
    assert meta["info"]["offset_rule"] == OFFSET_RULE
    assert model_from_bytes(raw, meta).info_["offset_rule"] == OFFSET_RULE
    old = dict(meta, info={k: v for k, v in meta["info"].items() if k != "offset_rule"})  # stored before the field
    assert "offset_rule" not in model_from_bytes(raw, old).info_
