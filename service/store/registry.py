"""Studies, participants and nights in the database; every function returns frozen snapshots.

Functions never return ORM rows, so callers cannot change stored state by accident: a change is
a function of this package (:func:`record_choice`, :func:`ingest_night`, the functions of
:mod:`service.store.manage`, ...). Snapshots carry the database key ``pk`` for the other store
functions. Writes add an audit entry in the same transaction. Ingest and its checks are in
:mod:`service.store.ingest` (re-exported here).
"""

from __future__ import annotations

import dataclasses
from typing import Any

from sqlalchemy import func, select, update
from sqlalchemy.orm import Session

from models import Night

from ..errors import Conflict, NotFound, Unprocessable
from . import db, versions
from .audit import record_audit
from .codec import night_from_row
from .ingest import STUDY_EPOCH_SECONDS, conform_epochs, ingest_night, night_values
from .snapshots import (
    ID_PATTERN,
    NightInfo,
    ParticipantInfo,
    ParticipantSummary,
    StudyInfo,
    check_id,
    night_snapshot,
    participant_snapshot,
    study_snapshot,
)

__all__ = [
    "ID_PATTERN",
    "NightInfo",
    "ParticipantInfo",
    "ParticipantSummary",
    "STUDY_EPOCH_SECONDS",
    "StudyInfo",
    "conform_epochs",
    "create_study",
    "find_participant",
    "find_study",
    "get_night",
    "ingest_night",
    "list_nights",
    "list_participants",
    "list_studies",
    "load_night",
    "load_nights",
    "night_row",
    "night_values",
    "participant_snapshot",
    "record_choice",
    "study_participants",
    "study_snapshot",
]


def find_study(session: Session, study_id: str) -> StudyInfo:
    """One study.

    Raises
    ------
    NotFound
        If there is no such study.
    """
    row = session.scalar(select(db.Study).where(db.Study.study_id == study_id))
    if row is None:
        raise NotFound(f"no study {study_id!r}")
    return study_snapshot(row)


def find_participant(session: Session, study: StudyInfo, participant_id: str) -> ParticipantInfo:
    """One participant of ``study``.

    Raises
    ------
    NotFound
        If the study has no such participant.
    """
    row = session.scalar(select(db.Participant).where(db.Participant.study_pk == study.pk,
                                                      db.Participant.participant_id == participant_id))
    if row is None:
        raise NotFound(f"no participant {participant_id!r} in study {study.study_id!r}")
    return participant_snapshot(row, study.study_id)


def study_participants(session: Session, *, study: StudyInfo) -> list[ParticipantInfo]:
    """Every participant of ``study``, ordered by id."""
    rows = session.scalars(select(db.Participant).where(db.Participant.study_pk == study.pk)
                           .order_by(db.Participant.participant_id))
    return [participant_snapshot(row, study.study_id) for row in rows]


def record_choice(session: Session, *, participant: ParticipantInfo, method: str | None,
                  choice: dict[str, Any] | None) -> ParticipantInfo:
    """Store the method a participant's nights are scored with, and why; returns the new snapshot."""
    session.execute(update(db.Participant).where(db.Participant.pk == participant.pk)
                    .values(chosen_method=method, choice=choice))
    return dataclasses.replace(participant, chosen_method=method, choice=None if choice is None else dict(choice))


def create_study(session: Session, *, study_id: str, name: str, actor: str, epoch_seconds: int = 30) -> StudyInfo:
    """Create a study.

    Parameters
    ----------
    epoch_seconds : int, default=30
        Epoch length of the study's stored nights, one of :data:`STUDY_EPOCH_SECONDS`; fixed
        for the study's life (nights of a shorter length that divides it are aggregated at ingest).

    Raises
    ------
    BadRequest
        If ``study_id`` is not a valid id.
    Unprocessable
        If ``epoch_seconds`` is not a study epoch length (code ``unsupported_study_epoch``).
    Conflict
        If the study exists already.
    """
    check_id(study_id, "study id")
    if epoch_seconds not in STUDY_EPOCH_SECONDS:
        raise Unprocessable(f"epoch_seconds {epoch_seconds!r} is not a study epoch length; use one of "
                         f"{list(STUDY_EPOCH_SECONDS)}", code="unsupported_study_epoch")
    if session.scalar(select(db.Study.pk).where(db.Study.study_id == study_id)) is not None:
        raise Conflict(f"study {study_id!r} exists already")
    row = db.Study(study_id=study_id, name=name, epoch_seconds=epoch_seconds, created_at=db.utcnow())
    session.add(row)
    record_audit(session, actor=actor, action="study.create", study_id=study_id, subject=study_id,
                 detail={"epoch_seconds": epoch_seconds})
    session.flush()
    return study_snapshot(row)


def list_studies(session: Session, *, study_id: str | None = None) -> list[StudyInfo]:
    """Every study, or only ``study_id`` (a study-scoped caller)."""
    query = select(db.Study).order_by(db.Study.study_id)
    if study_id is not None:
        query = query.where(db.Study.study_id == study_id)
    return [study_snapshot(s) for s in session.scalars(query)]


def list_participants(session: Session, *, study_id: str, limit: int = 100,
                      offset: int = 0) -> tuple[list[ParticipantSummary], int]:
    """One page of the study's participants (ordered by id) and the total count."""
    study = find_study(session, study_id)
    total = session.scalar(select(func.count()).select_from(db.Participant)
                           .where(db.Participant.study_pk == study.pk)) or 0
    rows = list(session.scalars(select(db.Participant).where(db.Participant.study_pk == study.pk)
                                .order_by(db.Participant.participant_id).limit(limit).offset(offset)))
    pks = [p.pk for p in rows]
    nights: dict[int, list[tuple[str, bool, bool]]] = {pk: [] for pk in pks}
    for pk, content_hash, has_labels, excluded in session.execute(
            select(db.Night.participant_pk, db.Night.content_hash, db.Night.labelled, db.Night.excluded)
            .where(db.Night.participant_pk.in_(pks))):
        nights[pk].append((content_hash, has_labels, excluded))
    active = versions.active_personal_versions(session, participant_pks=pks)
    out = []
    for p in rows:
        labelled = {h for h, is_labelled, _ in nights[p.pk] if is_labelled}
        trainable = {h for h, is_labelled, excluded in nights[p.pk] if is_labelled and not excluded}
        version = active.get(p.pk)
        trained = set() if version is None else set(version.metadata.training_hashes)
        out.append(ParticipantSummary(
            **vars(participant_snapshot(p, study_id)), n_nights=len(nights[p.pk]), n_labelled_nights=len(labelled),
            active_personal_version=None if version is None else version.version,
            untrained_labelled_nights=len(trainable - trained)))
    return out, int(total)


def list_nights(session: Session, *, study_id: str, participant_id: str, limit: int = 100,
                offset: int = 0) -> tuple[list[NightInfo], int]:
    """One page of a participant's nights (by start time) and the total count."""
    participant = find_participant(session, find_study(session, study_id), participant_id)
    total = session.scalar(select(func.count()).select_from(db.Night)
                           .where(db.Night.participant_pk == participant.pk)) or 0
    columns = [c for c in db.Night.__table__.columns if c.name not in ("counts", "reference")]
    rows = session.execute(select(*columns).where(db.Night.participant_pk == participant.pk)
                           .order_by(db.Night.start_utc, db.Night.pk).limit(limit).offset(offset))
    return [night_snapshot(row, participant_id) for row in rows], int(total)  # type: ignore[arg-type]


def night_row(session: Session, study_id: str, participant_id: str, night_id: str) -> db.Night:
    participant = find_participant(session, find_study(session, study_id), participant_id)
    row = session.scalar(select(db.Night).where(db.Night.participant_pk == participant.pk,
                                                db.Night.night_id == night_id))
    if row is None:
        raise NotFound(f"no night {night_id!r} for participant {participant_id!r}")
    return row


def get_night(session: Session, *, study_id: str, participant_id: str, night_id: str) -> NightInfo:
    """Metadata and QC flags of one night.

    Raises
    ------
    NotFound
        If the study, participant or night does not exist.
    """
    return night_snapshot(night_row(session, study_id, participant_id, night_id), participant_id)


def load_night(session: Session, *, study_id: str, participant_id: str, night_id: str) -> tuple[NightInfo, Night]:
    """One stored night with its data, as a :class:`models.Night`."""
    row = night_row(session, study_id, participant_id, night_id)
    return night_snapshot(row, participant_id), night_from_row(row, participant_id=participant_id)


def load_nights(session: Session, *, participant: ParticipantInfo, labelled_only: bool = False,
                include_excluded: bool = True) -> list[Night]:
    """A participant's nights in start order.

    Parameters
    ----------
    labelled_only : bool, default=False
        Only the labelled nights.
    include_excluded : bool, default=True
        Also the nights excluded from training (training passes False).
    """
    query = select(db.Night).where(db.Night.participant_pk == participant.pk).order_by(db.Night.start_utc)
    if labelled_only:
        query = query.where(db.Night.labelled)
    if not include_excluded:
        query = query.where(db.Night.excluded.is_(False))
    return [night_from_row(row, participant_id=participant.participant_id) for row in session.scalars(query)]
