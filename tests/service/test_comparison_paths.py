"""The scoring body, the participant comparison and compare_study report the same comparison of a
night: the same epoch metrics and the same method - reference parameter differences."""

from __future__ import annotations

import json

import numpy as np
import pytest

from models import CohortSpec, TrainingConfig, compare_study, simulate_cohort

METHOD = "sadeh"
COMPARED = ("tst_min", "waso_min", "sol_min", "sleep_efficiency_pct")


def test_scoring_participant_comparison_and_compare_study_agree(factory) -> None:
    from service.results.reports import participant_comparison
    from service.results.scoring import score_night
    from service.store import db, registry

    sims = simulate_cohort(CohortSpec(n_participants=3, nights_min=2, nights_max=2, labelled_share=1.0,
                                      few_labels_participants=0, artefacts=True), seed=23)
    nights: dict[str, list] = {}
    for s in sims:
        nights.setdefault(s.night.participant_id, []).append(s.night)
    with db.session_scope(factory, write=True) as session:
        registry.create_study(session, study_id="s", name="S", actor="test")
        for night in (n for v in nights.values() for n in v):
            registry.ingest_night(session, study_id="s", night=night, source_format="json", actor="test")
    pid = min(nights)
    mine = [n for n in nights[pid] if n.has_reference]
    assert len(mine) >= 2

    bodies = {n.night_id: json.loads(score_night(factory, study_id="s", participant_id=pid, night_id=n.night_id,
                                                 method=METHOD))["agreement"] for n in mine}
    compared = participant_comparison(factory, study_id="s", participant_id=pid)
    study = compare_study(nights, config=TrainingConfig(n_trials=2, max_rounds=30, pooled_folds=3))

    rows = {r["night_id"]: r for r in compared["nights"] if r["method"] == METHOD}
    study_rows = study.epoch_metrics.query("level == 'night' and method == @METHOD").set_index("night_id")
    errors = study.parameter_errors.query("method == @METHOD").set_index("night_id")
    for night_id, agreement in bodies.items():
        for metric in ("n_epochs", "balanced_accuracy", "kappa", "auc", "specificity"):
            assert agreement["epochs"][metric] == pytest.approx(rows[night_id][metric])
            assert agreement["epochs"][metric] == pytest.approx(study_rows.loc[night_id, metric])
        for name in COMPARED:
            assert agreement["differences"][name] == pytest.approx(errors.loc[night_id, f"{name}_error"])
    # the participant comparison's Bland-Altman bias is the mean of those differences (Bland & Altman 1986)
    for name in COMPARED:
        row = next(r for r in compared["bland_altman"] if r["method"] == METHOD and r["parameter"] == name)
        assert row["n"] == len(mine)
        assert row["bias"] == pytest.approx(np.mean([a["differences"][name] for a in bodies.values()]))
