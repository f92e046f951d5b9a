"""Claiming jobs under concurrency: many claimers racing on PostgreSQL (and SQLite) for the same queue.

Each claimer runs in its own thread with its own engine (its own connections), the way workers on
several machines share one database. Every job must be claimed exactly once while its lease is
valid, none may be lost, and an expired lease makes the job claimable exactly once more.
"""

from __future__ import annotations

import threading
import time
from collections import Counter
from pathlib import Path

import pytest
from pg_support import throwaway_database

N_JOBS = 60
N_CLAIMERS = 6


def _migrated(url: str):
    from service.config import Settings
    from service.store.schema import upgrade

    settings = Settings(db=url)
    upgrade(settings)
    return settings


def _queue(settings, n_jobs: int) -> list[str]:
    """``n_jobs`` queued personal trainings, one per participant of one study."""
    from service.jobs.queue import enqueue_job
    from service.store import db

    engine = db.make_engine(settings)
    factory = db.make_session_factory(engine)
    with db.session_scope(factory, write=True) as session:
        study = db.Study(study_id="race", name="Race")
        session.add(study)
        session.flush()
        people = [db.Participant(study_pk=study.pk, participant_id=f"P-{i:03d}") for i in range(n_jobs)]
        session.add_all(people)
        session.flush()
        targets = [(study.pk, p.pk) for p in people]
    ids = [enqueue_job(factory, kind="personal", study_pk=s, participant_pk=p, params={}, actor="test",
                       study_id="race", subject=None)[0].job_id for s, p in targets]
    engine.dispose()
    return ids


def _race(settings, *, n_claimers: int, lease_s: float, claimer=None) -> list[tuple[str, str, int]]:
    """Claimers in threads, started together, each claiming until the queue is empty.

    Returns (job_id, worker_id, attempts) of every successful claim.
    """
    from service.jobs.queue import claim_job
    from service.store import db

    claims: list[tuple[str, str, int]] = []
    errors: list[BaseException] = []
    start = threading.Barrier(n_claimers)
    lock = threading.Lock()

    def claim_all(worker_id: str) -> None:
        engine = db.make_engine(settings)
        factory = db.make_session_factory(engine)
        try:
            start.wait()
            while (job := claim_job(factory, worker_id=worker_id, lease_s=lease_s, max_attempts=5,
                                    claimer=claimer)) is not None:
                with lock:
                    claims.append((job.job_id, worker_id, job.attempts))
                time.sleep(0.005)  # a worker does something between claims: the others get their turn
        except BaseException as exc:  # reported by the main thread
            errors.append(exc)
        finally:
            engine.dispose()

    threads = [threading.Thread(target=claim_all, args=(f"w{i}",)) for i in range(n_claimers)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    assert not errors, errors
    return claims


def _states(settings) -> Counter[str]:
    from sqlalchemy import select

    from service.store import db

    engine = db.make_engine(settings)
    with db.session_scope(db.make_session_factory(engine)) as session:
        states = Counter(session.scalars(select(db.Job.state)))
    engine.dispose()
    return states


def _check_each_claimed_once(settings, job_ids: list[str], claims: list[tuple[str, str, int]], *,
                             attempts: int) -> None:
    per_job = Counter(job_id for job_id, _, _ in claims)
    assert set(per_job) == set(job_ids)  # none lost
    assert max(per_job.values()) == 1  # none taken twice while its lease is valid
    assert {a for _, _, a in claims} == {attempts}
    assert len({w for _, w, _ in claims}) > 1  # the claimers really raced
    assert _states(settings) == Counter({"running": len(job_ids)})


@pytest.fixture
def pg_url():
    with throwaway_database() as url:
        yield url


@pytest.mark.postgres
def test_postgres_claimers_take_each_job_exactly_once_and_expired_leases_once_more(pg_url) -> None:
    from service.jobs.queue import SkipLockedClaimer, claimer_for

    assert isinstance(claimer_for("postgresql"), SkipLockedClaimer)
    settings = _migrated(pg_url)
    job_ids = _queue(settings, N_JOBS)
    lease_s = 2.0
    first = _race(settings, n_claimers=N_CLAIMERS, lease_s=lease_s)
    _check_each_claimed_once(settings, job_ids, first, attempts=1)
    assert _race(settings, n_claimers=N_CLAIMERS, lease_s=lease_s) == []  # every lease still valid
    time.sleep(lease_s + 0.5)  # every worker "died": all leases run out
    second = _race(settings, n_claimers=N_CLAIMERS, lease_s=60.0)
    _check_each_claimed_once(settings, job_ids, second, attempts=2)


@pytest.mark.postgres
def test_postgres_claim_skips_a_row_another_transaction_holds_instead_of_waiting(pg_url) -> None:
    from sqlalchemy import select, text

    from service.jobs.queue import SkipLockedClaimer
    from service.store import db

    settings = _migrated(pg_url)
    first, second = _queue(settings, 2)
    engine = db.make_engine(settings)
    factory = db.make_session_factory(engine)
    holder = factory()
    try:  # another worker's claim in progress on the oldest job
        holder.execute(select(db.Job).where(db.Job.job_id == first).with_for_update())
        with db.session_scope(factory, write=True) as session:
            session.execute(text("SET LOCAL lock_timeout = '2s'"))  # a blocking claim would fail here
            row = SkipLockedClaimer().claim(session, worker_id="w-skip", lease_s=30)
            assert row is not None and row.job_id == second and row.lease_owner == "w-skip"
    finally:
        holder.rollback()
        holder.close()
        engine.dispose()


def test_sqlite_claimers_take_each_job_exactly_once(tmp_path: Path) -> None:
    from service.jobs.queue import CompareAndSetClaimer, claimer_for

    assert isinstance(claimer_for("sqlite"), CompareAndSetClaimer)
    settings = _migrated(f"sqlite:///{tmp_path / 'race.db'}")
    job_ids = _queue(settings, 30)
    claims = _race(settings, n_claimers=4, lease_s=60.0)
    _check_each_claimed_once(settings, job_ids, claims, attempts=1)


@pytest.mark.postgres
def test_compare_and_set_claimer_is_also_safe_on_postgres(pg_url) -> None:
    from service.jobs.queue import CompareAndSetClaimer

    settings = _migrated(pg_url)
    job_ids = _queue(settings, 30)
    claims = _race(settings, n_claimers=4, lease_s=60.0, claimer=CompareAndSetClaimer())
    _check_each_claimed_once(settings, job_ids, claims, attempts=1)


@pytest.mark.postgres
@pytest.mark.slow
def test_postgres_worker_processes_share_the_queue_and_a_killed_one_loses_nothing(pg_url) -> None:
    import os
    import signal
    import subprocess
    import sys

    import httpx
    from harness import LiveServer, bearer, cohort_bodies, free_port, wait_for, worker_env
    from sqlalchemy import select

    from service.jobs.workers import stop_worker_processes
    from service.store import db, versions
    from service.store.tokens import create_token

    settings = _migrated(pg_url).model_copy(update={"port": free_port(), "lease_s": 3.0, "heartbeat_s": 0.5,
                                                     "poll_s": 0.2, "token_cache_s": 0.0})
    engine = db.make_engine(settings)
    factory = db.make_session_factory(engine)
    with db.session_scope(factory, write=True) as session:
        headers = bearer(create_token(session, role="admin")[1])
    procs: list[subprocess.Popen[bytes]] = []

    def start() -> subprocess.Popen[bytes]:
        procs.append(subprocess.Popen([sys.executable, "-m", "service.jobs.workers"], env=worker_env(settings)))
        return procs[-1]

    try:
        with LiveServer(settings) as live, httpx.Client(base_url=live.url, headers=headers, timeout=60) as http:
            assert http.post("/v1/studies", json={"study_id": "lab", "name": "Lab"}).status_code == 201
            for pid, nights in cohort_bodies(n_participants=3, nights=3).items():
                for body in nights:
                    assert http.post(f"/v1/studies/lab/participants/{pid}/nights", json=body).status_code == 201
            jobs = {pid: http.post(f"/v1/studies/lab/participants/{pid}/training",
                                   json={"n_trials": 8}).json()["job_id"] for pid in ("P-01", "P-02", "P-03")}
            first, second = start(), start()

            def running_job():
                with db.session_scope(factory) as session:
                    return session.scalar(select(db.Job).where(db.Job.state == "running", db.Job.progress_done > 0)
                                          .limit(1))

            victim = wait_for(running_job, timeout_s=120)
            pid = int(victim.lease_owner.split(":")[1])
            assert pid in (first.pid, second.pid)
            os.kill(pid, signal.SIGKILL)  # mid-training
            start()  # a replacement worker; the survivor keeps working too

            def all_finished():
                states = {p: http.get(f"/v1/jobs/{j}").json() for p, j in jobs.items()}
                return states if all(s["state"] in ("succeeded", "failed", "cancelled")
                                     for s in states.values()) else None

            done = wait_for(all_finished, timeout_s=240)
        assert {p: s["state"] for p, s in done.items()} == dict.fromkeys(jobs, "succeeded"), done
        attempts = {s["job_id"]: s["attempts"] for s in done.values()}
        assert attempts[victim.job_id] == 2 and sorted(attempts.values()) == [1, 1, 2]
        with db.session_scope(factory) as session:
            rows = session.scalars(select(db.ModelVersion).order_by(db.ModelVersion.job_id)).all()
            assert sorted(r.job_id for r in rows) == sorted(jobs.values())  # one version per job, none twice
            for row in rows:
                assert row.is_active and row.version == 1 and row.booster
                info = versions.get_version(session, study=session.get(db.Study, row.study_pk),
                                            participant=session.get(db.Participant, row.participant_pk), version=1)
                assert versions.load_model(session, info).threshold_ == info.metadata.threshold
    finally:
        stop_worker_processes(procs, timeout_s=10)
        engine.dispose()
