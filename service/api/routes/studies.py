"""Studies, participants, consent withdrawal and participant renames."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, Path, Query
from sqlalchemy.exc import IntegrityError

from ...errors import Conflict, Forbidden
from ...jobs.training import refresh_choices
from ...store import manage, registry
from ...store.db import session_scope
from ...store.tokens import Principal, Role
from ..deps import FactoryDep, ReadSession, StudyAccess, require_lab_role, study_access
from ..problems import problem_responses
from ..schemas import Page, ParticipantOut, RenameIn, RenameOut, StudyIn, StudyOut

__all__ = ["ParticipantPath", "router"]

router = APIRouter(prefix="/v1/studies", tags=["studies"])

ParticipantPath = Annotated[str, Path(pattern=registry.ID_PATTERN, description="participant id")]
Limit = Annotated[int, Query(ge=1, le=500, description="page size")]
Offset = Annotated[int, Query(ge=0, le=10**9, description="items to skip")]


@router.post("", status_code=201, response_model=StudyOut, responses=problem_responses(409))
def create_study(body: StudyIn, factory: FactoryDep,
                 principal: Annotated[Principal, Depends(require_lab_role(Role.admin))]) -> Any:
    """Create a study (admin; a study-scoped admin token may create its own study).

    `epoch_seconds` (30 or 60, default 30) is the epoch length every night of the study is stored
    at; it cannot change later.
    """
    if not principal.sees(body.study_id):
        raise Forbidden(f"this token is scoped to study {principal.study_id!r}")
    with session_scope(factory, write=True) as session:
        return registry.create_study(session, study_id=body.study_id, name=body.name, actor=principal.token_id,
                                     epoch_seconds=body.epoch_seconds)


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
        return manage.delete_participant(session, study_id=access.study_id, participant_id=pid, actor=access.actor)


@router.post("/{study}/participants/{pid}/rename", response_model=RenameOut, responses=problem_responses(409))
def rename_participant(access: Annotated[StudyAccess, Depends(study_access(Role.admin))], pid: ParticipantPath,
                       body: RenameIn, factory: FactoryDep,
                       allow_overlap: Annotated[bool, Query(
                           description="merge even if moving nights overlap nights of the target")] = False) -> Any:
    """Give a participant another id, merging it into the participant of that id if there is one (admin; audited).

    Without a participant `to` the participant simply takes the new id. Otherwise its nights move
    to `to`, except those whose content `to` already has: they are dropped as duplicates
    (`duplicates_dropped`). Personal model versions stay readable under `to`: they get new
    numbers after every number `to` has had (`personal_versions` maps them), as candidates when
    `to` has an active version. Refused with 409 while a training of the participant is queued or
    running (`training_in_progress`), when `to` differs from another participant's id only by
    case (`participant_id_case_clash`), and when a night that would move overlaps in time,
    [start, end), a night of `to` (`overlapping_night`, naming both; `allow_overlap=true` merges anyway).
    """
    try:
        with session_scope(factory, write=True) as session:
            out = manage.rename_participant(session, study_id=access.study_id, participant_id=pid, to=body.to,
                                            actor=access.actor, allow_overlap=allow_overlap)
            study = registry.find_study(session, access.study_id)
            refresh_choices(session, study=study, participants=[registry.find_participant(session, study, body.to)])
            return out
    except IntegrityError as exc:
        raise Conflict(f"participant {pid!r} could not be renamed to {body.to!r}: a concurrent change conflicted; "
                       "try again", code="concurrent_change") from exc
