"""Training requests, jobs and cancellation, model versions and their activation."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from fastapi import APIRouter, Body, Depends, Path, Query
from fastapi.responses import JSONResponse
from sqlalchemy.orm import Session

from ...errors import NotFound
from ...jobs import queue as jobs
from ...jobs.queue import JobInfo
from ...jobs.training import queue_training, refresh_choices
from ...store import registry, versions
from ...store.db import session_scope, utcnow
from ...store.tokens import Principal, Role
from ..deps import FactoryDep, ReadSession, SettingsDep, StudyAccess, require_lab_role, study_access
from ..problems import problem_responses
from ..schemas import (
    ActivationOut,
    FlaggedTrainingNightOut,
    JobAccepted,
    JobOut,
    ModelVersionOut,
    Page,
    Progress,
    TrainingIn,
)
from .studies import Limit, Offset, ParticipantPath

__all__ = ["router"]

router = APIRouter(tags=["training"])
AnalystAccess = Annotated[StudyAccess, Depends(study_access(Role.analyst))]
AdminAccess = Annotated[StudyAccess, Depends(study_access(Role.admin))]
VersionPath = Annotated[int, Path(ge=1, le=10**9, description="model version number")]
OptionalTraining = Annotated[TrainingIn | None, Body()]
_ACCEPTED = {200: {"model": JobAccepted, "description": "A training of the same target is already queued or running"},
             **problem_responses(409)}


def _accepted(job: JobInfo, created: bool) -> JSONResponse:
    body = JobAccepted(job_id=job.job_id, state=job.state.value, created=created)
    return JSONResponse(body.model_dump(), status_code=202 if created else 200)


def _params(body: TrainingIn | None, default_trials: int) -> dict[str, Any]:
    body = body or TrainingIn()
    return {"n_trials": body.n_trials or default_trials, "seed": 0 if body.seed is None else body.seed}


@router.post("/v1/studies/{study}/participants/{pid}/training", status_code=202, response_model=JobAccepted,
             responses=_ACCEPTED)
def train_personal(access: AnalystAccess, pid: ParticipantPath, factory: FactoryDep, settings: SettingsDep,
                   body: OptionalTraining = None) -> Any:
    """Queue the training of a participant's personal model (returns the running job if one exists)."""
    job, created = queue_training(factory, study_id=access.study_id, participant_id=pid,
                                  params=_params(body, settings.n_trials), actor=access.actor)
    return _accepted(job, created)


@router.post("/v1/studies/{study}/pooled/training", status_code=202, response_model=JobAccepted, responses=_ACCEPTED)
def train_pooled(access: AnalystAccess, factory: FactoryDep, settings: SettingsDep,
                 body: OptionalTraining = None) -> Any:
    """Queue the training of the study's pooled model (returns the running job if one exists)."""
    job, created = queue_training(factory, study_id=access.study_id, participant_id=None,
                                  params=_params(body, settings.n_trials), actor=access.actor)
    return _accepted(job, created)


def _job_out(job: JobInfo) -> JobOut:
    now = utcnow()
    lease = job.lease_state(now)
    reason = None
    if job.state is jobs.JobState.cancelled:
        reason = (job.error or "").split(":", 1)[0] if job.error else "cancel_requested"
    return JobOut(job_id=job.job_id, kind=job.kind, study_id=job.study_id, participant_id=job.participant_id,
                  state=job.state.value, progress=Progress(done=job.done, total=job.total, stage=job.stage),
                  error=job.error, result=job.result, attempts=job.attempts, created_at=job.created_at,
                  started_at=job.started_at, finished_at=job.finished_at, lease=lease,  # type: ignore[arg-type]
                  worker=job.lease_owner if lease else None, taken_over_by=job.taken_over_by(now), reason=reason)


def _visible_job(session: Any, job_id: str, principal: Principal) -> JobInfo:
    job = jobs.get_job(session, job_id)
    if not principal.sees(job.study_id):
        raise NotFound(f"no job {job_id!r}")
    return job


JobPath = Annotated[str, Path(pattern=r"^[0-9a-f]{32}$", description="job id")]
AnalystDep = Annotated[Principal, Depends(require_lab_role(Role.analyst))]


@router.get("/v1/jobs/{job_id}", response_model=JobOut)
def get_job(job_id: JobPath, session: ReadSession, principal: AnalystDep) -> Any:
    """State, progress, error and result of a training job."""
    return _job_out(_visible_job(session, job_id, principal))


@router.get("/v1/studies/{study}/jobs", response_model=Page[JobOut])
def list_jobs(access: AnalystAccess, session: ReadSession, limit: Limit = 100, offset: Offset = 0,
              state: Annotated[Literal["queued", "running", "succeeded", "failed", "cancelled"] | None,
                               Query(description="only jobs in this state")] = None) -> Any:
    """The study's training jobs, newest first (analyst)."""
    study = registry.find_study(session, access.study_id)
    items, total = jobs.list_jobs(session, study_pk=study.pk, state=None if state is None else jobs.JobState(state),
                                  limit=limit, offset=offset)
    return Page[JobOut](data=[_job_out(j) for j in items], count=total, limit=limit, offset=offset)


@router.post("/v1/jobs/{job_id}/cancel", response_model=JobOut)
def cancel_job(job_id: JobPath, factory: FactoryDep, principal: AnalystDep) -> Any:
    """Cancel a job: at once when queued, at its next progress step when running."""
    with session_scope(factory, write=True) as session:
        _visible_job(session, job_id, principal)
        return _job_out(jobs.cancel_job(session, job_id, actor=principal.token_id))


def _version_out(v: versions.VersionInfo) -> ModelVersionOut:
    meta = v.metadata
    return ModelVersionOut(
        version=v.version, kind=v.kind, active=v.active, status=v.status, created_at=v.created_at, job_id=v.job_id,  # type: ignore[arg-type]
        n_training_nights=len(meta.training_nights), metrics=meta.metrics.as_dict(), threshold=meta.threshold,
        offset=meta.offset, offset_rule=meta.offset_rule, feature_set_version=meta.feature_set_version,
        hyperparameters=meta.hyperparameters,
        library_versions=meta.library_versions, training_nights=[n.model_dump() for n in meta.training_nights],
        trained_on_deleted_nights=list(v.trained_on_deleted_nights),
        removed_held_out_nights=list(meta.removed_held_out_nights),
        flagged_training_nights=[FlaggedTrainingNightOut.model_validate(n.model_dump())
                                 for n in meta.flagged_nights],
        activation=None if meta.activation is None else ActivationOut.model_validate(meta.activation.model_dump()))


def _owner(session: Session, study_id: str,
           pid: str | None) -> tuple[registry.StudyInfo, registry.ParticipantInfo | None]:
    study = registry.find_study(session, study_id)
    return study, None if pid is None else registry.find_participant(session, study, pid)


@router.get("/v1/studies/{study}/participants/{pid}/models", response_model=list[ModelVersionOut])
def list_personal_models(access: AnalystAccess, pid: ParticipantPath, session: ReadSession) -> Any:
    """A participant's personal model versions, newest first, with metrics and which is active."""
    study, participant = _owner(session, access.study_id, pid)
    return [_version_out(v) for v in versions.list_versions(session, study=study, participant=participant)]


@router.post("/v1/studies/{study}/participants/{pid}/models/{version}/activate", response_model=ModelVersionOut)
def activate_personal_model(access: AdminAccess, pid: ParticipantPath, version: VersionPath,
                            factory: FactoryDep) -> Any:
    """Make a personal model version the active one (promotion or rollback; admin)."""
    with session_scope(factory, write=True) as session:
        study, participant = _owner(session, access.study_id, pid)
        assert participant is not None  # pid names one
        out = versions.activate_version(session, study=study, participant=participant, version=version,
                                        actor=access.actor)
        refresh_choices(session, study=study, participants=[participant])
        return _version_out(out)


@router.get("/v1/studies/{study}/pooled/models", response_model=list[ModelVersionOut])
def list_pooled_models(access: AnalystAccess, session: ReadSession) -> Any:
    """The study's pooled model versions, newest first, with metrics and which is active."""
    study, _ = _owner(session, access.study_id, None)
    return [_version_out(v) for v in versions.list_versions(session, study=study, participant=None)]


@router.post("/v1/studies/{study}/pooled/models/{version}/activate", response_model=ModelVersionOut)
def activate_pooled_model(access: AdminAccess, version: VersionPath, factory: FactoryDep) -> Any:
    """Make a pooled model version the active one (promotion or rollback; admin)."""
    with session_scope(factory, write=True) as session:
        study, _ = _owner(session, access.study_id, None)
        out = versions.activate_version(session, study=study, participant=None, version=version, actor=access.actor)
        refresh_choices(session, study=study)
        return _version_out(out)
