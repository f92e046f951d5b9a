"""A job queue in the database: enqueue, claim with a lease, heartbeat, progress, finish.

Life of a job::

    queued --claim--> running --finish--> succeeded | failed | cancelled
       |                 |  \\--lease expires (worker died)--> claimable again (attempts + 1)
       \\--cancel--> cancelled        \\--cancel requested--> the worker stops at the next progress step

A worker *claims* a job by taking a lease (``lease_owner``, ``lease_expires_at``) and keeps it by
heartbeats. A job whose lease ran out (its worker died, or the whole server stopped) is claimed
again by the next free worker, so a restart resumes queued and interrupted jobs; after
``max_attempts`` claims it is failed with a readable error.

Claiming goes through a :class:`Claimer`; :func:`claimer_for` picks one per database.
:class:`SkipLockedClaimer` (PostgreSQL) locks the oldest claimable row with
``SELECT ... FOR UPDATE SKIP LOCKED``, so workers on many machines never wait on each other and
never take the same row. :class:`CompareAndSetClaimer` works on every database (SQLite): it picks
the oldest claimable job, then updates it only if it is still claimable (a conditional UPDATE
whose row count says who won). Lease times come from the claiming worker's clock, so machines
sharing a database should keep their clocks synchronised (NTP) to well under the lease.

At most one training is queued or running per participant (and one pooled training per study):
``active_key`` is unique while a job is active and NULL once it finishes.
"""

from __future__ import annotations

import abc
import uuid
from dataclasses import dataclass
from datetime import datetime, timedelta
from enum import StrEnum
from typing import Any

from sqlalchemy import func, or_, select, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, sessionmaker

from ..errors import Conflict, NotFound
from ..store import db
from ..store.audit import record_audit

__all__ = [
    "Claimer",
    "CompareAndSetClaimer",
    "JobInfo",
    "JobState",
    "SkipLockedClaimer",
    "cancel_job",
    "claim_job",
    "claimer_for",
    "count_jobs_by_state",
    "enqueue_job",
    "finish_job",
    "get_job",
    "heartbeat",
    "list_jobs",
    "release_job",
    "report_progress",
    "withdraw_jobs",
]


class JobState(StrEnum):
    queued = "queued"
    running = "running"
    succeeded = "succeeded"
    failed = "failed"
    cancelled = "cancelled"

    def is_finished(self) -> bool:
        return self in (JobState.succeeded, JobState.failed, JobState.cancelled)


@dataclass(frozen=True)
class JobInfo:
    """Snapshot of a job. ``participant_id`` is None for a pooled training."""

    job_id: str
    kind: str
    study_id: str
    participant_id: str | None
    state: JobState
    done: int
    total: int
    stage: str
    params: dict[str, Any]
    result: dict[str, Any] | None
    error: str | None
    attempts: int
    cancel_requested: bool
    created_at: datetime
    started_at: datetime | None
    finished_at: datetime | None
    lease_owner: str | None = None
    lease_expires_at: datetime | None = None

    def lease_state(self, now: datetime) -> str | None:
        """``"held"`` or ``"expired"`` while running (an expired lease: its worker stopped), else None."""
        if self.state is not JobState.running or self.lease_expires_at is None:
            return None
        return "held" if self.lease_expires_at >= now else "expired"

    def taken_over_by(self, now: datetime) -> str | None:
        """The worker holding the job after an earlier claim's lease ran out, else None."""
        return self.lease_owner if self.attempts > 1 and self.lease_state(now) == "held" else None


def _info(session: Session, row: db.Job) -> JobInfo:
    study_id = session.scalar(select(db.Study.study_id).where(db.Study.pk == row.study_pk))
    pid = None if row.participant_pk is None else session.scalar(
        select(db.Participant.participant_id).where(db.Participant.pk == row.participant_pk))
    return JobInfo(job_id=row.job_id, kind=row.kind, study_id=str(study_id), participant_id=pid,
                   state=JobState(row.state), done=row.progress_done, total=row.progress_total,
                   stage=row.progress_stage, params=dict(row.params), result=row.result, error=row.error,
                   attempts=row.attempts, cancel_requested=row.cancel_requested, created_at=row.created_at,
                   started_at=row.started_at, finished_at=row.finished_at, lease_owner=row.lease_owner,
                   lease_expires_at=row.lease_expires_at)


def _row(session: Session, job_id: str) -> db.Job:
    row = session.scalar(select(db.Job).where(db.Job.job_id == job_id))
    if row is None:
        raise NotFound(f"no job {job_id!r}")
    return row


def enqueue_job(factory: sessionmaker[Session], *, kind: str, study_pk: int, participant_pk: int | None,
                params: dict[str, Any], actor: str, study_id: str, subject: str | None) -> tuple[JobInfo, bool]:
    """Queue a training job, or return the one already queued or running for the same target.

    Parameters
    ----------
    factory : sessionmaker
        Sessions are opened here: a lost race on the unique ``active_key`` is retried in a
        fresh transaction that returns the winner.
    kind : {"personal", "pooled"}
    study_pk, participant_pk : int
        Target rows (``participant_pk`` None for a pooled training).
    params : dict
        JSON options of the training (``n_trials``, ``seed``).
    actor, study_id, subject : str
        For the audit log.

    Returns
    -------
    job : JobInfo
    created : bool
        False if an active job for the same target was returned instead.
    """
    key = f"{kind}:{study_pk}:{participant_pk or ''}"
    for _ in range(3):
        try:
            with db.session_scope(factory, write=True) as session:
                existing = session.scalar(select(db.Job).where(db.Job.active_key == key))
                if existing is not None:
                    return _info(session, existing), False
                row = db.Job(job_id=uuid.uuid4().hex, kind=kind, study_pk=study_pk, participant_pk=participant_pk,
                             active_key=key, state=JobState.queued.value, progress_done=0, progress_total=0,
                             progress_stage="queued", params=params, attempts=0, cancel_requested=False,
                             created_by=actor, created_at=db.utcnow())
                session.add(row)
                record_audit(session, actor=actor, action=f"training.{kind}.request", study_id=study_id,
                             subject=subject, detail={"job_id": row.job_id})
                session.flush()
                return _info(session, row), True
        except IntegrityError:
            continue
    raise Conflict("another request queued the same training at the same moment; retry")


def get_job(session: Session, job_id: str) -> JobInfo:
    """Snapshot of one job.

    Raises
    ------
    NotFound
        If there is no such job.
    """
    return _info(session, _row(session, job_id))


def list_jobs(session: Session, *, study_pk: int, state: JobState | None = None, limit: int = 100,
              offset: int = 0) -> tuple[list[JobInfo], int]:
    """One page of a study's jobs, newest first (optionally in one state), and the total count."""
    where = [db.Job.study_pk == study_pk] + ([] if state is None else [db.Job.state == state.value])
    total = session.scalar(select(func.count()).select_from(db.Job).where(*where)) or 0
    rows = session.execute(select(db.Job, db.Study.study_id, db.Participant.participant_id)
                           .join(db.Study, db.Study.pk == db.Job.study_pk)
                           .outerjoin(db.Participant, db.Participant.pk == db.Job.participant_pk)
                           .where(*where).order_by(db.Job.created_at.desc(), db.Job.pk.desc())
                           .limit(limit).offset(offset))
    return [JobInfo(job_id=row.job_id, kind=row.kind, study_id=study_id, participant_id=pid,
                    state=JobState(row.state), done=row.progress_done, total=row.progress_total,
                    stage=row.progress_stage, params=dict(row.params), result=row.result, error=row.error,
                    attempts=row.attempts, cancel_requested=row.cancel_requested, created_at=row.created_at,
                    started_at=row.started_at, finished_at=row.finished_at, lease_owner=row.lease_owner,
                    lease_expires_at=row.lease_expires_at) for row, study_id, pid in rows], int(total)


def cancel_job(session: Session, job_id: str, *, actor: str) -> JobInfo:
    """Cancel a job: a queued job at once, a running one at its next progress step.

    Cancelling a finished job changes nothing.
    """
    row = _row(session, job_id)
    if row.state == JobState.queued:
        row.state, row.active_key, row.finished_at = JobState.cancelled.value, None, db.utcnow()
        row.progress_stage = "cancelled"
    elif row.state == JobState.running:
        row.cancel_requested = True
    else:
        return _info(session, row)
    record_audit(session, actor=actor, action="job.cancel", study_id=_info(session, row).study_id,
                 subject=job_id)
    session.flush()
    return _info(session, row)


def withdraw_jobs(session: Session, *, participant_pk: int) -> list[str]:
    """End a withdrawn participant's queued and running trainings as cancelled (``participant_withdrawn``).

    Runs in the withdrawal's transaction, before the participant row is deleted: the jobs are detached
    from it (``participant_pk`` NULL, so they outlive it and stay readable by the study's analysts) and
    their lease is dropped, so a worker still training one stops at its next heartbeat or progress step
    and can store nothing. Returns the ids of the jobs ended.
    """
    rows = session.scalars(select(db.Job).where(db.Job.participant_pk == participant_pk,
                                                db.Job.state.in_([JobState.queued.value, JobState.running.value])))
    ended = []
    for row in rows.all():
        row.state, row.active_key, row.finished_at = JobState.cancelled.value, None, db.utcnow()
        row.lease_owner, row.lease_expires_at, row.participant_pk = None, None, None
        row.progress_stage = "cancelled"
        row.error = "participant_withdrawn: the participant was withdrawn from the study; nothing was stored"
        ended.append(row.job_id)
    session.flush()
    return ended


def count_jobs_by_state(session: Session, *, study_pk: int | None = None) -> dict[str, int]:
    """Number of jobs in each state (every state present, zeros included), of one study if given."""
    where = [] if study_pk is None else [db.Job.study_pk == study_pk]
    counts = dict(session.execute(select(db.Job.state, func.count()).where(*where).group_by(db.Job.state)).all())
    return {state.value: int(counts.get(state.value, 0)) for state in JobState}


class Claimer(abc.ABC):
    """How a worker takes the next job. One method; implementations must be safe under concurrency."""

    @abc.abstractmethod
    def claim(self, session: Session, *, worker_id: str, lease_s: float) -> db.Job | None:
        """Take the oldest claimable job for ``worker_id`` (running, lease set, attempts + 1).

        Claimable: queued, or running with an expired lease. Returns None if there is none or
        another worker won every candidate.
        """


def _claimable(now: datetime) -> Any:
    return or_(db.Job.state == JobState.queued.value,
               (db.Job.state == JobState.running.value) & (db.Job.lease_expires_at < now))


def _lease_values(worker_id: str, now: datetime, lease_s: float) -> dict[str, Any]:
    return {"state": JobState.running.value, "lease_owner": worker_id, "attempts": db.Job.attempts + 1,
            "lease_expires_at": now + timedelta(seconds=lease_s),
            "started_at": func.coalesce(db.Job.started_at, now)}


class SkipLockedClaimer(Claimer):
    """PostgreSQL claiming: ``SELECT ... FOR UPDATE SKIP LOCKED`` of the oldest claimable job.

    A row another worker is claiming at the same moment is skipped, not waited for, and the
    row lock is held until the claim commits, so exactly one worker takes each job.
    """

    def claim(self, session: Session, *, worker_id: str, lease_s: float) -> db.Job | None:
        now = db.utcnow()
        pk = session.scalar(select(db.Job.pk).where(_claimable(now)).order_by(db.Job.created_at, db.Job.pk)
                            .limit(1).with_for_update(skip_locked=True))
        if pk is None:
            return None
        session.execute(update(db.Job).where(db.Job.pk == pk).values(**_lease_values(worker_id, now, lease_s))
                        .execution_options(synchronize_session=False))
        return session.get(db.Job, pk, populate_existing=True)


class CompareAndSetClaimer(Claimer):
    """Portable claiming: select a candidate, then a conditional UPDATE that only one worker wins."""

    def __init__(self, *, candidates: int = 5) -> None:
        self.candidates = candidates

    def claim(self, session: Session, *, worker_id: str, lease_s: float) -> db.Job | None:
        now = db.utcnow()
        claimable = _claimable(now)
        for pk in session.scalars(select(db.Job.pk).where(claimable).order_by(db.Job.created_at, db.Job.pk)
                                  .limit(self.candidates)).all():
            won = session.execute(
                update(db.Job).where(db.Job.pk == pk, claimable).values(**_lease_values(worker_id, now, lease_s))
                .execution_options(synchronize_session=False))
            if won.rowcount == 1:  # type: ignore[attr-defined]
                return session.get(db.Job, pk, populate_existing=True)
        return None


def claimer_for(dialect_name: str) -> Claimer:
    """The claimer for a database: :class:`SkipLockedClaimer` on PostgreSQL, else compare-and-set."""
    return SkipLockedClaimer() if dialect_name == "postgresql" else CompareAndSetClaimer()


def claim_job(factory: sessionmaker[Session], *, worker_id: str, lease_s: float, max_attempts: int,
              claimer: Claimer | None = None) -> JobInfo | None:
    """Claim the next job; jobs claimed more than ``max_attempts`` times are failed instead.

    ``claimer`` defaults to :func:`claimer_for` the session's database.
    """
    while True:
        with db.session_scope(factory, write=True) as session:
            claimer = claimer or claimer_for(session.get_bind().dialect.name)
            row = claimer.claim(session, worker_id=worker_id, lease_s=lease_s)
            if row is None:
                return None
            if row.attempts <= max_attempts:
                row.progress_stage = "starting"
                return _info(session, row)
            row.state, row.active_key, row.finished_at = JobState.failed.value, None, db.utcnow()
            row.error = (f"the job was interrupted {max_attempts} times (its worker stopped or lost the "
                         "database); it was not retried again")
            row.lease_owner = None


def _owned(session: Session, job_id: str, worker_id: str) -> db.Job | None:
    row = session.scalar(select(db.Job).where(db.Job.job_id == job_id))
    if row is None or row.lease_owner != worker_id or row.state != JobState.running:
        return None
    return row


def heartbeat(factory: sessionmaker[Session], job_id: str, *, worker_id: str, lease_s: float) -> bool | None:
    """Extend the lease. Returns whether cancellation was requested, None if the lease was lost."""
    with db.session_scope(factory, write=True) as session:
        row = _owned(session, job_id, worker_id)
        if row is None:
            return None
        row.lease_expires_at = db.utcnow() + timedelta(seconds=lease_s)
        return row.cancel_requested


def report_progress(factory: sessionmaker[Session], job_id: str, *, worker_id: str, done: int, total: int,
                    stage: str) -> bool | None:
    """Record progress; returns whether cancellation was requested, None if the lease was lost."""
    with db.session_scope(factory, write=True) as session:
        row = _owned(session, job_id, worker_id)
        if row is None:
            return None
        row.progress_done, row.progress_total, row.progress_stage = int(done), int(total), stage[:64]
        return row.cancel_requested


def finish_job(factory: sessionmaker[Session], job_id: str, *, worker_id: str, state: JobState,
               result: dict[str, Any] | None = None, error: str | None = None) -> bool:
    """Record the outcome of a job this worker holds; False if the lease was lost meanwhile."""
    with db.session_scope(factory, write=True) as session:
        row = _owned(session, job_id, worker_id)
        if row is None:
            return False
        row.state, row.result, row.error = state.value, result, error
        row.active_key, row.lease_owner, row.finished_at = None, None, db.utcnow()
        row.progress_stage = state.value
        if state is JobState.succeeded:
            row.progress_done = row.progress_total = max(row.progress_total, row.progress_done, 1)
        return True


def release_job(factory: sessionmaker[Session], job_id: str, *, worker_id: str, stage: str = "queued") -> None:
    """Give a job back to the queue (a worker shutting down); it restarts from the beginning.

    ``stage`` is the status shown while it waits (default ``"queued"``), e.g. why it went back.
    """
    with db.session_scope(factory, write=True) as session:
        row = _owned(session, job_id, worker_id)
        if row is not None:
            row.state, row.lease_owner, row.lease_expires_at = JobState.queued.value, None, None
            row.attempts = max(row.attempts - 1, 0)
            row.progress_stage = stage[:64]
