"""Form actions of the pages: start a training job, and the job status read by the progress bar.

Training goes through the service's job queue (:func:`service.jobs.training.queue_training`), exactly like
``POST /v1/studies/{study}/.../training``: the same checks, the same one-job-per-target rule,
and the same audit record. The status route is the page-session twin of ``GET /v1/jobs/{id}``
(the page's script cannot send the bearer token: the cookie is HttpOnly).
"""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, Form, Path, Request
from fastapi.responses import RedirectResponse

from ..api.deps import FactoryDep, SettingsDep
from ..errors import Forbidden, NotFound
from ..jobs import queue as jobs
from ..jobs.training import queue_training
from ..store.db import session_scope
from ..store.tokens import Principal, Role
from .access import CSRF_FIELD, UI_PREFIX, StudyPage, check_form, page_principal
from .pages import ParticipantPath

__all__ = ["router"]

router = APIRouter()
Trials = Annotated[int | None, Form(ge=1, le=500, description="hyper-parameter trials per search")]
FormToken = Annotated[str | None, Form(alias=CSRF_FIELD, max_length=200, description="the page's form token")]


def _params(n_trials: int | None, default: int) -> dict[str, Any]:
    return {"n_trials": n_trials or default, "seed": 0}


@router.post("/studies/{study}/participants/{pid}/training")
def train_personal(request: Request, access: StudyPage, pid: ParticipantPath, factory: FactoryDep,
                   settings: SettingsDep, n_trials: Trials = None, csrf: FormToken = None) -> RedirectResponse:
    """Queue a personal training (analyst) and go back to the participant page, which shows its progress."""
    access.require(Role.analyst)
    check_form(request, csrf)
    job, _ = queue_training(factory, study_id=access.study_id, participant_id=pid,
                            params=_params(n_trials, settings.n_trials), actor=access.actor)
    return RedirectResponse(f"{UI_PREFIX}/studies/{access.study_id}/participants/{pid}?job={job.job_id}#training",
                            status_code=303)


@router.post("/studies/{study}/pooled/training")
def train_pooled(request: Request, access: StudyPage, factory: FactoryDep, settings: SettingsDep,
                 n_trials: Trials = None, csrf: FormToken = None) -> RedirectResponse:
    """Queue the study's pooled training (analyst) and go back to the study page."""
    access.require(Role.analyst)
    check_form(request, csrf)
    job, _ = queue_training(factory, study_id=access.study_id, participant_id=None,
                            params=_params(n_trials, settings.n_trials), actor=access.actor)
    return RedirectResponse(f"{UI_PREFIX}/studies/{access.study_id}?job={job.job_id}#training", status_code=303)


@router.get("/jobs/{job_id}.json")
def job_status(job_id: Annotated[str, Path(pattern=r"^[0-9a-f]{32}$")], factory: FactoryDep,
               principal: Annotated[Principal, Depends(page_principal)]) -> dict[str, Any]:
    """State and progress of a training job the signed-in token may see (analyst)."""
    if principal.role < Role.analyst:
        raise Forbidden(f"job status needs the analyst role; your token has {principal.role.name}")
    with session_scope(factory) as session:
        job = jobs.get_job(session, job_id)
    if not principal.sees(job.study_id):
        raise NotFound(f"no job {job_id!r}")
    return {"job_id": job.job_id, "kind": job.kind, "participant_id": job.participant_id, "state": job.state.value,
            "finished": job.state.is_finished(), "done": job.done, "total": job.total, "stage": job.stage,
            "error": job.error, "result": job.result}
