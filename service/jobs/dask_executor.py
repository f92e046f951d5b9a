"""Running trainings on a Dask cluster: each claimed job's :mod:`models` call becomes one Dask task.

The worker process still claims the job, keeps its lease, loads the nights and stores the version
(:mod:`service.jobs.training`); only the training call (``models.train_personal`` or
``models.train_pooled``) is sent with :meth:`distributed.Client.submit` to the scheduler at
``Settings.dask_scheduler``. Many worker processes (``nightbank worker --executor dask``) therefore
fan per-participant trainings out over the cluster's machines, while the database queue keeps
every job claimed by exactly one of them.

While the task runs, the worker reports a ``running on the Dask cluster`` stage every
``poll_s``; a cancelled job or a lost lease cancels the task (a task already running keeps its
Dask worker busy until it ends, since Dask does not interrupt running tasks; its result is
dropped). If the scheduler cannot be reached (at connection or while the task runs),
:class:`~service.jobs.executor.ExecutorUnavailable` puts the job back in the queue with a status naming
the scheduler, and the worker retries later. Dask's workers need nightbank installed (they import
:mod:`models` to run the task).
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable
from typing import Any

from sqlalchemy.orm import Session, sessionmaker

from models import Progress

from ..config import Settings
from .executor import ExecutorUnavailable, JobExecutor
from .queue import JobInfo
from .training import Compute, run_training_job

__all__ = ["DaskExecutor"]

log = logging.getLogger("nightbank.worker")


class DaskExecutor(JobExecutor):
    """Sends each job's training call to a Dask scheduler as one task.

    Parameters
    ----------
    settings : Settings
        ``dask_scheduler`` is the scheduler address (``tcp://HOST:8786``); ``poll_s`` the
        interval, seconds, of progress reports while the task runs.
    factory : sessionmaker
    connect_timeout_s : float, default=5.0
        Seconds to wait for the scheduler before the job goes back to the queue.
    """

    def __init__(self, settings: Settings, factory: sessionmaker[Session], *, connect_timeout_s: float = 5.0) -> None:
        self.settings = settings
        self.factory = factory
        self.address = str(settings.dask_scheduler)
        self.connect_timeout_s = connect_timeout_s
        self._client: Any = None
        self._lock = threading.Lock()

    def _unavailable(self, detail: str) -> ExecutorUnavailable:
        return ExecutorUnavailable(f"waiting for Dask scheduler {self.address} ({detail})")

    def client(self) -> Any:
        """A connected :class:`distributed.Client` (connects on first use and after a loss).

        Raises
        ------
        ExecutorUnavailable
            If the scheduler does not answer within ``connect_timeout_s``.
        """
        from distributed import Client

        with self._lock:
            if self._client is not None and self._client.status == "running":
                return self._client
            self.close()
            try:
                self._client = Client(self.address, timeout=self.connect_timeout_s, set_as_default=False)
            except (OSError, TimeoutError) as exc:
                raise self._unavailable("unreachable") from exc
            return self._client

    def close(self) -> None:
        """Disconnect from the scheduler (the cluster keeps running)."""
        if self._client is not None:
            try:
                self._client.close()
            except Exception:  # a dead connection closes with errors; nothing is left to release
                log.debug("closing the Dask client failed", exc_info=True)
            self._client = None

    def _compute(self, job: JobInfo) -> Compute:
        from distributed.client import FutureCancelledError

        client = self.client()

        def compute(function: Callable[..., Any], kwargs: dict[str, Any], progress: Progress) -> Any:
            future = client.submit(function, pure=False, key=f"nightbank-{job.job_id}-{job.attempts}", **kwargs)
            try:
                while True:
                    try:
                        return future.result(timeout=self.settings.poll_s)
                    except TimeoutError:
                        if client.status != "running":
                            raise self._unavailable("connection lost") from None
                        progress(0, 1, "running on the Dask cluster")  # raises to stop the job
                    except FutureCancelledError as exc:
                        raise self._unavailable("task lost") from exc
            finally:
                if not future.done():
                    future.cancel()

        return compute

    def run(self, job: JobInfo, *, progress: Progress) -> dict[str, Any]:
        return run_training_job(job, factory=self.factory, settings=self.settings, progress=progress,
                                compute=self._compute(job))
