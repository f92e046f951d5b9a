"""Rules as published and calibrated leave-participants-out in the rule comparison."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import balanced_accuracy_score

from models.agreement.rule_calibration import (
    COUNT_SCALE_GRID,
    THRESHOLD_GRID,
    calibrate_rule,
    calibrated_method,
)
from models.agreement.rule_comparison import NightRecord, compare_rules_with_reference
from models.scoring.rules import METHOD_IDS, score_with_rule
from models.simulation.simulator import CohortSpec, simulate_cohort


@pytest.fixture(scope="module")
def records() -> list[NightRecord]:
    sims = simulate_cohort(CohortSpec(n_participants=4, nights_min=2, nights_max=2, labelled_share=1.0,
                                      few_labels_participants=0, artefacts=False), seed=12)
    return [NightRecord.from_night(s.night) for s in sims if s.night.reference is not None]


def _scaled(records: list[NightRecord], pid: str, factor: float, copies: int = 8) -> list[NightRecord]:
    """The participant's counts as a device with another count unit would give them, their nights repeated
    ``copies`` times so that they dominate any choice allowed to see them."""
    out = [r for r in records if r.participant_id != pid]
    for k in range(copies):
        out += [NightRecord(participant_id=pid, night_id=f"{r.night_id}-{k}", reference=r.reference,
                            counts=r.counts * factor, epoch_seconds=r.epoch_seconds, lights_off_idx=r.lights_off_idx,
                            lights_on_idx=r.lights_on_idx, label=r.label) for r in records if r.participant_id == pid]
    return out


@pytest.mark.parametrize("method", ["cole-kripke", "sadeh+webster", "count-threshold"])
def test_calibration_never_sees_the_held_out_participant(records, method) -> None:
    pid = records[0].participant_id
    others = [r for r in records if r.participant_id != pid]
    mine = calibrate_rule(records, method)
    # the value for the participant is the one chosen on the others alone
    assert mine.per_participant[pid] == calibrate_rule(others, method).overall
    # and does not move when the participant's own counts change by a large factor ...
    changed = calibrate_rule(_scaled(records, pid, 16.0), method)
    assert changed.per_participant[pid] == mine.per_participant[pid]
    # ... while a choice that may see them does (control: the same change is visible to a leaky calibration)
    assert changed.overall != mine.overall


def test_grid_figures_are_sklearn_balanced_accuracy(records) -> None:
    calibration = calibrate_rule(records, "count-threshold")
    assert calibration.parameter == "threshold" and calibration.published == 40.0
    assert calibration.grid == tuple(sorted(THRESHOLD_GRID)) and 40.0 in calibration.grid
    k = calibration.grid.index(40.0)
    per_night = []
    for r in records:
        bed = slice(r.lights_off_idx, r.lights_on_idx)
        ref, sleep = r.reference[bed], score_with_rule(r.counts, r.epoch_seconds, "count-threshold").sleep[bed]
        keep = np.isfinite(ref) & np.isfinite(sleep)
        per_night.append(balanced_accuracy_score(ref[keep], sleep[keep]))  # scikit-learn
    assert calibration.mean_balanced_accuracy[k] == pytest.approx(np.mean(per_night))
    assert 1.0 in COUNT_SCALE_GRID  # the published count scale is a candidate


def test_published_rows_are_unchanged_and_calibrated_rows_follow(records) -> None:
    today = compare_rules_with_reference(records, calibrate=False)
    both = compare_rules_with_reference(records)
    nightly = both.epoch_metrics[both.epoch_metrics.level == "night"]
    assert set(nightly["method"]) == {*today.epoch_metrics["method"], *(calibrated_method(m) for m in METHOD_IDS)}
    published = both.epoch_metrics[both.epoch_metrics["method"].isin(today.epoch_metrics["method"])]
    pd.testing.assert_frame_equal(published.reset_index(drop=True), today.epoch_metrics.reset_index(drop=True))
    pd.testing.assert_frame_equal(
        both.bland_altman[both.bland_altman["method"].isin(today.bland_altman["method"])].reset_index(drop=True),
        today.bland_altman.reset_index(drop=True))
    # a calibrated night is the rule scored with the value chosen without its participant
    calibration = calibrate_rule(records, "cole-kripke")
    r = records[-1]
    bed = slice(r.lights_off_idx, r.lights_on_idx)
    sleep = score_with_rule(r.counts, r.epoch_seconds, "cole-kripke",
                            count_scale=calibration.per_participant[r.participant_id]).sleep[bed]
    keep = np.isfinite(r.reference[bed]) & np.isfinite(sleep)
    row = nightly[(nightly.method == "cole-kripke:calibrated") & (nightly.night_id == r.night_id)].iloc[0]
    assert row["balanced_accuracy"] == pytest.approx(balanced_accuracy_score(r.reference[bed][keep], sleep[keep]))


def test_one_participant_gives_no_calibrated_rows(records) -> None:
    one = [r for r in records if r.participant_id == records[0].participant_id]
    methods = set(compare_rules_with_reference(one).epoch_metrics["method"])
    assert not any(m.endswith(":calibrated") for m in methods)
