"""Continuous recordings in the database: ingest, listing, loading, derived periods and nights, deletion.

A recording is stored whole in one row (compressed arrays, :mod:`service.store.recording_codec`).
Its main sleep periods are nights of the participant (``nights.recording_pk``) that hold no counts
of their own: loading one slices the recording. They are scored, listed, labelled and trained on
like any posted night. Whatever changes the periods (a diary, a PSG reference) replaces these
nights in the same write transaction as the change, so nothing is ever half-stored; every write
adds an audit entry there.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any

import pandas as pd
from sqlalchemy import delete, func, select
from sqlalchemy.orm import Session

from models import DiaryDay, Recording

from ..errors import Conflict, NotFound
from . import db, version_edits
from .audit import record_audit
from .codec import encode_reference, night_columns
from .ingest import case_clash, lock_study
from .recording_codec import diary_from_records, period_record, recording_from_row
from .recording_nights import Derived
from .registry import find_participant, find_study
from .snapshots import ParticipantInfo, StudyInfo, check_id, study_snapshot

__all__ = ["RecordingInfo", "delete_recording", "ingest_recording", "labelled_nights", "list_recordings",
           "load_recording", "recording_of_night", "recording_row", "recording_snapshot", "replace_derived"]


@dataclass(frozen=True)
class RecordingInfo:
    """A stored recording's metadata and what was derived from it (no epoch data).

    ``periods`` are stored period records (epoch indices, kind, source, conflicts, and the
    ``night_id`` of each main period's night); ``nonwear`` the non-wear intervals as epoch indices;
    ``references`` the posted PSG references with the clock offset applied to each.
    """

    recording_id: str
    participant_id: str
    content_hash: str
    start: pd.Timestamp
    end: pd.Timestamp
    epoch_seconds: int
    source_epoch_seconds: int | None
    n_epochs: int
    source_format: str
    source_name: str | None
    tz: str | None
    diary: list[dict[str, Any]] | None
    nonwear: list[dict[str, Any]]
    periods: list[dict[str, Any]]
    references: list[dict[str, Any]]
    created_at: datetime
    pk: int

    def epoch_time(self, index: int) -> pd.Timestamp:
        """Start of epoch ``index`` on the recording's clock (its zone)."""
        return self.start + pd.Timedelta(seconds=self.epoch_seconds * int(index))


def recording_snapshot(row: db.RecordingRow, participant_id: str) -> RecordingInfo:
    start = pd.Timestamp(row.start)
    if row.tz:
        start = start.tz_convert(row.tz)
    return RecordingInfo(recording_id=row.recording_id, participant_id=participant_id, content_hash=row.content_hash,
                         start=start, end=start + pd.Timedelta(seconds=row.epoch_seconds * row.n_epochs),
                         epoch_seconds=row.epoch_seconds, source_epoch_seconds=row.source_epoch_seconds,
                         n_epochs=row.n_epochs, source_format=row.source_format, source_name=row.source_name,
                         tz=row.tz, diary=None if row.diary is None else list(row.diary),
                         nonwear=list(row.nonwear), periods=list(row.periods), references=list(row.references),
                         created_at=row.created_at, pk=row.pk)


def _drop_nights(session: Session, *, study: StudyInfo, night_pks: list[int]) -> list[str]:
    """Remove nights of a recording (scorings and features too); versions trained on them are marked."""
    if not night_pks:
        return []
    rows = session.execute(select(db.Night.content_hash, db.Night.night_id, db.Night.label, db.Participant.pk,
                                  db.Participant.participant_id)
                           .join(db.Participant, db.Participant.pk == db.Night.participant_pk)
                           .where(db.Night.pk.in_(night_pks))).all()
    for table in (db.Scoring, db.NightFeatures):
        session.execute(delete(table).where(table.night_pk.in_(night_pks)))  # type: ignore[attr-defined]
    session.execute(delete(db.Night).where(db.Night.pk.in_(night_pks)))
    session.flush()
    for content_hash, night_id, label, participant_pk, participant_id in rows:
        version_edits.forget_deleted_night(session, study=study, participant_pk=participant_pk,
                                           participant_id=participant_id, content_hash=content_hash,
                                           night_id=night_id, label=label)
    return [row.night_id for row in rows]


def replace_derived(session: Session, *, study: StudyInfo, row: db.RecordingRow, participant_pk: int,
                    derived: Derived, source_epoch_seconds: int | None = None) -> dict[str, Any]:
    """Store non-wear, periods and the main periods' nights of ``row``, replacing the previous ones.

    A night whose content the participant already has (a posted night, or the same period
    unchanged) keeps that row, so labels, exclusions and cached scorings of an unchanged period stay.

    Returns
    -------
    changed : dict
        ``nights_removed`` and ``nights_added`` (night ids).
    """
    kept = {h: (pk, nid) for h, pk, nid in session.execute(
        select(db.Night.content_hash, db.Night.pk, db.Night.night_id).where(db.Night.recording_pk == row.pk))}
    wanted = {p.night.content_hash for p in derived.nights}
    removed = _drop_nights(session, study=study, night_pks=[pk for h, (pk, _) in kept.items() if h not in wanted])
    others = set(session.scalars(select(db.Night.content_hash).where(db.Night.participant_pk == participant_pk)))
    night_ids: dict[int, str] = {}
    added = []
    for item in derived.nights:
        night = item.night
        night_ids[item.period_index] = night.night_id
        if night.content_hash in others:
            continue
        values = night_columns(night)
        values.update(counts=b"", qc=item.qc, source_format="recording", source_epoch_seconds=source_epoch_seconds,
                      reference=None if night.reference is None else encode_reference(night.reference),
                      recording_pk=row.pk, first_epoch=item.first_epoch,
                      label=f"{derived.periods[item.period_index].day.isoformat()} recording {row.recording_id[:8]}")
        session.add(db.Night(participant_pk=participant_pk, created_at=db.utcnow(), **values))
        others.add(night.content_hash)
        added.append(night.night_id)
    row.nonwear = [{"start_epoch": int(i.start_epoch), "end_epoch": int(i.end_epoch), "reason": i.reason}
                   for i in derived.nonwear]
    row.periods = [period_record(p) | {"night_id": night_ids.get(i)} for i, p in enumerate(derived.periods)]
    session.flush()
    return {"nights_removed": removed, "nights_added": added}


def ingest_recording(session: Session, *, study_id: str, recording: Recording, columns: dict[str, Any],
                     derived: Derived, actor: str, diary: list[dict[str, Any]] | None = None,
                     allow_overlap: bool = False, allow_duplicate: bool = False) -> tuple[RecordingInfo, bool]:
    """Store a recording with its derived periods and nights; the participant is created with it.

    The same content posted again to the same participant is not stored again (``created`` False).

    Raises
    ------
    Conflict
        ``participant_id_case_clash`` as for nights; ``overlapping_recording`` when it overlaps a
        stored recording of the participant (unless ``allow_overlap``); ``duplicate_recording`` when
        another participant of the study has the same content (unless ``allow_duplicate``).
    """
    check_id(recording.participant_id, "participant id")
    study = study_snapshot(lock_study(session, study_id))
    pid = recording.participant_id
    participant = session.scalar(select(db.Participant).where(db.Participant.study_pk == study.pk,
                                                              db.Participant.participant_id == pid))
    if participant is None:
        if (clash := case_clash(session, study_pk=study.pk, participant_id=recording.participant_id)) is not None:
            raise Conflict(f"participant id {recording.participant_id!r} differs only by case from participant "
                           f"{clash!r} of study {study_id!r}; use {clash!r}", code="participant_id_case_clash")
        participant = db.Participant(study_pk=study.pk, participant_id=recording.participant_id, created_at=db.utcnow())
        session.add(participant)
        session.flush()
        record_audit(session, actor=actor, action="participant.create", study_id=study_id,
                     subject=recording.participant_id)
    else:
        existing = session.scalar(select(db.RecordingRow).where(
            db.RecordingRow.participant_pk == participant.pk, db.RecordingRow.content_hash == columns["content_hash"]))
        if existing is not None:
            return recording_snapshot(existing, recording.participant_id), False
        if not allow_overlap:
            hit = session.execute(select(db.RecordingRow.recording_id, db.RecordingRow.start).where(
                db.RecordingRow.participant_pk == participant.pk, db.RecordingRow.start_utc < columns["end_utc"],
                db.RecordingRow.end_utc > columns["start_utc"]).limit(1)).first()
            if hit is not None:
                raise Conflict(f"the recording ({columns['start']} to {recording.end.isoformat()}) overlaps recording "
                               f"{hit[0]!r} of participant {recording.participant_id!r}, which starts {hit[1]}; "
                               "post it with allow_overlap=true to store it anyway", code="overlapping_recording")
    if not allow_duplicate:
        other = session.execute(
            select(db.Participant.participant_id, db.RecordingRow.recording_id)
            .join(db.Participant, db.Participant.pk == db.RecordingRow.participant_pk)
            .where(db.Participant.study_pk == study.pk, db.RecordingRow.content_hash == columns["content_hash"],
                   db.Participant.pk != participant.pk).limit(1)).first()
        if other is not None:
            raise Conflict(f"the same recording (same content) is stored for participant {other[0]!r} of study "
                           f"{study_id!r} as recording {other[1]!r}; post it with allow_duplicate=true to store it "
                           f"for {pid!r} too", code="duplicate_recording")
    row = db.RecordingRow(participant_pk=participant.pk, created_at=db.utcnow(), diary=diary, nonwear=[], periods=[],
                          references=[], **columns)
    session.add(row)
    session.flush()
    changed = replace_derived(session, study=study, row=row, participant_pk=participant.pk, derived=derived,
                              source_epoch_seconds=columns.get("source_epoch_seconds"))
    record_audit(session, actor=actor, action="recording.create", study_id=study_id, subject=recording.participant_id,
                 detail={"recording_id": row.recording_id, "epochs": row.n_epochs, "nights": changed["nights_added"]})
    return recording_snapshot(row, recording.participant_id), True


def labelled_nights(session: Session, info: RecordingInfo) -> set[str]:
    """Ids of the recording's nights that carry a reference (PSG labels)."""
    return set(session.scalars(select(db.Night.night_id).where(db.Night.recording_pk == info.pk, db.Night.labelled)))


def recording_of_night(session: Session, *, study_id: str, participant_id: str, night_id: str) -> str | None:
    """The id of the recording a night is a view of, or None for a night posted on its own."""
    return session.scalar(
        select(db.RecordingRow.recording_id).join(db.Night, db.Night.recording_pk == db.RecordingRow.pk)
        .join(db.Participant, db.Participant.pk == db.Night.participant_pk)
        .join(db.Study, db.Study.pk == db.Participant.study_pk)
        .where(db.Study.study_id == study_id, db.Participant.participant_id == participant_id,
               db.Night.night_id == night_id))


def recording_row(session: Session, *, study_id: str, participant_id: str,
                  recording_id: str) -> tuple[db.RecordingRow, StudyInfo, ParticipantInfo]:
    """The row of one recording with its study and participant.

    Raises
    ------
    NotFound
        If the study, participant or recording does not exist.
    """
    study = find_study(session, study_id)
    participant = find_participant(session, study, participant_id)
    row = session.scalar(select(db.RecordingRow).where(db.RecordingRow.participant_pk == participant.pk,
                                                       db.RecordingRow.recording_id == recording_id))
    if row is None:
        raise NotFound(f"no recording {recording_id!r} for participant {participant_id!r}")
    return row, study, participant


def list_recordings(session: Session, *, study_id: str, participant_id: str | None = None, limit: int = 100,
                    offset: int = 0) -> tuple[list[RecordingInfo], int]:
    """One page of the recordings of a participant (or of the whole study) by start, and the total count."""
    study = find_study(session, study_id)
    where: list[Any] = [db.Participant.study_pk == study.pk]
    if participant_id is not None:
        where.append(db.Participant.pk == find_participant(session, study, participant_id).pk)
    base = select(db.RecordingRow, db.Participant.participant_id).join(
        db.Participant, db.Participant.pk == db.RecordingRow.participant_pk).where(*where)
    total = session.scalar(select(func.count()).select_from(base.subquery())) or 0
    rows = session.execute(base.order_by(db.Participant.participant_id, db.RecordingRow.start_utc)
                           .limit(limit).offset(offset)).all()
    return [recording_snapshot(r, pid) for r, pid in rows], int(total)


def load_recording(session: Session, *, study_id: str, participant_id: str,
                   recording_id: str) -> tuple[RecordingInfo, Recording, list[DiaryDay] | None]:
    """One stored recording with its epochs (content hash checked) and its diary."""
    row, _, _ = recording_row(session, study_id=study_id, participant_id=participant_id, recording_id=recording_id)
    diary = None if row.diary is None else diary_from_records(row.diary, tz=row.tz)
    return recording_snapshot(row, participant_id), recording_from_row(row, participant_id=participant_id), diary


def delete_recording(session: Session, *, study_id: str, participant_id: str, recording_id: str,
                     actor: str) -> dict[str, Any]:
    """Delete a recording with its nights (their scorings and features); trained versions are marked."""
    lock_study(session, study_id)  # first, as every writer of the study's nights and versions takes it
    row, study, participant = recording_row(session, study_id=study_id, participant_id=participant_id,
                                            recording_id=recording_id)
    removed = _drop_nights(session, study=study, night_pks=list(
        session.scalars(select(db.Night.pk).where(db.Night.recording_pk == row.pk))))
    session.delete(row)
    session.flush()
    out = {"recording_id": recording_id, "nights_removed": removed}
    record_audit(session, actor=actor, action="recording.delete", study_id=study_id, subject=participant_id,
                 detail=out)
    return out
