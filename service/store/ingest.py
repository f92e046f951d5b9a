"""Night ingest: the study's epoch length, the duplicate, overlap and id-case checks, and the insert.

A night is stored at its study's epoch length: a night of a shorter supported length that divides
it is aggregated (:func:`models.to_study_epoch`) and keeps its posted length in
``source_epoch_seconds``; any other length is refused. In the same write transaction, after the
study row is locked, a new night is refused when another participant of the study has the same
content (``duplicate_night``), when it overlaps in time a stored night of its participant
(``overlapping_night``), or when its new participant id differs from a stored one only by case
(``participant_id_case_clash``). Posting the same content again to the same participant is not a
conflict: it answers the stored night.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from models import SUPPORTED_EPOCH_SECONDS, InvalidNightError, Night, Problem, quality_flags, to_study_epoch

from ..errors import Conflict, NotFound, Unprocessable
from . import db
from .audit import record_audit
from .codec import night_columns
from .snapshots import NightInfo, check_id, night_snapshot

__all__ = ["STUDY_EPOCH_SECONDS", "case_clash", "conform_epochs", "ingest_night", "lock_study", "night_values"]

#: Epoch lengths a study may store, seconds: the supported lengths that shorter ones aggregate into.
STUDY_EPOCH_SECONDS: tuple[int, ...] = tuple(s for s in SUPPORTED_EPOCH_SECONDS
                                             if any(s % t == 0 and t < s for t in SUPPORTED_EPOCH_SECONDS))


def night_values(night: Night, *, source_format: str, source_epoch_seconds: int | None = None) -> dict[str, Any]:
    """Column values of a new ``nights`` row: encoded arrays and QC flags (no database access).

    Computed before the write transaction so that the transaction stays short.
    ``source_epoch_seconds`` is the posted epoch length of a night aggregated by :func:`conform_epochs`.
    """
    return {"qc": [f.to_dict() for f in quality_flags(night)], "source_format": source_format,
            "source_epoch_seconds": source_epoch_seconds, **night_columns(night)}


def conform_epochs(night: Night, *, epoch_seconds: int, study_id: str = "") -> tuple[Night, int | None]:
    """The night at the study's epoch length: as it is, or aggregated from a shorter length that divides it.

    Parameters
    ----------
    night : Night
    epoch_seconds : int
        The study's epoch length, seconds.
    study_id : str, optional
        Named in the error message.

    Returns
    -------
    night : Night
        At ``epoch_seconds`` (:func:`models.to_study_epoch`: counts summed, reference by majority of
        scored sub-epochs, wake on ties).
    source_epoch_seconds : int or None
        The posted length if the night was aggregated, else None.

    Raises
    ------
    Unprocessable
        Code ``epoch_length_mismatch`` (location ``epoch_seconds``) for any other length.
    """
    try:
        conformed = to_study_epoch(night, epoch_seconds)
    except InvalidNightError:
        shorter = [t for t in SUPPORTED_EPOCH_SECONDS if t < epoch_seconds and epoch_seconds % t == 0]
        accepted = " or ".join(f"{t} s" for t in [epoch_seconds, *shorter])
        message = (f"the night has {night.epoch_seconds}-s epochs but study {study_id!r} stores {epoch_seconds}-s "
                   f"epochs: post nights with epochs of {accepted} (shorter ones are summed into {epoch_seconds}-s "
                   "epochs)")
        raise Unprocessable(message, code="epoch_length_mismatch",
                            problems=[Problem("epoch_length_mismatch", message, {"field": "epoch_seconds"})]) from None
    return conformed, None if conformed is night else int(night.epoch_seconds)


def lock_study(session: Session, study_id: str) -> db.Study:
    """The study row, locked until the transaction ends (PostgreSQL; SQLite writers are serialised anyway).

    Writers that check the study's nights before changing them (ingest, participant renames) take
    this lock first, so their checks and writes cannot interleave. ``FOR NO KEY UPDATE`` does not
    block inserts of rows that refer to the study.
    """
    row = session.scalar(select(db.Study).where(db.Study.study_id == study_id).with_for_update(key_share=True))
    if row is None:
        raise NotFound(f"no study {study_id!r}")
    return row


def case_clash(session: Session, *, study_pk: int, participant_id: str, ignore_pk: int | None = None) -> str | None:
    """The id of another participant of the study that differs from ``participant_id`` only by case, or None."""
    query = select(db.Participant.participant_id).where(
        db.Participant.study_pk == study_pk, func.lower(db.Participant.participant_id) == participant_id.lower(),
        db.Participant.participant_id != participant_id)
    if ignore_pk is not None:
        query = query.where(db.Participant.pk != ignore_pk)
    return session.scalar(query.limit(1))


def _check_new_night(session: Session, *, study: db.Study, participant_pk: int | None, night: Night,
                     allow_duplicate: bool, allow_overlap: bool) -> None:
    """Refuse a night whose content another participant has, or that overlaps one of the participant's nights."""
    if not allow_duplicate:
        other = session.execute(
            select(db.Participant.participant_id, db.Night.night_id)
            .join(db.Participant, db.Participant.pk == db.Night.participant_pk)
            .where(db.Participant.study_pk == study.pk, db.Night.content_hash == night.content_hash,
                   db.Participant.pk != (participant_pk or -1)).limit(1)).first()
        if other is not None:
            raise Conflict(f"the same night (same content) is stored for participant {other[0]!r} of study "
                           f"{study.study_id!r} as night {other[1]!r}; post it with allow_duplicate=true to store it "
                           f"for {night.participant_id!r} too", code="duplicate_night")
    if not allow_overlap and participant_pk is not None:
        start = night.start.tz_convert("UTC").to_pydatetime()
        end = night.end.tz_convert("UTC").to_pydatetime()
        hit = session.execute(
            select(db.Night.night_id, db.Night.label, db.Night.start)
            .where(db.Night.participant_pk == participant_pk, db.Night.start_utc < end, db.Night.end_utc > start)
            .order_by(db.Night.start_utc).limit(1)).first()
        if hit is not None:
            label = "" if hit[1] is None else f" (label {hit[1]!r})"
            raise Conflict(f"the night ({night.start.isoformat()} to {night.end.isoformat()}) overlaps night "
                           f"{hit[0]!r}{label} of participant {night.participant_id!r}, which starts {hit[2]}; post "
                           "it with allow_overlap=true to store it anyway", code="overlapping_night")


def ingest_night(session: Session, *, study_id: str, night: Night, source_format: str, actor: str,
                 values: dict[str, Any] | None = None, allow_duplicate: bool = False,
                 allow_overlap: bool = False) -> tuple[NightInfo, bool]:
    """Store a validated night; the participant is created with its first night.

    Idempotent: a night with the same content hash as a stored night of the participant is not
    stored again. A night of a shorter epoch length is aggregated to the study's
    (:func:`conform_epochs`). Every check runs in the caller's write transaction, after the study
    row is locked, so concurrent ingests cannot both pass it.

    Parameters
    ----------
    values : dict, optional
        Row values from :func:`night_values` of the conformed night (computed here if not given
        or not of this night).
    allow_duplicate : bool, default=False
        Store the night even if another participant of the study has the same content.
    allow_overlap : bool, default=False
        Store the night even if it overlaps in time, [start, end), a stored night of the participant.

    Returns
    -------
    info : NightInfo
    created : bool
        False if the content was already stored for this participant (``info`` is then the stored night).

    Raises
    ------
    NotFound
        If the study does not exist.
    Unprocessable
        ``epoch_length_mismatch``: an epoch length the study cannot store.
    Conflict
        ``participant_id_case_clash``: a new participant id differs from a stored one only by case;
        ``duplicate_night``: another participant has the same content; ``overlapping_night``: the
        night overlaps a stored night of the participant.
    """
    check_id(night.participant_id, "participant id")
    study = lock_study(session, study_id)
    night, source_epoch_seconds = conform_epochs(night, epoch_seconds=study.epoch_seconds, study_id=study_id)
    participant = session.scalar(select(db.Participant).where(db.Participant.study_pk == study.pk,
                                                              db.Participant.participant_id == night.participant_id))
    if participant is None:
        if (clash := case_clash(session, study_pk=study.pk, participant_id=night.participant_id)) is not None:
            raise Conflict(f"participant id {night.participant_id!r} differs only by case from participant {clash!r} "
                           f"of study {study_id!r}; use {clash!r}", code="participant_id_case_clash")
    else:
        existing = session.scalar(select(db.Night).where(db.Night.participant_pk == participant.pk,
                                                         db.Night.content_hash == night.content_hash))
        if existing is not None:
            return night_snapshot(existing, night.participant_id), False
    _check_new_night(session, study=study, participant_pk=None if participant is None else participant.pk,
                     night=night, allow_duplicate=allow_duplicate, allow_overlap=allow_overlap)
    if values is None or values.get("content_hash") != night.content_hash:
        values = night_values(night, source_format=source_format, source_epoch_seconds=source_epoch_seconds)
    if participant is None:
        participant = db.Participant(study_pk=study.pk, participant_id=night.participant_id, created_at=db.utcnow())
        session.add(participant)
        session.flush()
        record_audit(session, actor=actor, action="participant.create", study_id=study_id,
                     subject=night.participant_id)
    row = db.Night(participant_pk=participant.pk, created_at=db.utcnow(), **values)
    session.add(row)
    session.flush()
    record_audit(session, actor=actor, action="night.create", study_id=study_id, subject=night.participant_id,
                 detail={"night_id": row.night_id, "epochs": row.n_epochs, "labelled": row.labelled,
                         "source_epoch_seconds": source_epoch_seconds,
                         "allowed": [k for k, v in (("duplicate", allow_duplicate), ("overlap", allow_overlap)) if v]})
    return night_snapshot(row, night.participant_id), True
