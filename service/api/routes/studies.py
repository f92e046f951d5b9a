"""Studies, participants and consent withdrawal."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, Path, Query

from ...errors import Forbidden
from ...store import registry
from ...store.db import session_scope
from ...store.tokens import Principal, Role
from ..deps import FactoryDep, ReadSession, StudyAccess, require_lab_role, study_access
from ..problems import problem_responses
from ..schemas import Page, ParticipantOut, StudyIn, StudyOut

__all__ = ["ParticipantPath", "router"]

router = APIRouter(prefix="/v1/studies", tags=["studies"])

ParticipantPath = Annotated[str, Path(pattern=registry.ID_PATTERN, description="participant id")]
Limit = Annotated[int, Query(ge=1, le=500, description="page size")]
Offset = Annotated[int, Query(ge=0, le=10**9, description="items to skip")]


@router.post("", status_code=201, response_model=StudyOut, responses=problem_responses(409))
def create_study(body: StudyIn, factory: FactoryDep,
                 principal: Annotated[Principal, Depends(require_lab_role(Role.admin))]) -> Any:
    """Create a study (admin; a study-scoped admin token may create its own study)."""
    if not principal.sees(body.study_id):
        raise Forbidden(f"this token is scoped to study {principal.study_id!r}")
    with session_scope(factory, write=True) as session:
        return registry.create_study(session, study_id=body.study_id, name=body.name, actor=principal.token_id)


@router.get("", response_model=list[StudyOut])
def list_studies(session: ReadSession,
                 principal: Annotated[Principal, Depends(require_lab_role(Role.ingest))]) -> Any:
    """Studies the token can see."""
    return registry.list_studies(session, study_id=principal.study_id)


@router.get("/{study}/participants", response_model=Page[ParticipantOut])
def list_participants(access: Annotated[StudyAccess, Depends(study_access(Role.ingest))], session: ReadSession,
                      limit: Limit = 100, offset: Offset = 0) -> Any:
    """Participants of a study, with night counts and whether a retrain would use more nights."""
    items, total = registry.list_participants(session, study_id=access.study_id, limit=limit, offset=offset)
    data = [ParticipantOut(**vars(p), retrain_would_add_nights=p.untrained_labelled_nights > 0) for p in items]
    return Page[ParticipantOut](data=data, count=total, limit=limit, offset=offset)


@router.delete("/{study}/participants/{pid}", response_model=dict[str, int])
def delete_participant(access: Annotated[StudyAccess, Depends(study_access(Role.admin))], pid: ParticipantPath,
                       factory: FactoryDep) -> Any:
    """Withdraw a participant: remove nights, models and cached scorings; keep an audit record (admin)."""
    with session_scope(factory, write=True) as session:
        return registry.delete_participant(session, study_id=access.study_id, participant_id=pid, actor=access.actor)
