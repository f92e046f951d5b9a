"""Rules calibrated to the study's counts, leave-participants-out, beside the published ones over HTTP."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from harness import cohort_bodies

pytestmark = pytest.mark.slow


def _load(http, headers, study: str, bodies: dict[str, list[dict]]) -> None:
    for pid, nights in bodies.items():
        for body in nights:
            r = http.post(f"/v1/studies/{study}/participants/{pid}/nights", json=body, headers=headers)
            assert r.status_code == 201, r.text


def test_study_comparison_lists_calibrated_rules_with_their_scale_and_figures(http, study, admin) -> None:
    from sklearn.metrics import balanced_accuracy_score

    from models import (
        COMPARED_RULES,
        NightRecord,
        calibrate_rules,
        night_from_json,
        participant_groups,
        score_with_rule,
    )

    bodies = cohort_bodies(n_participants=3, nights=2, seed=4)
    _load(http, admin, study, bodies)
    out = http.get(f"/v1/studies/{study}/comparison", headers=admin)
    assert out.status_code == 200, out.text
    out = out.json()
    methods = {r["method"] for r in out["summary"]}
    assert {"cole-kripke", "cole-kripke:calibrated", "sadeh:calibrated", "count-threshold:calibrated"} <= methods
    entry = next(c for c in out["rule_calibrations"] if c["method"] == "cole-kripke:calibrated")
    assert entry["parameter"] == "count_scale" and entry["rule"] == "cole-kripke" and entry["published"] == 1.0
    # the same calibration made by the models package on the same nights
    nights = {pid: [dataclasses.replace(night_from_json(b), participant_id=pid) for b in rows]
              for pid, rows in bodies.items()}
    records = [NightRecord.from_night(n) for rows in nights.values() for n in rows]
    expected = calibrate_rules(records, COMPARED_RULES, groups=participant_groups(nights))["cole-kripke"]
    assert entry["per_participant"] == pytest.approx(dict(expected.per_participant))
    assert entry["overall"] == pytest.approx(expected.overall)
    # each night's figure is the rule scored at the scale chosen without its participant;
    # outside reference: scikit-learn's balanced_accuracy_score over the in-bed epochs with a reference stage
    rows = {(r["participant_id"], r["night_id"]): r for r in out["nights"] if r["method"] == "cole-kripke:calibrated"}
    per_night = []
    for pid, own in nights.items():
        for night in own:
            first, stop = night.in_bed
            scored = score_with_rule(night.counts, night.epoch_seconds, "cole-kripke",
                                     count_scale=entry["per_participant"][pid])
            ref, calls = night.reference_sleep()[first:stop], scored.sleep[first:stop]
            ok = np.isfinite(ref) & np.isfinite(calls)
            value = balanced_accuracy_score(ref[ok].astype(int), calls[ok].astype(int))
            assert rows[(pid, night.night_id)]["balanced_accuracy"] == pytest.approx(value, abs=1e-9)
            per_night.append(value)
    summary = next(r for r in out["summary"] if r["method"] == "cole-kripke:calibrated")
    assert summary["balanced_accuracy"]["mean"] == pytest.approx(np.mean(per_night), abs=1e-9)
    # a participant's comparison uses the scale chosen on the other participants' nights
    mine = http.get(f"/v1/studies/{study}/participants/P-02/comparison", headers=admin).json()
    (own_entry,) = [c for c in mine["rule_calibrations"] if c["method"] == "cole-kripke:calibrated"]
    assert own_entry["per_participant"] == {"P-02": entry["per_participant"]["P-02"]}
    assert "cole-kripke:calibrated" in {r["method"] for r in mine["summary"]}


def test_model_minus_best_rule_considers_the_calibrated_rules_and_says_which(http, study, admin,
                                                                           start_worker) -> None:
    from harness import wait_for

    _load(http, admin, study, cohort_bodies(n_participants=3, nights=3))
    job_id = http.post(f"/v1/studies/{study}/pooled/training", headers=admin).json()["job_id"]
    start_worker()

    def finished():
        job = http.get(f"/v1/jobs/{job_id}", headers=admin).json()
        return job if job["state"] in ("succeeded", "failed", "cancelled") else None
    assert wait_for(finished)["state"] == "succeeded"
    out = http.get(f"/v1/studies/{study}/comparison", headers=admin).json()
    # the best rule is the one with the highest participant-level group mean of balanced accuracy among the
    # rules as published and calibrated (common practice: compare a model with the strongest baseline)
    group = [r for r in out["participant_epochs"]["group"]
             if r["metric"] == "balanced_accuracy" and r["method"] in {"cole-kripke", "sadeh", "count-threshold",
                                                                      "cole-kripke:calibrated", "sadeh:calibrated",
                                                                      "count-threshold:calibrated"}]
    best = max(group, key=lambda r: r["mean"])["method"]
    rows = [r for r in out["paired_differences"] if r["kind"] == "model - best rule"]
    assert rows and {r["best_rule"] for r in rows} == {best}
    assert {r["best_rule_kind"] for r in rows} == {"calibrated" if best.endswith(":calibrated") else "published"}
    assert all(r["label_b"] == best for r in rows)
