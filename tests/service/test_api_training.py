"""Training jobs end to end: real worker processes, the database queue, versions and activation."""

from __future__ import annotations

import os
import signal

import numpy as np
import pytest
from harness import bearer, cohort_bodies, wait_for

pytestmark = pytest.mark.slow


def _load(http, headers, study: str, bodies: dict[str, list[dict]]) -> dict[str, list[str]]:
    ids: dict[str, list[str]] = {}
    for pid, nights in bodies.items():
        for body in nights:
            r = http.post(f"/v1/studies/{study}/participants/{pid}/nights", json=body, headers=headers)
            assert r.status_code == 201, r.text
            ids.setdefault(pid, []).append(r.json()["night_id"])
    return ids


def _train(http, headers, study: str, pid: str, **body):
    return http.post(f"/v1/studies/{study}/participants/{pid}/training", json=body or None, headers=headers)


def _job(http, headers, job_id: str) -> dict:
    return http.get(f"/v1/jobs/{job_id}", headers=headers).json()


def _finished(http, headers, job_id: str):
    def check():
        job = _job(http, headers, job_id)
        return job if job["state"] in ("succeeded", "failed", "cancelled") else None
    return check


def test_personal_training_lifecycle_with_a_worker_process(http, study, admin, start_worker) -> None:
    ids = _load(http, admin, study, cohort_bodies(n_participants=1, nights=3))
    r = _train(http, admin, study, "P-01", n_trials=2)
    assert r.status_code == 202 and r.json()["state"] == "queued" and r.json()["created"] is True
    job_id = r.json()["job_id"]
    again = _train(http, admin, study, "P-01")
    assert again.status_code == 200 and again.json()["job_id"] == job_id and again.json()["created"] is False
    assert _job(http, admin, job_id)["state"] == "queued"
    start_worker()
    job = wait_for(_finished(http, admin, job_id))
    assert job["state"] == "succeeded", job["error"]
    assert job["progress"]["done"] == job["progress"]["total"] > 1
    assert job["result"]["model_version"] == 1 and job["result"]["active"] is True
    versions = http.get(f"/v1/studies/{study}/participants/P-01/models", headers=admin).json()
    assert [(v["version"], v["active"], v["status"]) for v in versions] == [(1, True, "active")]
    v1 = versions[0]
    assert v1["n_training_nights"] == 3 and 0 < v1["threshold"] < 1 and v1["feature_set_version"]
    assert {n["night_id"] for n in v1["training_nights"]} == set(ids["P-01"])
    assert 0.5 < v1["metrics"]["balanced_accuracy"]["mean"] <= 1 and "xgboost" in v1["library_versions"]
    listing = http.get(f"/v1/studies/{study}/participants", headers=admin).json()["data"][0]
    assert listing["active_personal_version"] == 1 and listing["retrain_would_add_nights"] is False
    out = http.get(f"/v1/studies/{study}/participants/P-01/nights/{ids['P-01'][0]}/scoring",
                   params={"method": "auto"}, headers=admin).json()
    assert out["method"] == "personal" and out["model_version"] == 1
    assert len(out["p_sleep"]) == len(out["sleep"]) and all(0 <= p <= 1 for p in out["p_sleep"])
    assert out["agreement"]["epochs"]["n_epochs"] > 0
    # a new labelled night never retrains silently; the listing says a retrain would use it
    extra = cohort_bodies(n_participants=1, nights=4, seed=2)["P-01"][3]
    assert http.post(f"/v1/studies/{study}/participants/P-01/nights", json=extra, headers=admin).status_code == 201
    listing = http.get(f"/v1/studies/{study}/participants", headers=admin).json()["data"][0]
    assert listing["retrain_would_add_nights"] is True and listing["untrained_labelled_nights"] == 1
    assert len(http.get(f"/v1/studies/{study}/participants/P-01/models", headers=admin).json()) == 1


def test_activation_and_rollback_change_what_auto_scores_with(http, study, admin, make_token, start_worker) -> None:
    ids = _load(http, admin, study, cohort_bodies(n_participants=1, nights=3))
    start_worker()
    for seed in (0, 1):
        job_id = _train(http, admin, study, "P-01", n_trials=2, seed=seed).json()["job_id"]
        assert wait_for(_finished(http, admin, job_id))["state"] == "succeeded"
    base = f"/v1/studies/{study}/participants/P-01"
    versions = {v["version"]: v for v in http.get(f"{base}/models", headers=admin).json()}
    assert set(versions) == {1, 2} and sum(v["active"] for v in versions.values()) == 1
    analyst = bearer(make_token("analyst", study))
    assert http.post(f"{base}/models/1/activate", headers=analyst).status_code == 403
    for version in (1, 2, 1):
        r = http.post(f"{base}/models/{version}/activate", headers=admin)
        assert r.status_code == 200 and r.json()["active"] is True
        active = [v["version"] for v in http.get(f"{base}/models", headers=admin).json() if v["active"]]
        assert active == [version]
        out = http.get(f"{base}/nights/{ids['P-01'][1]}/scoring", params={"method": "personal"}, headers=admin)
        assert out.json()["model_version"] == version
    pinned = http.get(f"{base}/nights/{ids['P-01'][1]}/scoring", params={"method": "personal", "version": 2},
                      headers=admin).json()
    assert pinned["model_version"] == 2
    assert http.post(f"{base}/models/9/activate", headers=admin).status_code == 404


def test_cancel_queued_and_running_jobs(http, study, admin, start_worker) -> None:
    _load(http, admin, study, cohort_bodies(n_participants=1, nights=3))
    queued = _train(http, admin, study, "P-01", n_trials=2).json()["job_id"]
    r = http.post(f"/v1/jobs/{queued}/cancel", headers=admin)
    assert r.status_code == 200 and r.json()["state"] == "cancelled"
    running = _train(http, admin, study, "P-01", n_trials=500).json()
    assert running["created"] is True and running["job_id"] != queued
    start_worker()
    # cancel while it trains (a held-out or the final model's search, whichever runs first), past its loading
    # and night-feature stages (their own progress counts)
    wait_for(lambda: (j := _job(http, admin, running["job_id"]))["progress"]["done"] > 0
             and any(s in j["progress"]["stage"] for s in ("held out", "final model")))
    assert http.post(f"/v1/jobs/{running['job_id']}/cancel", headers=admin).status_code == 200
    job = wait_for(_finished(http, admin, running["job_id"]), timeout_s=60)
    assert job["state"] == "cancelled" and job["progress"]["done"] < job["progress"]["total"]
    assert http.get(f"/v1/studies/{study}/participants/P-01/models", headers=admin).json() == []


def _registry_intact(factory) -> list[tuple[int, bool, str | None]]:
    """Every stored version has its model bytes and loads; returns (version, active, job_id) of each."""
    from sqlalchemy import select

    from service.store import db, versions

    out = []
    with db.session_scope(factory) as session:
        for row in session.scalars(select(db.ModelVersion).order_by(db.ModelVersion.pk)):
            assert row.booster and len(row.booster) > 0 and row.info["selection"]["value"] is not None
            info = versions.get_version(session, study=session.get(db.Study, row.study_pk),
                                        participant=session.get(db.Participant, row.participant_pk),
                                        version=row.version)
            assert versions.load_model(session, info).threshold_ == info.metadata.threshold
            out.append((row.version, row.is_active, row.job_id))
    return out


def test_job_of_a_dead_worker_is_taken_over_after_the_lease(http, study, admin, start_worker, factory) -> None:
    ids = _load(http, admin, study, cohort_bodies(n_participants=1, nights=3))
    job_id = _train(http, admin, study, "P-01", n_trials=10).json()["job_id"]
    models_url = f"/v1/studies/{study}/participants/P-01/models"
    first = start_worker()
    # the job first gathers the night features (a stage of its own), then trains: kill it while it trains
    wait_for(lambda: (j := _job(http, admin, job_id))["state"] == "running" and j["progress"]["done"] > 0
             and "night features" not in j["progress"]["stage"])
    os.kill(first.pid, signal.SIGKILL)  # mid-training: no chance to give the job back
    assert first.wait() == -signal.SIGKILL
    stuck = _job(http, admin, job_id)
    assert stuck["state"] == "running" and stuck["attempts"] == 1  # nobody knows yet
    assert stuck["progress"]["done"] < stuck["progress"]["total"]
    assert http.get(models_url, headers=admin).json() == [] and _registry_intact(factory) == []
    start_worker()
    seen: list[list[tuple[int, bool, str | None]]] = []

    def finished():
        seen.append(_registry_intact(factory))  # checked on every poll while the job runs again
        return _finished(http, admin, job_id)()

    job = wait_for(finished, timeout_s=180)
    assert job["state"] == "succeeded" and job["attempts"] == 2
    assert all(s in ([], [(1, True, job_id)]) for s in seen)
    assert _registry_intact(factory) == [(1, True, job_id)]
    out = http.get(f"/v1/studies/{study}/participants/P-01/nights/{ids['P-01'][0]}/scoring",
                   params={"method": "personal"}, headers=admin).json()
    assert out["model_version"] == 1 and len(out["p_sleep"]) == len(out["sleep"])


def test_a_taken_over_claim_stores_nothing_and_a_stored_version_is_not_trained_twice(http, study, admin, settings,
                                                                                     factory) -> None:
    import time

    from service.errors import Conflict
    from service.jobs.queue import claim_job
    from service.jobs.training import run_training_job

    def claim(worker_id: str):
        return claim_job(factory, worker_id=worker_id, lease_s=1.0, max_attempts=3)

    _load(http, admin, study, cohort_bodies(n_participants=1, nights=3))
    job_id = _train(http, admin, study, "P-01", n_trials=2).json()["job_id"]
    stalled = claim("stalled")
    time.sleep(1.2)  # its lease runs out while it is still training
    taker = claim("taker")
    assert (stalled.attempts, taker.attempts) == (1, 2) and stalled.job_id == taker.job_id == job_id
    with pytest.raises(Conflict) as lost:
        run_training_job(stalled, factory=factory, settings=settings, progress=lambda *_: None)
    assert lost.value.code == "lease_lost" and _registry_intact(factory) == []
    stored = run_training_job(taker, factory=factory, settings=settings, progress=lambda *_: None)
    assert stored["model_version"] == 1 and _registry_intact(factory) == [(1, True, job_id)]
    time.sleep(1.2)  # the taker died after storing its version, before recording the outcome
    last = claim("last")
    assert last.attempts == 3
    steps: list[tuple] = []
    assert run_training_job(last, factory=factory, settings=settings, progress=lambda *a: steps.append(a)) == stored
    assert steps == [] and _registry_intact(factory) == [(1, True, job_id)]  # no second training or version


def test_failed_job_records_a_readable_error(http, study, admin, start_worker) -> None:
    # one participant: the pooled model needs labelled nights of three, so the job fails in the worker
    _load(http, admin, study, cohort_bodies(n_participants=1, nights=3))
    job_id = http.post(f"/v1/studies/{study}/pooled/training", json={"n_trials": 2}, headers=admin).json()["job_id"]
    start_worker()
    job = wait_for(_finished(http, admin, job_id))
    assert job["state"] == "failed" and job["error"].startswith("too_few_participants:")
    assert "Traceback" not in job["error"]


def test_training_needs_enough_labelled_nights_and_the_analyst_role(http, study, admin, make_token) -> None:
    _load(http, admin, study, {"P-01": cohort_bodies(n_participants=1, nights=3)["P-01"][:2]})
    r = _train(http, admin, study, "P-01")
    assert r.status_code == 422 and r.json()["code"] == "too_few_labelled_nights"
    assert _train(http, bearer(make_token("ingest", study)), study, "P-01").status_code == 403
    assert _train(http, admin, study, "nobody").status_code == 404
    assert _train(http, admin, study, "P-01", n_trials=0).status_code == 422


def test_consent_withdrawal_removes_trained_models_and_their_scorings(http, server, study, admin, start_worker,
                                                                     factory) -> None:
    from sqlalchemy import func, select

    from service.store import db

    ids = _load(http, admin, study, cohort_bodies(n_participants=1, nights=3))
    start_worker()
    job_id = _train(http, admin, study, "P-01", n_trials=2).json()["job_id"]
    assert wait_for(_finished(http, admin, job_id))["state"] == "succeeded"
    http.get(f"/v1/studies/{study}/participants/P-01/nights/{ids['P-01'][0]}/scoring",
             params={"method": "personal"}, headers=admin)
    server.app.state.cache_writer.flush()  # scorings are stored in the background
    removed = http.delete(f"/v1/studies/{study}/participants/P-01", headers=admin).json()
    assert removed == {"nights": 3, "scorings": 1, "personal_versions": 1, "pooled_versions": 0}
    with db.session_scope(factory) as session:
        for table in (db.Night, db.Scoring, db.ModelVersion, db.Job, db.Participant):
            assert session.scalar(select(func.count()).select_from(table)) == 0, table


def test_pooled_training_then_scoring_with_offset_and_auto(http, study, admin, make_token, start_worker) -> None:
    ids = _load(http, admin, study, cohort_bodies(n_participants=3, nights=3))
    r = http.post(f"/v1/studies/{study}/pooled/training", headers=admin)
    assert r.status_code == 202
    start_worker()
    job = wait_for(_finished(http, admin, r.json()["job_id"]))
    assert job["state"] == "succeeded", job["error"]
    versions = http.get(f"/v1/studies/{study}/pooled/models", headers=admin).json()
    assert [(v["version"], v["kind"], v["active"]) for v in versions] == [(1, "pooled", True)]
    assert versions[0]["n_training_nights"] == 9
    assert versions[0]["offset_rule"].startswith("cross-fitted")  # how trained-on participants' offsets were made
    assert http.post(f"/v1/studies/{study}/pooled/models/1/activate", headers=admin).json()["active"] is True
    assert http.post(f"/v1/studies/{study}/pooled/models/1/activate",
                     headers=bearer(make_token("analyst", study))).status_code == 403
    other_study = bearer(make_token("admin", "elsewhere"))
    assert http.get(f"/v1/jobs/{r.json()['job_id']}", headers=other_study).status_code == 404
    assert http.post(f"/v1/jobs/{r.json()['job_id']}/cancel", headers=other_study).status_code == 404
    night = ids["P-02"][0]
    url = f"/v1/studies/{study}/participants/P-02/nights/{night}/scoring"
    plain = http.get(url, params={"method": "pooled"}, headers=admin).json()
    shifted = http.get(url, params={"method": "pooled+offset"}, headers=admin).json()
    auto = http.get(url, params={"method": "auto"}, headers=admin).json()
    assert plain["model_version"] == shifted["model_version"] == 1 and plain["offset"] == 0.0
    assert auto["method"] == "pooled+offset" and auto["p_sleep"] == shifted["p_sleep"]
    assert shifted["offset"] != 0.0 and shifted["p_sleep"] != plain["p_sleep"]
    # p = calibrate(expit(margin + offset)): the offset moves every epoch's raw log-odds by the same
    # amount and the calibration is non-decreasing (isotonic regression, scikit-learn's
    # IsotonicRegression(increasing=True)), so every epoch moves the offset's way or stays
    a, b = np.array(plain["p_sleep"], dtype=float), np.array(shifted["p_sleep"], dtype=float)
    scored = ~np.isnan(a) & ~np.isnan(b)
    moved = np.sign(shifted["offset"]) * (b[scored] - a[scored])
    assert np.all(moved >= -1e-12) and np.any(moved > 0)


def test_training_jobs_train_on_the_stored_night_features(http, study, admin, settings, factory) -> None:
    from sqlalchemy import delete, select

    from models import FeatureMatrix, TrainingConfig, night_features
    from service.jobs.queue import JobState, claim_job, finish_job
    from service.jobs.training import run_training_job
    from service.store import db
    from service.store.codec import night_from_row
    from service.store.features import features_row, load_features_of

    config = TrainingConfig().features
    _load(http, admin, study, cohort_bodies(n_participants=1, nights=3))

    def train() -> list[dict]:
        job_id = _train(http, admin, study, "P-01", n_trials=2, seed=0).json()["job_id"]
        job = claim_job(factory, worker_id="here", lease_s=60, max_attempts=3)
        assert job.job_id == job_id
        result = run_training_job(job, factory=factory, settings=settings, progress=lambda *_: None)
        assert finish_job(factory, job_id, worker_id="here", state=JobState.succeeded, result=result)
        with db.session_scope(factory) as session:
            return session.scalar(select(db.ModelVersion.info).where(
                db.ModelVersion.version == result["model_version"]))[
                "night_metrics"]

    def stored() -> dict[int, FeatureMatrix]:
        with db.session_scope(factory) as session:
            return load_features_of(session, night_pks=session.scalars(select(db.Night.pk)), config=config)

    assert stored() == {}
    first = train()  # computes the features and stores them
    with db.session_scope(factory) as session:
        nights = {row.pk: night_from_row(row, participant_id="P-01") for row in session.scalars(select(db.Night))}
    kept = stored()
    assert set(kept) == set(nights)
    for pk, features in kept.items():  # reference: the models' own feature computation, run directly
        np.testing.assert_array_equal(features.values, night_features(nights[pk], config).values)
    assert train() == first  # the stored float32 matrices give the same model as computed ones

    # store recognisably different matrices (epochs in reverse order): the next training must use them
    with db.session_scope(factory, write=True) as session:
        session.execute(delete(db.NightFeatures))
        for pk, f in kept.items():
            session.add(features_row(night_pk=pk, config=config,
                                     features=FeatureMatrix(f.values[::-1], f.names, f.version)))
    assert train() != first
    for pk, features in stored().items():  # not recomputed or overwritten either
        np.testing.assert_array_equal(features.values, kept[pk].values[::-1])
