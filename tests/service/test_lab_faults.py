"""The whole lab as processes, under faults: PostgreSQL, a Dask cluster, the API and two training workers.

Every part runs as its own process with its own command-line entry point: a throwaway database on
the local PostgreSQL server, ``dask scheduler`` and two ``dask worker`` processes, ``nightbank serve
--job-workers 0`` and two ``nightbank worker --executor dask``. A small simulated study is posted and
its trainings queued; then, in turn, a Dask worker, a nightbank worker and the API process are
killed with SIGKILL mid-work (each is started again). Afterwards every job has succeeded, no job
stored a model version twice, and every night the API acknowledged is stored.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

import httpx
import pytest
from harness import bearer, cohort_bodies, free_port, wait_for
from pg_support import throwaway_database

pytestmark = [pytest.mark.slow, pytest.mark.postgres]

ROOT = Path(__file__).resolve().parents[2]
BIN = Path(sys.executable).parent


class Lab:
    """The processes of the lab, by role, started and restarted with the same options."""

    def __init__(self, db_url: str, logs: Path) -> None:
        self.db_url, self.logs = db_url, logs
        self.scheduler = f"tcp://127.0.0.1:{free_port()}"
        self.api_port = free_port()
        self.url = f"http://127.0.0.1:{self.api_port}"
        self.env = {**os.environ, "NIGHTBANK_DB": db_url, "NIGHTBANK_LEASE_S": "4", "NIGHTBANK_HEARTBEAT_S": "0.5",
                    "NIGHTBANK_POLL_S": "0.3", "NIGHTBANK_LOG_LEVEL": "INFO", "NIGHTBANK_EXECUTOR": "dask",
                    "NIGHTBANK_DASK_SCHEDULER": self.scheduler, "NIGHTBANK_PORT": str(self.api_port)}
        self.procs: list[subprocess.Popen[bytes]] = []

    def start(self, name: str, args: list[str]) -> subprocess.Popen[bytes]:
        with (self.logs / f"{name}.log").open("ab") as out:
            proc = subprocess.Popen(args, env=self.env, cwd=ROOT, stdout=out, stderr=subprocess.STDOUT)
        self.procs.append(proc)
        return proc

    def dask_worker(self, name: str) -> subprocess.Popen[bytes]:
        return self.start(name, [str(BIN / "dask"), "worker", self.scheduler, "--nthreads", "1", "--no-nanny",
                                 "--no-dashboard", "--name", name])

    def nightbank_worker(self, name: str) -> subprocess.Popen[bytes]:
        return self.start(name, [str(BIN / "nightbank"), "worker", "--executor", "dask", "--dask-scheduler",
                                 self.scheduler])

    def api(self) -> subprocess.Popen[bytes]:
        proc = self.start("api", [str(BIN / "nightbank"), "serve", "--no-migrate", "--job-workers", "0",
                                  "--port", str(self.api_port)])

        def up() -> bool:
            assert proc.poll() is None, (self.logs / "api.log").read_text()
            try:
                return httpx.get(f"{self.url}/healthz", timeout=2).status_code in (200, 503)
            except httpx.TransportError:
                return False

        wait_for(up, timeout_s=60)
        return proc

    def stop(self) -> None:
        for proc in self.procs:
            if proc.poll() is None:
                proc.kill()
        for proc in self.procs:
            proc.wait(20)


def _dask_workers_connected(scheduler: str, n: int) -> bool:
    from distributed import Client

    with Client(scheduler, timeout=10, set_as_default=False) as client:
        return len(client.scheduler_info()["workers"]) >= n


def _kill(proc: subprocess.Popen[bytes]) -> None:
    proc.send_signal(signal.SIGKILL)
    assert proc.wait(20) == -signal.SIGKILL


def test_the_lab_survives_killed_dask_workers_training_workers_and_api(tmp_path: Path) -> None:
    from sqlalchemy import select

    from service.config import Settings
    from service.store import db
    from service.store.tokens import create_token

    with throwaway_database() as db_url:
        done = subprocess.run([str(BIN / "nightbank"), "migrate", "--db", db_url], cwd=ROOT, capture_output=True,
                              text=True, timeout=120)
        assert done.returncode == 0, done.stderr
        engine = db.make_engine(Settings(db=db_url))
        factory = db.make_session_factory(engine)
        with db.session_scope(factory, write=True) as session:
            headers = bearer(create_token(session, role="admin", actor="test")[1])
        lab = Lab(db_url, tmp_path)
        try:
            _run(lab, headers)
            with db.session_scope(factory) as session:
                version_jobs = list(session.scalars(select(db.ModelVersion.job_id)))
                stored_nights = set(session.scalars(select(db.Night.night_id)))
            _check(lab, headers, version_jobs, stored_nights)
        finally:
            lab.stop()
            engine.dispose()


STATE: dict[str, Any] = {}


def _run(lab: Lab, headers: dict[str, str]) -> None:
    lab.start("scheduler", [str(BIN / "dask"), "scheduler", "--host", "127.0.0.1", "--port",
                            lab.scheduler.rsplit(":", 1)[1], "--no-dashboard"])
    dask = {name: lab.dask_worker(name) for name in ("dask-a", "dask-b")}
    api = lab.api()
    wait_for(lambda: _dask_workers_connected(lab.scheduler, 2), timeout_s=90, poll_s=1)
    workers = {name: lab.nightbank_worker(name) for name in ("nb-1", "nb-2")}
    acknowledged: list[str] = []
    client = httpx.Client(base_url=lab.url, headers=headers, timeout=30)
    STATE.update(acknowledged=acknowledged, jobs=[])
    assert client.post("/v1/studies", json={"study_id": "lab", "name": "Lab (simulated)"}).status_code == 201
    cohort = cohort_bodies(n_participants=4, nights=3, seed=5)
    for pid, nights in cohort.items():
        for body in nights:
            r = client.post(f"/v1/studies/lab/participants/{pid}/nights", json=body)
            assert r.status_code == 201, r.text
            acknowledged.append(r.json()["night_id"])
    jobs: list[str] = STATE["jobs"]

    def train(path: str, n_trials: int) -> str:
        r = client.post(path, json={"n_trials": n_trials, "seed": 3})
        assert r.status_code == 202, r.text
        jobs.append(r.json()["job_id"])
        return jobs[-1]

    for pid in cohort:
        train(f"/v1/studies/lab/participants/{pid}/training", 8)

    def running() -> list[dict[str, Any]]:
        return [j for j in client.get("/v1/studies/lab/jobs", params={"state": "running"}).json()["data"]
                if j["lease"] == "held" and "Dask" in j["progress"]["stage"]]

    # 1. a Dask worker dies while trainings run on the cluster: the scheduler runs its task elsewhere
    wait_for(running, timeout_s=120)
    _kill(dask["dask-a"])
    dask["dask-a"] = lab.dask_worker("dask-a2")
    # 2. a training worker dies holding a job: its lease runs out and the other worker takes the job
    victim = wait_for(running, timeout_s=120)[0]
    pid = int(victim["worker"].split(":")[1])
    name = next(n for n, p in workers.items() if p.pid == pid)
    _kill(workers[name])
    workers[name] = lab.nightbank_worker(f"{name}-again")
    # 3. the API dies while nights are being posted and the pooled training runs
    train("/v1/studies/lab/pooled/training", 6)
    extra = cohort_bodies(n_participants=1, nights=6, seed=11)["P-01"]
    stop = threading.Event()

    def upload() -> None:
        with httpx.Client(base_url=lab.url, headers=headers, timeout=10) as uploader:
            for body in extra:
                if stop.is_set():
                    return
                try:
                    r = uploader.post("/v1/studies/lab/participants/P-05/nights", json=body)
                except httpx.TransportError:
                    return  # the API is gone: this night was never acknowledged
                if r.status_code in (200, 201):
                    acknowledged.append(r.json()["night_id"])

    thread = threading.Thread(target=upload)
    thread.start()
    wait_for(lambda: len(acknowledged) > len(cohort) * 3 or not thread.is_alive(), timeout_s=60, poll_s=0.05)
    _kill(api)
    stop.set()
    thread.join(30)
    client.close()
    lab.api()
    STATE["client"] = httpx.Client(base_url=lab.url, headers=headers, timeout=30)
    finished: Callable[[], Any] = lambda: all(  # noqa: E731
        _job(STATE["client"], j)["state"] in ("succeeded", "failed", "cancelled") for j in jobs)
    wait_for(finished, timeout_s=240, poll_s=1)


def _job(client: httpx.Client, job_id: str) -> dict[str, Any]:
    return client.get(f"/v1/jobs/{job_id}").json()


def _check(lab: Lab, headers: dict[str, str], version_jobs: list[str | None], stored_nights: set[str]) -> None:
    client: httpx.Client = STATE["client"]
    jobs = [_job(client, j) for j in STATE["jobs"]]
    assert [(j["state"], j["error"]) for j in jobs] == [("succeeded", None)] * len(jobs)
    assert any(j["attempts"] >= 2 for j in jobs)  # the killed worker's job was taken over
    assert len(version_jobs) == len(set(version_jobs)) == len(jobs)  # one version per job, none twice
    assert set(version_jobs) == {j["job_id"] for j in jobs}
    assert set(STATE["acknowledged"]) <= stored_nights
    client.close()
