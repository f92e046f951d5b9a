"""Trainings on a Dask cluster: a real LocalCluster of two worker processes, and an unreachable scheduler.

The Dask run is compared with a local run of the same job options (same seed): the held-out figures,
hyperparameters and threshold must agree. Both runs are sequential, seeded trainings of the same
nights, so they are expected to be identical; the comparison allows 1e-9 for float round-off only.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
from harness import cohort_bodies, free_port, wait_for, worker_env

pytestmark = pytest.mark.slow

#: absolute tolerance of held-out figures between a Dask and a local run (identical expected)
TOLERANCE = 1e-9


def _load_and_train(http, admin, study: str, *, seed: int) -> str:
    for body in cohort_bodies(n_participants=1, nights=3)["P-01"]:
        http.post(f"/v1/studies/{study}/participants/P-01/nights", json=body, headers=admin)
    r = http.post(f"/v1/studies/{study}/participants/P-01/training", json={"n_trials": 2, "seed": seed},
                  headers=admin)
    assert r.status_code in (200, 202), r.text
    return r.json()["job_id"]


def _version_info(factory, version: int) -> dict:
    from service.store import db, versions
    from service.store.registry import find_participant, find_study

    with db.session_scope(factory) as session:
        study = find_study(session, "s1")
        return versions.get_version(session, study=study, participant=find_participant(session, study, "P-01"),
                                    version=version).metadata.to_json()


def test_training_on_a_dask_cluster_matches_a_local_run(http, study, admin, settings, factory) -> None:
    from distributed import Client, LocalCluster, get_task_stream

    from service.jobs.executor import LocalExecutor
    from service.jobs.queue import get_job
    from service.jobs.workers import Worker
    from service.store.db import session_scope

    job_on_dask = _load_and_train(http, admin, study, seed=3)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster, Client(cluster) as client:
        client.run(lambda: __import__("xgboost"))  # warm-up: the first import takes seconds
        dask_settings = settings.model_copy(update={"executor": "dask", "dask_scheduler": cluster.scheduler_address})
        worker = Worker(dask_settings, factory=factory)
        with get_task_stream(client=client) as stream:
            assert worker.run_once().job_id == job_on_dask
        worker.executor.close()
        keys = {str(task["key"]) for task in stream.data}
    assert any(key.startswith(f"nightbank-{job_on_dask}-1") for key in keys), keys  # it ran on the cluster
    with session_scope(factory) as session:
        done = get_job(session, job_on_dask)
    assert done.state == "succeeded" and done.result["model_version"] == 1, done.error

    job_here = _load_and_train(http, admin, study, seed=3)
    assert Worker(settings, factory=factory, executor=LocalExecutor(settings, factory)).run_once().job_id == job_here
    on_dask, here = _version_info(factory, 1), _version_info(factory, 2)
    assert on_dask["hyperparameters"] == here["hyperparameters"]
    assert on_dask["threshold"] == pytest.approx(here["threshold"], abs=TOLERANCE)
    for name, figures in here["metrics"].items():
        if isinstance(figures, dict):
            np.testing.assert_allclose(on_dask["metrics"][name]["mean"], figures["mean"], atol=TOLERANCE, rtol=0)
    for a, b in zip(on_dask["night_metrics"], here["night_metrics"], strict=True):
        assert a.keys() == b.keys()
        for key, value in b.items():
            if isinstance(value, float):
                np.testing.assert_allclose(a[key], value, atol=TOLERANCE, rtol=0)
            else:
                assert a[key] == value


def test_cancelling_a_job_running_on_dask_stops_it_and_stores_nothing(http, study, admin, settings, factory) -> None:
    import threading

    from distributed import LocalCluster

    from service.jobs.queue import cancel_job, get_job
    from service.jobs.workers import Worker
    from service.store.db import session_scope

    for body in cohort_bodies(n_participants=1, nights=3)["P-01"]:
        http.post(f"/v1/studies/{study}/participants/P-01/nights", json=body, headers=admin)
    job_id = http.post(f"/v1/studies/{study}/participants/P-01/training", json={"n_trials": 60},
                       headers=admin).json()["job_id"]
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster:
        worker = Worker(settings.model_copy(update={"executor": "dask", "dask_scheduler": cluster.scheduler_address}),
                        factory=factory)
        runner = threading.Thread(target=worker.run_once)
        runner.start()
        try:
            wait_for(lambda: http.get(f"/v1/jobs/{job_id}", headers=admin).json()["progress"]["stage"]
                     == "running on the Dask cluster", timeout_s=60)
            with session_scope(factory, write=True) as session:
                cancel_job(session, job_id, actor="test")
            runner.join(30)
            assert not runner.is_alive()  # the worker stopped waiting at its next progress report
        finally:
            worker.stopping.set()
            runner.join(30)
            worker.executor.close()
    with session_scope(factory) as session:
        assert get_job(session, job_id).state == "cancelled"
    assert http.get(f"/v1/studies/{study}/participants/P-01/models", headers=admin).json() == []


def test_unreachable_scheduler_leaves_jobs_queued_with_a_readable_status(http, study, admin, settings) -> None:
    address = f"tcp://127.0.0.1:{free_port()}"  # nothing listens there
    job_id = _load_and_train(http, admin, study, seed=0)
    dask_settings = settings.model_copy(update={"executor": "dask", "dask_scheduler": address})
    proc = subprocess.Popen([sys.executable, "-m", "service.jobs.workers"], env=worker_env(dask_settings))
    try:
        job = wait_for(lambda: (j := http.get(f"/v1/jobs/{job_id}", headers=admin).json())["progress"]["stage"]
                       .startswith("waiting for Dask scheduler") and j, timeout_s=60)
        assert job["state"] == "queued" and address in job["progress"]["stage"] and job["attempts"] == 0
        assert proc.poll() is None  # the worker keeps running and will retry
    finally:
        proc.terminate()
        assert proc.wait(15) == 0


def test_dask_executor_without_a_scheduler_address_is_refused_with_the_fix(tmp_path) -> None:
    from typer.testing import CliRunner

    from service.cli import app

    out = CliRunner().invoke(app, ["worker", "--db", f"sqlite:///{tmp_path / 'w.db'}", "--executor", "dask"])
    assert out.exit_code == 2 and "--dask-scheduler" in out.output.replace("\n", " ")
    unknown = CliRunner().invoke(app, ["worker", "--db", f"sqlite:///{tmp_path / 'w.db'}", "--executor", "gpu"])
    assert unknown.exit_code == 2 and "executor" in unknown.output
