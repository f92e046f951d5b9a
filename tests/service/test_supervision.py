"""Training workers as real processes: supervision by ``nightbank serve``, expired leases, ``/healthz``.

``nightbank serve`` runs as a process of its own over a migrated SQLite file; its training workers
are its child processes (found with psutil). Killing one with SIGKILL must get it replaced (with a
log line) and queued trainings must still finish; SIGTERM to ``serve`` must leave no worker
process behind and give the running job back to the queue.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import httpx
import psutil
import pytest
from harness import bearer, cohort_bodies, free_port, wait_for

pytestmark = pytest.mark.slow

ROOT = Path(__file__).resolve().parents[2]
NIGHTBANK = str(Path(sys.executable).parent / "nightbank")


def _database(tmp_path: Path) -> tuple[str, dict[str, str]]:
    from service.config import Settings
    from service.store import db
    from service.store.tokens import create_token

    url = f"sqlite:///{tmp_path / 'nightbank.db'}"
    done = subprocess.run([NIGHTBANK, "migrate", "--db", url], cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    engine = db.make_engine(Settings(db=url))
    with db.session_scope(db.make_session_factory(engine), write=True) as session:
        headers = bearer(create_token(session, role="admin", actor="test")[1])
    engine.dispose()
    return url, headers


def _env(url: str, port: int, *, lease_s: float = 3.0) -> dict[str, str]:
    return {**os.environ, "NIGHTBANK_DB": url, "NIGHTBANK_PORT": str(port), "NIGHTBANK_LEASE_S": str(lease_s),
            "NIGHTBANK_HEARTBEAT_S": "0.5", "NIGHTBANK_POLL_S": "0.2", "NIGHTBANK_N_TRIALS": "2",
            "NIGHTBANK_LOG_LEVEL": "INFO"}


@contextmanager
def _serve(url: str, log: Path, *, job_workers: int,
           lease_s: float = 3.0) -> Iterator[tuple[subprocess.Popen[bytes], str]]:
    port = free_port()
    with log.open("wb") as out:
        proc = subprocess.Popen([NIGHTBANK, "serve", "--no-migrate", "--job-workers", str(job_workers)],
                                env=_env(url, port, lease_s=lease_s), cwd=ROOT, stdout=out, stderr=subprocess.STDOUT)
    base = f"http://127.0.0.1:{port}"

    def up() -> bool:
        assert proc.poll() is None, log.read_text()
        try:
            return httpx.get(f"{base}/healthz", timeout=2).status_code in (200, 503)
        except httpx.TransportError:
            return False

    try:
        wait_for(up, timeout_s=60, poll_s=0.2)
        yield proc, base
    finally:
        if proc.poll() is None:
            for child in psutil.Process(proc.pid).children(recursive=True):
                child.kill()
            proc.kill()
        proc.wait(20)


def _workers(proc: subprocess.Popen[bytes]) -> list[psutil.Process]:
    """Live (not zombie) training worker processes started by ``proc``."""
    out = []
    for child in psutil.Process(proc.pid).children(recursive=True):
        try:
            if "service.jobs.workers" in " ".join(child.cmdline()):
                out.append(child)
        except psutil.Error:  # exited (or a zombie not yet reaped)
            continue
    return out


def _alive(pid: int) -> bool:
    try:
        return psutil.Process(pid).status() != psutil.STATUS_ZOMBIE
    except psutil.NoSuchProcess:
        return False


def _post_cohort(client: httpx.Client, *, participants: int = 1) -> None:
    assert client.post("/v1/studies", json={"study_id": "s1", "name": "Study one"}).status_code == 201
    for pid, nights in cohort_bodies(n_participants=participants, nights=3).items():
        for body in nights:
            assert client.post(f"/v1/studies/s1/participants/{pid}/nights", json=body).status_code == 201


def _job(client: httpx.Client, job_id: str) -> dict[str, Any]:
    return client.get(f"/v1/jobs/{job_id}").json()


def test_serve_replaces_a_killed_worker_and_sigterm_leaves_no_worker(tmp_path: Path) -> None:
    url, headers = _database(tmp_path)
    log = tmp_path / "serve.log"
    with _serve(url, log, job_workers=1) as (proc, base), httpx.Client(base_url=base, headers=headers,
                                                                          timeout=30) as client:
        first = wait_for(lambda: _workers(proc), timeout_s=30)
        assert len(first) == 1
        health = client.get("/healthz")
        assert health.status_code == 200 and health.json()["workers_alive"] == 1, health.text
        first[0].send_signal(signal.SIGKILL)
        replaced = wait_for(lambda: [w for w in _workers(proc) if w.pid != first[0].pid], timeout_s=30)
        assert len(replaced) == 1
        assert f"training worker pid {first[0].pid} exited with code -9" in log.read_text()
        _post_cohort(client)
        job_id = client.post("/v1/studies/s1/participants/P-01/training", json={"n_trials": 2}).json()["job_id"]
        done = wait_for(lambda: (j := _job(client, job_id))["state"] in ("succeeded", "failed") and j, timeout_s=180)
        assert done["state"] == "succeeded", done["error"]
        # a long training, stopped by SIGTERM to serve: the job goes back to the queue, no worker stays
        long_id = client.post("/v1/studies/s1/participants/P-01/training", json={"n_trials": 40}).json()["job_id"]
        wait_for(lambda: (j := _job(client, long_id))["state"] == "running" and j["progress"]["done"] > 0,
                 timeout_s=120)
        workers = _workers(proc)
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(30) == 0, log.read_text()
        assert workers and not [w.pid for w in workers if _alive(w.pid)]
    from service.config import Settings
    from service.jobs.queue import get_job
    from service.store import db

    engine = db.make_engine(Settings(db=url))
    with db.session_scope(db.make_session_factory(engine)) as session:
        job = get_job(session, long_id)
    engine.dispose()
    assert job.state.value == "queued" and job.lease_owner is None


def test_healthz_turns_not_ok_while_jobs_wait_without_a_worker(tmp_path: Path) -> None:
    url, headers = _database(tmp_path)
    with _serve(url, tmp_path / "serve.log", job_workers=0, lease_s=1.0) as (_, base), \
            httpx.Client(base_url=base, headers=headers, timeout=30) as client:
        assert client.get("/healthz").json() == {"status": "ok", "workers_alive": 0, "jobs_queued": 0,
                                                 "oldest_queued_age_s": None, "problems": []}
        _post_cohort(client)
        job_id = client.post("/v1/studies/s1/participants/P-01/training", json={"n_trials": 2}).json()["job_id"]
        stuck = wait_for(lambda: (r := client.get("/healthz")).status_code == 503 and r, timeout_s=20)
        body = stuck.json()
        assert stuck.headers["content-type"].startswith("application/json")
        assert body["status"] == "degraded" and body["jobs_queued"] == 1 and body["workers_alive"] == 0
        assert body["oldest_queued_age_s"] >= 1.0 and "no training worker alive" in body["problems"][0]
        worker = subprocess.Popen([NIGHTBANK, "worker"], env=_env(url, 0, lease_s=3.0), cwd=ROOT,
                                  stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        try:
            done = wait_for(lambda: (j := _job(client, job_id))["state"] in ("succeeded", "failed") and j,
                            timeout_s=180)
            assert done["state"] == "succeeded", done["error"]
            healthy = client.get("/healthz")
            assert healthy.status_code == 200 and healthy.json()["jobs_queued"] == 0
        finally:
            worker.terminate()
            worker.wait(20)


def test_an_expired_lease_shows_in_the_jobs_api_until_another_worker_takes_it(http, study, admin,
                                                                               start_worker) -> None:
    for pid, nights in cohort_bodies(n_participants=1, nights=3).items():
        for body in nights:
            assert http.post(f"/v1/studies/{study}/participants/{pid}/nights", json=body,
                             headers=admin).status_code == 201
    job_id = http.post(f"/v1/studies/{study}/participants/P-01/training", json={"n_trials": 10},
                       headers=admin).json()["job_id"]
    first = start_worker()
    held = wait_for(lambda: (j := http.get(f"/v1/jobs/{job_id}", headers=admin).json())["state"] == "running"
                    and j["progress"]["done"] > 0 and j)
    assert held["lease"] == "held" and f":{first.pid}:" in held["worker"] and held["taken_over_by"] is None
    os.kill(first.pid, signal.SIGKILL)
    first.wait()
    expired = wait_for(lambda: (j := http.get(f"/v1/jobs/{job_id}", headers=admin).json())["lease"] == "expired"
                       and j, timeout_s=30)
    assert expired["state"] == "running" and expired["taken_over_by"] is None
    listed = http.get(f"/v1/studies/{study}/jobs", headers=admin).json()["data"][0]
    assert listed["job_id"] == job_id and listed["lease"] == "expired"
    second = start_worker()
    taken = wait_for(lambda: (j := http.get(f"/v1/jobs/{job_id}", headers=admin).json())["taken_over_by"] or
                     j["state"] == "succeeded", timeout_s=60)
    assert isinstance(taken, str) and f":{second.pid}:" in taken
    done = wait_for(lambda: (j := http.get(f"/v1/jobs/{job_id}", headers=admin).json())["state"] == "succeeded"
                    and j, timeout_s=180)
    assert done["attempts"] == 2 and done["lease"] is None
