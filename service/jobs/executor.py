"""The executor interface: what runs a claimed training job (JobExecutor), in this process or elsewhere.

A :class:`~service.jobs.workers.Worker` claims a job and hands it to its executor with a progress
callback (:data:`models.Progress`); the executor runs the job to completion and returns its
result. :class:`LocalExecutor` runs the training in the worker process;
:class:`service.jobs.dask_executor.DaskExecutor` submits it to a Dask cluster. An executor that
cannot run jobs right now (its cluster is unreachable) raises :class:`ExecutorUnavailable`: the
worker puts the job back in the queue, with the message as its status, and pauses before
claiming again.
"""

from __future__ import annotations

import abc
from typing import Any

from sqlalchemy.orm import Session, sessionmaker

from models import Progress

from ..config import Settings
from .queue import JobInfo
from .training import run_training_job

__all__ = ["ExecutorUnavailable", "JobExecutor", "LocalExecutor"]


class ExecutorUnavailable(Exception):  # noqa: N818  (a condition to wait out, not a job error)
    """The executor cannot run jobs now; the message is shown as the status of the waiting job."""


class JobExecutor(abc.ABC):
    """Runs one claimed job to completion."""

    @abc.abstractmethod
    def run(self, job: JobInfo, *, progress: Progress) -> dict[str, Any]:
        """Run ``job`` and return its JSON result (``{"model_version": n, ...}``).

        Must call ``progress`` as work advances and let what it raises propagate (that is how a
        worker stops a cancelled job). Raises :class:`ExecutorUnavailable` to put the job back in
        the queue, any other exception to fail the job; its message becomes the job's error.
        """


class LocalExecutor(JobExecutor):
    """Runs the training in this process (see :mod:`service.jobs.training`)."""

    def __init__(self, settings: Settings, factory: sessionmaker[Session]) -> None:
        self.settings = settings
        self.factory = factory

    def run(self, job: JobInfo, *, progress: Progress) -> dict[str, Any]:
        return run_training_job(job, factory=self.factory, settings=self.settings, progress=progress)
