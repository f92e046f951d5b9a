"""Learned models on nights with missing epochs (NaN counts from gap filling): never trained on, never predicted.

References: held-out metrics against scikit-learn on the epochs that have counts; the offset against its own
estimator on those epochs. Nights are SIMULATED (models.simulation); the PSG reference stays scored inside each
gap, as when the actigraph stops while the PSG goes on.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import balanced_accuracy_score, roc_auc_score

from models.learning.artifacts import model_to_bytes
from models.learning.config import TrainingConfig
from models.learning.offset import estimate_offset, participant_offset
from models.learning.personal import train_personal
from models.learning.pooled import train_pooled
from models.nights.night import Night
from models.simulation.simulator import CohortSpec, simulate_cohort

CONFIG = TrainingConfig(n_trials=3, max_rounds=60)


def _gapped(night: Night, gap: slice, *, reference: np.ndarray | None = None) -> Night:
    counts = night.counts.copy()
    counts[gap] = np.nan
    return Night(night.participant_id, night.start, night.epoch_seconds, counts,
                 reference=night.reference if reference is None else reference, lights_off=night.lights_off,
                 lights_on=night.lights_on, label=night.label)


def _flip_in_gaps(night: Night) -> Night:
    """The same night with every reference label inside its gaps inverted (sleep <-> wake)."""
    flip = {"W": "N2", "N1": "W", "N2": "W", "N3": "W", "R": "W", "?": "?"}
    ref = night.reference.copy()
    ref[night.missing] = [flip[s] for s in ref[night.missing]]
    return _gapped(night, slice(0, 0), reference=ref)


@pytest.fixture(scope="module")
def nights() -> list[Night]:
    sims = simulate_cohort(CohortSpec(n_participants=1, nights_min=4, nights_max=4, labelled_share=1.0,
                                      few_labels_participants=0, artefacts=False), seed=44)
    out = []
    for k, s in enumerate(sims):
        first, stop = s.night.in_bed
        start = first + 150 + 40 * k
        out.append(_gapped(s.night, slice(start, start + 60)))  # 30 minutes without counts, in bed
    return out


@pytest.fixture(scope="module")
def result(nights):
    return train_personal(nights, config=CONFIG)


def test_missing_epochs_are_unscored_in_held_out_predictions(result, nights) -> None:
    by_label = {n.label: n for n in nights}
    for h in result.outer:
        missing = by_label[h.label].missing
        assert missing.sum() == 60
        assert np.isnan(h.p_sleep[missing]).all() and np.isnan(h.sleep[missing]).all()
        assert np.isfinite(h.p_sleep[~missing]).all() and np.isin(h.sleep[~missing], [0.0, 1.0]).all()
    night = nights[0]
    p = result.model.predict_proba(night)
    np.testing.assert_array_equal(np.isnan(p), night.missing)
    np.testing.assert_array_equal(np.isnan(result.model.predict(night)), night.missing)


def test_held_out_metrics_are_scikit_learn_on_the_epochs_with_counts(result, nights) -> None:
    rows = result.night_metrics.set_index("night_id")
    for h in result.outer:
        bed = slice(*h.in_bed)
        keep = ~np.isnan(h.reference[bed]) & ~by_missing(nights, h.label)[bed]
        y, p, s = h.reference[bed][keep], h.sleep[bed][keep], h.p_sleep[bed][keep]
        row = rows.loc[h.night_id]
        assert row["n_epochs"] == keep.sum() and row["unscored_epochs"] == 60
        assert row["balanced_accuracy"] == pytest.approx(balanced_accuracy_score(y, p))  # scikit-learn
        assert row["auc"] == pytest.approx(roc_auc_score(y, s))


def by_missing(nights: list[Night], label: str | None) -> np.ndarray:
    return next(n for n in nights if n.label == label).missing


def test_labels_inside_gaps_never_reach_a_model_or_its_threshold(result, nights) -> None:
    flipped = train_personal([_flip_in_gaps(n) for n in nights], config=CONFIG)
    (trees_a, meta_a), (trees_b, meta_b) = model_to_bytes(result.model), model_to_bytes(flipped.model)
    assert trees_a == trees_b  # the same trees ...
    meta_a.pop("training_nights")  # (content hashes: the references differ)
    meta_b.pop("training_nights")
    assert meta_a == meta_b  # ... and the same threshold, hyperparameters and search record
    for a, b in zip(result.outer, flipped.outer, strict=True):
        np.testing.assert_array_equal(a.p_sleep, b.p_sleep)
        assert a.threshold == b.threshold
    # the flip did change the labels (so the comparison can fail)
    assert any((a.reference != b.reference)[~np.isnan(a.reference)].any()
               for a, b in zip(result.outer, flipped.outer, strict=True))


def test_pooled_predictions_and_offsets_skip_missing_epochs() -> None:
    sims = simulate_cohort(CohortSpec(n_participants=4, nights_min=2, nights_max=2, labelled_share=1.0,
                                      few_labels_participants=0, artefacts=False), seed=45)
    cohort: dict[str, list[Night]] = {}
    for k, s in enumerate(sims):
        first, _ = s.night.in_bed
        cohort.setdefault(s.night.participant_id, []).append(_gapped(s.night, slice(first + 100 + 7 * k,
                                                                                  first + 140 + 7 * k)))
    pooled = train_pooled(cohort, config=TrainingConfig(pooled_folds=2, max_rounds=60))
    for pid, held in pooled.held_out.items():
        for h, night in zip(held, sorted(cohort[pid], key=lambda n: n.start), strict=True):
            np.testing.assert_array_equal(np.isnan(h.p_sleep), night.missing)
            np.testing.assert_array_equal(np.isnan(h.margin), night.missing)
    pid = sorted(cohort)[0]
    got = participant_offset(pooled.model, cohort[pid], shrinkage=1.0, descriptors=pooled.descriptors[pid])
    margins, refs = [], []
    for night in cohort[pid]:
        bed = slice(*night.in_bed)
        keep = ~night.missing[bed]
        margin = pooled.model.decision_function(night, descriptors=pooled.descriptors[pid])
        margins.append(margin[bed][keep] + pooled.model.offset_baseline_)
        refs.append(night.reference_sleep()[bed][keep])
    assert got == pytest.approx(estimate_offset(np.concatenate(margins), np.concatenate(refs), shrinkage=1.0))
