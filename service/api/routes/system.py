"""Health check (no token) and Prometheus metrics."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, Request
from fastapi.responses import JSONResponse, PlainTextResponse
from pydantic import BaseModel, Field
from sqlalchemy import select, text

from ...jobs.health import count_jobs_by_study, queue_health
from ...jobs.queue import count_jobs_by_state
from ...store import db
from ...store.db import utcnow
from ...store.tokens import Principal, Role
from ...telemetry import METRICS_MEDIA_TYPE, Metrics
from ..deps import ReadSession, SettingsDep, require_lab_role

__all__ = ["router"]

router = APIRouter(tags=["system"])


class HealthOut(BaseModel):
    status: str = Field(description="'ok', or 'degraded' when trainings cannot progress")
    workers_alive: int = Field(description="training workers known to be running")
    jobs_queued: int
    oldest_queued_age_s: float | None = Field(description="seconds the oldest queued job has waited")
    problems: list[str] = Field(description="why the status is not ok")


@router.get("/healthz", response_model=HealthOut,
            responses={503: {"model": HealthOut, "description": "Jobs are queued and no training worker is alive"}})
def healthz(session: ReadSession, settings: SettingsDep) -> Any:
    """Database reachability, live training workers and the queue (no token needed); 503 when stuck."""
    session.execute(text("SELECT 1"))
    health = queue_health(session, now=utcnow(), lease_s=settings.lease_s)
    problems = [] if health.problem is None else [health.problem]
    body = HealthOut(status="degraded" if problems else "ok", workers_alive=health.workers_alive,
                     jobs_queued=health.jobs_queued, oldest_queued_age_s=health.oldest_queued_age_s,
                     problems=problems)
    return JSONResponse(body.model_dump(), status_code=503 if problems else 200)


@router.get("/metrics", response_class=PlainTextResponse,
            responses={200: {"content": {"text/plain": {"schema": {"type": "string"}}}}})
def metrics(request: Request, session: ReadSession,
            principal: Annotated[Principal, Depends(require_lab_role(Role.ingest))]) -> PlainTextResponse:
    """Prometheus text: requests and latencies (every HTTP worker process) and jobs by state.

    A study token gets its own study's job counts only; lab-wide admins also get them per study.
    """
    metrics: Metrics = request.app.state.metrics
    if principal.study_id is None:
        by_state = count_jobs_by_state(session)
        by_study = count_jobs_by_study(session) if principal.role >= Role.admin else None
    else:
        study_pk = session.scalar(select(db.Study.pk).where(db.Study.study_id == principal.study_id))
        by_state = count_jobs_by_state(session, study_pk=-1 if study_pk is None else study_pk)
        by_study = None
    return PlainTextResponse(metrics.render(jobs_by_state=by_state, jobs_by_study=by_study),
                             media_type=METRICS_MEDIA_TYPE)
