"""Personal trainings that start from the active pooled version, end to end over HTTP on SQLite."""

from __future__ import annotations

import numpy as np
import pytest
from harness import cohort_bodies, wait_for

pytestmark = pytest.mark.slow


def _finished(http, headers, job_id: str):
    def check():
        job = http.get(f"/v1/jobs/{job_id}", headers=headers).json()
        return job if job["state"] in ("succeeded", "failed", "cancelled") else None
    return check


def _run(http, headers, url: str, **body) -> dict:
    r = http.post(url, json=body or None, headers=headers)
    assert r.status_code == 202, r.text
    job = wait_for(_finished(http, headers, r.json()["job_id"]), timeout_s=600)
    assert job["state"] == "succeeded", job["error"]
    return job


def test_personal_training_starts_from_the_active_pooled_version(http, study, admin, start_worker, factory) -> None:
    from sqlalchemy import select

    from models import model_from_bytes
    from service.store import db

    for pid, nights in cohort_bodies(n_participants=3, nights=3, seed=4).items():
        for body in nights:
            r = http.post(f"/v1/studies/{study}/participants/{pid}/nights", json=body, headers=admin)
            assert r.status_code == 201, r.text
    start_worker()
    personal = f"/v1/studies/{study}/participants/P-01"
    # without an active pooled version the personal model trains from scratch, and says so
    _run(http, admin, f"{personal}/training", n_trials=2)
    first = http.get(f"{personal}/models", headers=admin).json()[0]["hyperparameters"]
    assert first["start"] == first["start_from"] == "scratch" and first["pooled_version"] is None
    assert "no active pooled version" in first["start_reason"]

    _run(http, admin, f"/v1/studies/{study}/pooled/training")
    with db.session_scope(factory) as session:
        pooled_pk, final_row = session.execute(select(db.ModelVersion.pk, db.ModelVersion).where(
            db.ModelVersion.kind == "pooled")).one()
        folds = {row.fold: (row.participants, model_from_bytes(row.booster, row.model_meta))
                 for row in session.scalars(select(db.PooledFoldModel).where(
                     db.PooledFoldModel.version_pk == pooled_pk))}
        final = model_from_bytes(final_row.booster, final_row.model_meta)
        hashes = set(session.scalars(select(db.Night.content_hash).join(
            db.Participant, db.Participant.pk == db.Night.participant_pk).where(
            db.Participant.participant_id == "P-01")))
    assert sorted(p for left_out, _ in folds.values() for p in left_out) == ["P-01", "P-02", "P-03"]
    fold_of_p1 = next(k for k, (left_out, _) in folds.items() if "P-01" in left_out)
    # the fold model that left P-01 out never trained on a night of theirs; the final model did (control)
    assert not hashes & set(folds[fold_of_p1][1].training_nights_)
    assert hashes <= set(final.training_nights_)

    _run(http, admin, f"{personal}/training", n_trials=2, seed=1)
    latest = http.get(f"{personal}/models", headers=admin).json()[0]
    hp = latest["hyperparameters"]
    assert latest["version"] == 2 and hp["start_from"] == "pooled" and hp["pooled_version"] == 1
    assert hp["held_out_from"] == f"fold {fold_of_p1}" and hp["start"] in ("pooled", "scratch")
    assert isinstance(hp["added_rounds"], int) and hp["added_rounds"] >= 0
    with db.session_scope(factory) as session:
        row = session.scalar(select(db.ModelVersion).where(db.ModelVersion.kind == "personal",
                                                           db.ModelVersion.version == 2))
        model = model_from_bytes(row.booster, row.model_meta)
        descriptors = row.info["descriptors"].get("P-01")
    assert model.info_["start"] == hp["start"] and model.info_["start_note"]["pooled_version"] == 1
    if model.info_["start"] == "pooled":  # the deployed model continues the final pooled model's trees
        assert model.n_rounds_ == final.n_rounds_ + hp["added_rounds"] and descriptors is not None
    # the personal version scores over HTTP (with the descriptors it was trained with)
    night = http.get(f"{personal}/nights", headers=admin).json()["data"][0]["night_id"]
    out = http.get(f"{personal}/nights/{night}/scoring", params={"method": "personal", "version": 2},
                   headers=admin)
    assert out.status_code == 200, out.text
    p = np.array(out.json()["p_sleep"], dtype=float)
    assert out.json()["model_version"] == 2 and np.all((p >= 0) & (p <= 1))
    # consent withdrawal of P-02 removes the pooled version trained on their nights and a personal
    # version that carries its trees; P-01's from-scratch version stays
    removed = http.delete(f"/v1/studies/{study}/participants/P-02", headers=admin).json()
    carries = model.info_["start"] == "pooled"
    assert removed["pooled_versions"] == 1 and removed["personal_versions"] == int(carries)
    left = [v["version"] for v in http.get(f"{personal}/models", headers=admin).json()]
    assert left == ([1] if carries else [2, 1])
