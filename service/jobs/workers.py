"""Training workers: processes that take jobs from the database queue and run them.

A :class:`Worker` claims a job (:mod:`service.jobs.queue`), keeps its lease alive from a heartbeat
thread, hands it to a :class:`~service.jobs.executor.JobExecutor` with a progress callback, and
records the outcome.
The callback raises :class:`JobStopped` when the job is cancelled, the lease is lost or the
worker is shutting down; training stops at its next progress step. On shutdown the job goes back
to the queue and restarts from the beginning on the next worker.

The executor (:mod:`service.jobs.executor`) is the one ``Settings.executor`` names
(:func:`make_executor`). One that cannot run jobs right now (its cluster is unreachable) raises
:class:`~service.jobs.executor.ExecutorUnavailable`: the job goes back to the queue, unchanged
but for a status saying why it waits, and the worker pauses before claiming again.

``nightbank serve`` starts ``Settings.job_workers`` worker processes; ``nightbank worker`` runs
one more in the foreground, on the same or another machine sharing the database.
"""

from __future__ import annotations

import logging
import os
import signal
import socket
import subprocess
import sys
import threading
import time
import uuid
from typing import Any

from sqlalchemy.orm import Session, sessionmaker

from models import NightbankError

from ..config import Settings
from ..store import db
from .executor import ExecutorUnavailable, JobExecutor, LocalExecutor
from .queue import JobInfo, JobState, claim_job, finish_job, heartbeat, release_job, report_progress

__all__ = ["JobStopped", "Worker", "make_executor", "settings_env", "start_worker_processes",
           "stop_worker_processes"]

log = logging.getLogger("nightbank.worker")


class JobStopped(Exception):  # noqa: N818  (a signal, not an error)
    """Raised from the progress callback to stop a job: ``reason`` is cancelled, lost or shutdown."""

    def __init__(self, reason: str) -> None:
        super().__init__(reason)
        self.reason = reason


def make_executor(settings: Settings, factory: sessionmaker[Session]) -> JobExecutor:
    """The executor ``settings.executor`` names (``local`` or ``dask``)."""
    if settings.executor == "dask":
        from .dask_executor import DaskExecutor  # dask is an optional extra

        return DaskExecutor(settings, factory)
    return LocalExecutor(settings, factory)


class _Lease:
    """Heartbeat thread plus the stop flag the progress callback checks."""

    def __init__(self, worker: Worker, job: JobInfo) -> None:
        self.worker, self.job = worker, job
        self.reason: str | None = None
        self._done = threading.Event()
        self._thread = threading.Thread(target=self._beat, name=f"heartbeat-{job.job_id[:8]}", daemon=True)
        self._last_report = 0.0

    def __enter__(self) -> _Lease:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._done.set()
        self._thread.join()

    def _note(self, cancel: bool | None) -> None:
        if cancel is None:
            self.reason = self.reason or "lost"
        elif cancel:
            self.reason = self.reason or "cancelled"

    def _beat(self) -> None:
        s = self.worker.settings
        while not self._done.wait(s.heartbeat_s):
            try:
                self._note(heartbeat(self.worker.factory, self.job.job_id, worker_id=self.worker.worker_id,
                                     lease_s=s.lease_s))
            except Exception:  # a failed heartbeat is retried; the lease outlives several intervals
                log.warning("heartbeat of job %s failed", self.job.job_id, exc_info=True)

    def progress(self, done: int, total: int, stage: str) -> None:
        if self.worker.stopping.is_set():
            self.reason = self.reason or "shutdown"
        if self.reason is not None:
            raise JobStopped(self.reason)
        now = time.monotonic()
        if now - self._last_report >= 0.25 or done >= total:
            self._last_report = now
            self._note(report_progress(self.worker.factory, self.job.job_id, worker_id=self.worker.worker_id,
                                       done=done, total=total, stage=stage))
            if self.reason is not None:
                raise JobStopped(self.reason)


class Worker:
    """Claims and runs jobs until stopped.

    Parameters
    ----------
    settings : Settings
    factory : sessionmaker, optional
        Built from ``settings`` if not given.
    executor : JobExecutor, optional
        Default :func:`make_executor` of ``settings``.
    unavailable_pause_s : float, default=10.0
        Seconds to wait before claiming again after the executor was unavailable.
    """

    def __init__(self, settings: Settings, *, factory: sessionmaker[Session] | None = None,
                 executor: JobExecutor | None = None, unavailable_pause_s: float = 10.0) -> None:
        self.settings = settings
        self.factory = factory or db.make_session_factory(db.make_engine(settings))
        self.executor = executor or make_executor(settings, self.factory)
        self.unavailable_pause_s = unavailable_pause_s
        self._paused_until = 0.0
        self.worker_id = f"{socket.gethostname()[:32]}:{os.getpid()}:{uuid.uuid4().hex[:6]}"
        self.stopping = threading.Event()

    def run_once(self) -> JobInfo | None:
        """Claim and run one job; returns the job run, or None if the queue was empty or the
        executor unavailable (the job then went back to the queue)."""
        if time.monotonic() < self._paused_until:
            return None
        job = claim_job(self.factory, worker_id=self.worker_id, lease_s=self.settings.lease_s,
                        max_attempts=self.settings.max_attempts)
        if job is None:
            return None
        log.info("job %s (%s) started, attempt %d", job.job_id, job.kind, job.attempts)
        with _Lease(self, job) as lease:
            try:
                result = self.executor.run(job, progress=lease.progress)
            except JobStopped as stop:
                self._stopped(job, stop.reason)
                return job
            except ExecutorUnavailable as exc:
                release_job(self.factory, job.job_id, worker_id=self.worker_id, stage=str(exc))
                log.warning("job %s returned to the queue: %s", job.job_id, exc)
                self._paused_until = time.monotonic() + self.unavailable_pause_s
                return None
            except NightbankError as exc:
                self._finish(job, JobState.failed, error=f"{exc.code}: {exc}")
                return job
            except Exception as exc:
                log.exception("job %s failed", job.job_id)
                self._finish(job, JobState.failed, error=f"training failed unexpectedly ({type(exc).__name__}); "
                                                         "see the worker log")
                return job
        self._finish(job, JobState.succeeded, result=result)
        return job

    def _stopped(self, job: JobInfo, reason: str) -> None:
        if reason == "cancelled":
            self._finish(job, JobState.cancelled, error=None)
        elif reason == "shutdown":
            release_job(self.factory, job.job_id, worker_id=self.worker_id)
            log.info("job %s returned to the queue (worker stopping)", job.job_id)
        else:
            log.warning("job %s: lease lost, another worker may have taken it over", job.job_id)

    def _finish(self, job: JobInfo, state: JobState, *, result: dict[str, Any] | None = None,
                error: str | None = None) -> None:
        if finish_job(self.factory, job.job_id, worker_id=self.worker_id, state=state, result=result, error=error):
            log.info("job %s %s", job.job_id, state.value)
        else:
            log.warning("job %s finished as %s after its lease was lost; outcome not recorded", job.job_id,
                        state.value)

    def run_forever(self) -> None:
        """Run jobs until :attr:`stopping` is set; between jobs, store features of new nights.

        With an empty queue and no features to compute, the queue is polled every ``poll_s``.
        """
        from ..store.features import warm_features

        log.info("worker %s polling for jobs", self.worker_id)
        failed: set[tuple[int, str]] = set()
        while not self.stopping.is_set():
            try:
                busy = self.run_once() is not None or warm_features(self.factory, limit=4, failed=failed) > 0
            except Exception:
                log.exception("worker loop error; retrying")
                busy = False
            if not busy:
                self.stopping.wait(self.settings.poll_s)
        log.info("worker %s stopped", self.worker_id)


def settings_env(settings: Settings) -> dict[str, str]:
    """``NIGHTBANK_*`` variables that reproduce ``settings`` in a child process."""
    out = {}
    for name, value in settings.model_dump().items():
        if value is None:
            continue
        out[f"NIGHTBANK_{name.upper()}"] = str(value).lower() if isinstance(value, bool) else str(value)
    return out


def start_worker_processes(settings: Settings, n: int) -> list[subprocess.Popen[bytes]]:
    """Start ``n`` worker processes (``python -m service.jobs.workers``) with ``settings``."""
    env = {**os.environ, **settings_env(settings)}
    return [subprocess.Popen([sys.executable, "-m", "service.jobs.workers"], env=env) for _ in range(n)]


def stop_worker_processes(processes: list[subprocess.Popen[bytes]], *, timeout_s: float = 15.0) -> None:
    """Ask workers to stop (SIGTERM: running jobs go back to the queue), kill those that do not."""
    for proc in processes:
        if proc.poll() is None:
            proc.terminate()
    deadline = time.monotonic() + timeout_s
    for proc in processes:
        try:
            proc.wait(max(deadline - time.monotonic(), 0.1))
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def main() -> None:
    """Entry point of a worker process: settings from the environment, stop on SIGTERM/SIGINT."""
    settings = Settings()
    os.nice(settings.worker_nice)
    logging.basicConfig(level=settings.log_level.upper(), format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    worker = Worker(settings)
    for sig in (signal.SIGTERM, signal.SIGINT):
        signal.signal(sig, lambda *_: worker.stopping.set())
    worker.run_forever()


if __name__ == "__main__":
    # run the importable module's main, so there is one copy of its classes however the process started
    from service.jobs.workers import main as run_worker

    run_worker()
