"""Studies, participants and nights in the database; every function returns frozen snapshots.

Functions never return ORM rows, so callers cannot change stored state by accident: a change is
a function of this package (:func:`record_choice`, :func:`delete_participant`, ...). Snapshots
carry the database key ``pk`` for the other store functions. Writes add an audit entry in the
same transaction.
"""

from __future__ import annotations

import dataclasses
import re
from typing import Any

from sqlalchemy import delete, func, select, update
from sqlalchemy.orm import Session

from models import Night, quality_flags

from ..errors import BadRequest, Conflict, NotFound
from . import db, versions
from .audit import record_audit
from .codec import night_columns, night_from_row
from .snapshots import NightInfo, ParticipantInfo, ParticipantSummary, StudyInfo

__all__ = [
    "ID_PATTERN",
    "NightInfo",
    "ParticipantInfo",
    "ParticipantSummary",
    "StudyInfo",
    "create_study",
    "delete_participant",
    "find_participant",
    "find_study",
    "get_night",
    "ingest_night",
    "list_nights",
    "list_participants",
    "list_studies",
    "load_night",
    "load_nights",
    "night_values",
    "participant_snapshot",
    "record_choice",
    "study_participants",
    "study_snapshot",
]

#: Study and participant ids: letters, digits, ``.``, ``_`` and ``-``; 1 to 64 characters.
ID_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$"
_ID = re.compile(ID_PATTERN)


def _check_id(value: str, what: str) -> None:
    if not _ID.match(value):
        raise BadRequest(f"{what} {value!r} is not valid: use 1-64 letters, digits, '.', '_' or '-' "
                         "starting with a letter or digit")


def _night_info(row: db.Night, participant_id: str) -> NightInfo:
    return NightInfo(night_id=row.night_id, participant_id=participant_id, content_hash=row.content_hash,
                     label=row.label, start=row.start, epoch_seconds=row.epoch_seconds, n_epochs=row.n_epochs,
                     lights_off=row.lights_off, lights_on=row.lights_on, labelled=row.labelled, qc=list(row.qc),
                     source_format=row.source_format, created_at=row.created_at)


def study_snapshot(row: db.Study) -> StudyInfo:
    """The snapshot of a study row (for store queries that join rows themselves)."""
    return StudyInfo(study_id=row.study_id, name=row.name, created_at=row.created_at, pk=row.pk)


def participant_snapshot(row: db.Participant, study_id: str) -> ParticipantInfo:
    """The snapshot of a participant row of study ``study_id``."""
    return ParticipantInfo(participant_id=row.participant_id, study_id=study_id, created_at=row.created_at,
                           chosen_method=row.chosen_method, choice=None if row.choice is None else dict(row.choice),
                           pk=row.pk)


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


def create_study(session: Session, *, study_id: str, name: str, actor: str) -> StudyInfo:
    """Create a study.

    Raises
    ------
    BadRequest
        If ``study_id`` is not a valid id.
    Conflict
        If the study exists already.
    """
    _check_id(study_id, "study id")
    if session.scalar(select(db.Study.pk).where(db.Study.study_id == study_id)) is not None:
        raise Conflict(f"study {study_id!r} exists already")
    row = db.Study(study_id=study_id, name=name, created_at=db.utcnow())
    session.add(row)
    record_audit(session, actor=actor, action="study.create", study_id=study_id, subject=study_id)
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
    nights: dict[int, list[tuple[str, bool]]] = {pk: [] for pk in pks}
    for pk, content_hash, has_labels in session.execute(
            select(db.Night.participant_pk, db.Night.content_hash, db.Night.labelled)
            .where(db.Night.participant_pk.in_(pks))):
        nights[pk].append((content_hash, has_labels))
    active = versions.active_personal_versions(session, participant_pks=pks)
    out = []
    for p in rows:
        labelled = {h for h, is_labelled in nights[p.pk] if is_labelled}
        version = active.get(p.pk)
        trained = set() if version is None else set(version.metadata.training_hashes)
        out.append(ParticipantSummary(
            **vars(participant_snapshot(p, study_id)), n_nights=len(nights[p.pk]), n_labelled_nights=len(labelled),
            active_personal_version=None if version is None else version.version,
            untrained_labelled_nights=len(labelled - trained)))
    return out, int(total)


def night_values(night: Night, *, source_format: str) -> dict[str, Any]:
    """Column values of a new ``nights`` row: encoded arrays and QC flags (no database access).

    Computed before the write transaction so that the transaction stays short.
    """
    return {"qc": [f.to_dict() for f in quality_flags(night)], "source_format": source_format, **night_columns(night)}


def ingest_night(session: Session, *, study_id: str, night: Night, source_format: str, actor: str,
                 values: dict[str, Any] | None = None) -> tuple[NightInfo, bool]:
    """Store a validated night; the participant is created with its first night.

    Idempotent: a night with the same content hash as a stored night of the participant is not
    stored again. ``values`` are the row values from :func:`night_values` (computed here if not
    given).

    Returns
    -------
    info : NightInfo
    created : bool
        False if the content was already stored (``info`` is then the stored night).

    Raises
    ------
    NotFound
        If the study does not exist.
    """
    _check_id(night.participant_id, "participant id")
    study = find_study(session, study_id)
    participant = session.scalar(select(db.Participant).where(db.Participant.study_pk == study.pk,
                                                              db.Participant.participant_id == night.participant_id))
    if participant is None:
        participant = db.Participant(study_pk=study.pk, participant_id=night.participant_id, created_at=db.utcnow())
        session.add(participant)
        session.flush()
        record_audit(session, actor=actor, action="participant.create", study_id=study_id,
                     subject=night.participant_id)
    else:
        existing = session.scalar(select(db.Night).where(db.Night.participant_pk == participant.pk,
                                                         db.Night.content_hash == night.content_hash))
        if existing is not None:
            return _night_info(existing, night.participant_id), False
    values = values or night_values(night, source_format=source_format)
    row = db.Night(participant_pk=participant.pk, created_at=db.utcnow(), **values)
    session.add(row)
    session.flush()
    record_audit(session, actor=actor, action="night.create", study_id=study_id, subject=night.participant_id,
                 detail={"night_id": row.night_id, "epochs": row.n_epochs, "labelled": row.labelled})
    return _night_info(row, night.participant_id), True


def list_nights(session: Session, *, study_id: str, participant_id: str, limit: int = 100,
                offset: int = 0) -> tuple[list[NightInfo], int]:
    """One page of a participant's nights (by start time) and the total count."""
    participant = find_participant(session, find_study(session, study_id), participant_id)
    total = session.scalar(select(func.count()).select_from(db.Night)
                           .where(db.Night.participant_pk == participant.pk)) or 0
    columns = [c for c in db.Night.__table__.columns if c.name not in ("counts", "reference")]
    rows = session.execute(select(*columns).where(db.Night.participant_pk == participant.pk)
                           .order_by(db.Night.start_utc, db.Night.pk).limit(limit).offset(offset))
    return [_night_info(row, participant_id) for row in rows], int(total)  # type: ignore[arg-type]


def _night_row(session: Session, study_id: str, participant_id: str, night_id: str) -> db.Night:
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
    return _night_info(_night_row(session, study_id, participant_id, night_id), participant_id)


def load_night(session: Session, *, study_id: str, participant_id: str, night_id: str) -> tuple[NightInfo, Night]:
    """One stored night with its data, as a :class:`models.Night`."""
    row = _night_row(session, study_id, participant_id, night_id)
    return _night_info(row, participant_id), night_from_row(row, participant_id=participant_id)


def load_nights(session: Session, *, participant: ParticipantInfo, labelled_only: bool = False) -> list[Night]:
    """A participant's nights in start order (only the labelled ones on request)."""
    query = select(db.Night).where(db.Night.participant_pk == participant.pk).order_by(db.Night.start_utc)
    if labelled_only:
        query = query.where(db.Night.labelled)
    return [night_from_row(row, participant_id=participant.participant_id) for row in session.scalars(query)]


def delete_participant(session: Session, *, study_id: str, participant_id: str, actor: str) -> dict[str, int]:
    """Remove a participant after consent withdrawal.

    Deletes the participant's nights, cached scorings, personal model versions and training jobs,
    and every pooled model version trained on their nights (those models hold information from
    them). The audit log keeps a record of the deletion (participant id and the numbers removed).

    Returns
    -------
    removed : dict
        ``nights``, ``scorings``, ``personal_versions``, ``pooled_versions`` removed.
    """
    study = find_study(session, study_id)
    participant = find_participant(session, study, participant_id)
    night_pks = select(db.Night.pk).where(db.Night.participant_pk == participant.pk)
    pooled = [v for v in versions.list_versions(session, study=study, participant=None)
              if participant_id in v.metadata.participants]
    removed = {
        "nights": session.scalar(select(func.count()).select_from(db.Night)
                                 .where(db.Night.participant_pk == participant.pk)) or 0,
        "scorings": session.scalar(select(func.count()).select_from(db.Scoring)
                                   .where(db.Scoring.night_pk.in_(night_pks))) or 0,
        "personal_versions": session.scalar(select(func.count()).select_from(db.ModelVersion)
                                            .where(db.ModelVersion.participant_pk == participant.pk)) or 0,
        "pooled_versions": len(pooled),
    }
    for version in pooled:
        session.execute(delete(db.ModelVersion).where(db.ModelVersion.pk == version.pk))
    # foreign keys cascade to nights, scorings, personal versions and jobs
    session.execute(delete(db.Participant).where(db.Participant.pk == participant.pk))
    record_audit(session, actor=actor, action="participant.delete", study_id=study_id, subject=participant_id,
                 detail={k: int(v) for k, v in removed.items()})
    return {k: int(v) for k, v in removed.items()}
