"""Health check (no token) and Prometheus metrics."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Depends, Request
from fastapi.responses import PlainTextResponse
from sqlalchemy import text

from ...jobs.queue import count_jobs_by_state
from ...store.tokens import Principal, Role
from ...telemetry import METRICS_MEDIA_TYPE, Metrics
from ..deps import ReadSession, require_lab_role

__all__ = ["router"]

router = APIRouter(tags=["system"])


@router.get("/healthz", response_model=dict[str, str])
def healthz(session: ReadSession) -> dict[str, str]:
    """Liveness and database reachability (no token needed)."""
    session.execute(text("SELECT 1"))
    return {"status": "ok"}


@router.get("/metrics", response_class=PlainTextResponse,
            responses={200: {"content": {"text/plain": {"schema": {"type": "string"}}}}})
def metrics(request: Request, session: ReadSession,
            _: Annotated[Principal, Depends(require_lab_role(Role.ingest))]) -> PlainTextResponse:
    """Prometheus text: requests and latencies (every HTTP worker process), and jobs by state."""
    metrics: Metrics = request.app.state.metrics
    return PlainTextResponse(metrics.render(jobs_by_state=count_jobs_by_state(session)), media_type=METRICS_MEDIA_TYPE)
