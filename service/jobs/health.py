"""Whether trainings can make progress: live workers and the age of the oldest queued job.

A worker is *live* when it is one of the serving supervisor's processes that is running
(:mod:`service.jobs.supervisor`), or when it holds an unexpired lease on a job (workers on other
machines are seen this way while they train). Idle workers elsewhere are not visible to the API:
with no supervised workers (``serve --job-workers 0``), a queued job that no worker claimed for
one lease period (``lease_s``) is taken as the sign that none is polling.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from ..store import db
from .queue import JobState
from .supervisor import read_status

__all__ = ["QueueHealth", "count_jobs_by_study", "queue_health"]


@dataclass(frozen=True)
class QueueHealth:
    """Live workers, queued jobs and whether trainings can progress (``problem`` None when they can)."""

    workers_alive: int
    supervised_workers: int | None
    jobs_queued: int
    oldest_queued_age_s: float | None
    problem: str | None


def queue_health(session: Session, *, now: datetime, lease_s: float) -> QueueHealth:
    """Read the queue and the supervisor status; see the module text for what counts as live."""
    status = read_status()
    local = set() if status is None else {f"{status.host}:{pid}:" for pid in status.pids}
    owners = session.scalars(select(db.Job.lease_owner).where(
        db.Job.state == JobState.running.value, db.Job.lease_expires_at >= now,
        db.Job.lease_owner.is_not(None)).distinct()).all()
    remote = {o for o in owners if o and not any(o.startswith(p) for p in local)}
    alive = len(remote) + (0 if status is None else len(status.pids))
    queued, oldest = session.execute(select(func.count(), func.min(db.Job.created_at)).where(
        db.Job.state == JobState.queued.value)).one()
    if oldest is not None and oldest.tzinfo is None:
        oldest = oldest.replace(tzinfo=UTC)
    age_s = None if oldest is None else max((now - oldest).total_seconds(), 0.0)
    problem = None
    if queued and alive == 0 and (status is not None or (age_s or 0.0) > lease_s):
        where = "this server's training workers are all down" if status is not None else \
            f"no worker claimed a job for {age_s:.0f} s"
        problem = f"{queued} training job(s) queued and no training worker alive ({where})"
    return QueueHealth(workers_alive=alive, supervised_workers=None if status is None else len(status.pids),
                       jobs_queued=int(queued), oldest_queued_age_s=age_s, problem=problem)


def count_jobs_by_study(session: Session) -> dict[str, dict[str, int]]:
    """Jobs per study id and state (every study and state present, zeros included)."""
    out = {str(sid): {state.value: 0 for state in JobState} for sid in session.scalars(select(db.Study.study_id))}
    for sid, state, n in session.execute(select(db.Study.study_id, db.Job.state, func.count())
                                         .join(db.Job, db.Job.study_pk == db.Study.pk)
                                         .group_by(db.Study.study_id, db.Job.state)):
        out[str(sid)][str(state)] = int(n)
    return out
