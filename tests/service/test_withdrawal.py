"""Withdrawing a participant while its training runs: the job ends as cancelled, readable, nothing stored.

The training runs in a real worker process; the participant is deleted over HTTP while it trains.
"""

from __future__ import annotations

import time

import pytest
from harness import bearer, cohort_bodies, wait_for

pytestmark = pytest.mark.slow


def test_withdrawal_during_training_cancels_the_job_and_keeps_it_readable(http, study, admin, make_token,
                                                                          start_worker, factory) -> None:
    from sqlalchemy import func, select

    from service.store import db

    analyst = bearer(make_token("analyst", study_id=study))
    for pid, nights in cohort_bodies(n_participants=2, nights=3).items():
        for body in nights:
            assert http.post(f"/v1/studies/{study}/participants/{pid}/nights", json=body,
                             headers=admin).status_code == 201
    job_id = http.post(f"/v1/studies/{study}/participants/P-01/training", json={"n_trials": 20},
                       headers=admin).json()["job_id"]
    worker = start_worker()

    def job() -> dict:
        r = http.get(f"/v1/jobs/{job_id}", headers=analyst)
        assert r.status_code == 200, r.text
        return r.json()

    wait_for(lambda: (j := job())["state"] == "running" and j["progress"]["done"] > 0)
    assert http.delete(f"/v1/studies/{study}/participants/P-01", headers=admin).status_code == 200
    ended = job()
    assert ended["state"] == "cancelled" and ended["reason"] == "participant_withdrawn", ended
    assert ended["error"].startswith("participant_withdrawn") and ended["finished_at"] is not None
    listed = http.get(f"/v1/studies/{study}/jobs", headers=analyst).json()["data"]
    assert [(j["job_id"], j["reason"]) for j in listed] == [(job_id, "participant_withdrawn")]
    time.sleep(3)  # longer than the lease (3 s): the worker has noticed and stopped the training
    assert job()["state"] == "cancelled" and worker.poll() is None
    with db.session_scope(factory) as session:
        assert session.scalar(select(func.count()).select_from(db.ModelVersion)) == 0
    # the same worker goes on with the next participant's training
    other = http.post(f"/v1/studies/{study}/participants/P-02/training", json={"n_trials": 2},
                      headers=admin).json()["job_id"]
    done = wait_for(lambda: (j := http.get(f"/v1/jobs/{other}", headers=analyst).json())["state"] in
                    ("succeeded", "failed") and j, timeout_s=180)
    assert done["state"] == "succeeded", done["error"]
