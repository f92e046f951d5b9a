"""Changes to stored participants and nights: withdrawal, night deletion and correction, participant renames.

Every function runs in the caller's write transaction and adds an audit entry there, so a change
is stored whole or not at all.

- :func:`delete_participant` removes a participant after consent withdrawal, with every model
  version that holds information from their nights.
- :func:`delete_night` removes one night with its cached scorings and stored features; model
  versions trained on it stay readable and usable and list it in ``trained_on_deleted_nights``.
- :func:`update_night` corrects a night's label or excludes it from training.
- :func:`rename_participant` gives a participant another id, merging it into the participant of
  that id when there is one (see there for nights and model versions).
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import delete, func, select, update
from sqlalchemy.orm import Session, aliased

from ..errors import Conflict, Unprocessable
from . import db, version_edits, versions
from .audit import record_audit
from .ingest import case_clash, lock_study
from .registry import find_participant, find_study, night_row
from .snapshots import NightInfo, check_id, night_snapshot, participant_snapshot, study_snapshot

__all__ = ["delete_night", "delete_participant", "rename_participant", "update_night"]


def _count(session: Session, table: type[db.Base], *where: Any) -> int:
    return int(session.scalar(select(func.count()).select_from(table).where(*where)) or 0)


def delete_participant(session: Session, *, study_id: str, participant_id: str, actor: str) -> dict[str, int]:
    """Remove a participant after consent withdrawal.

    Deletes the participant's nights, cached scorings, personal model versions and training jobs,
    every pooled model version trained on their nights (named in its participants, or trained
    on content the participant has: those models hold information from them), and other
    participants' personal versions started from such a pooled model (counted in
    ``personal_versions``). The audit log keeps a record of the deletion (participant id and the
    numbers removed). Version numbers are not given out again (:mod:`service.store.versions`).

    Returns
    -------
    removed : dict
        ``nights``, ``scorings``, ``personal_versions``, ``pooled_versions`` removed.
    """
    study = find_study(session, study_id)
    participant = find_participant(session, study, participant_id)
    night_pks = select(db.Night.pk).where(db.Night.participant_pk == participant.pk)
    hashes = set(session.scalars(select(db.Night.content_hash).where(db.Night.participant_pk == participant.pk)))
    pooled = [v for v in versions.list_versions(session, study=study, participant=None)
              if participant_id in v.metadata.participants or hashes & set(v.metadata.training_hashes)]
    # other participants' personal versions that started from a pooled model trained on these nights
    derived = versions.personal_versions_trained_on(session, study=study, hashes=hashes, other_than=participant.pk)
    removed = {
        "nights": len(hashes),
        "scorings": _count(session, db.Scoring, db.Scoring.night_pk.in_(night_pks)),
        "personal_versions": _count(session, db.ModelVersion, db.ModelVersion.participant_pk == participant.pk)
        + len(derived),
        "pooled_versions": len(pooled),
    }
    for version in [*pooled, *derived]:
        session.execute(delete(db.ModelVersion).where(db.ModelVersion.pk == version.pk))
    from ..jobs.queue import withdraw_jobs  # deferred: the job queue builds on the store

    withdraw_jobs(session, participant_pk=participant.pk)  # active trainings end as cancelled and stay readable
    # foreign keys cascade to nights, scorings, features, personal versions and finished jobs
    session.execute(delete(db.Participant).where(db.Participant.pk == participant.pk))
    record_audit(session, actor=actor, action="participant.delete", study_id=study_id, subject=participant_id,
                 detail=removed)
    return removed


def _delete_nights(session: Session, night_pks: list[int]) -> None:
    """Delete nights with their derived rows (scorings, features), not relying on cascades alone."""
    if night_pks:
        session.execute(delete(db.Scoring).where(db.Scoring.night_pk.in_(night_pks)))
        session.execute(delete(db.NightFeatures).where(db.NightFeatures.night_pk.in_(night_pks)))
        session.execute(delete(db.Night).where(db.Night.pk.in_(night_pks)))


def _move_recordings(session: Session, *, source_pk: int, target_pk: int) -> None:
    """Move a participant's recordings to another; one whose content the target has goes with its nights."""
    have = set(session.scalars(select(db.RecordingRow.content_hash).where(db.RecordingRow.participant_pk == target_pk)))
    for pk, content_hash in session.execute(select(db.RecordingRow.pk, db.RecordingRow.content_hash)
                                            .where(db.RecordingRow.participant_pk == source_pk)).all():
        if content_hash in have:
            _delete_nights(session, list(session.scalars(select(db.Night.pk).where(db.Night.recording_pk == pk))))
            session.execute(delete(db.RecordingRow).where(db.RecordingRow.pk == pk))
    session.execute(update(db.RecordingRow).where(db.RecordingRow.participant_pk == source_pk)
                    .values(participant_pk=target_pk))


def delete_night(session: Session, *, study_id: str, participant_id: str, night_id: str,
                 actor: str) -> dict[str, Any]:
    """Delete one night, its cached scorings and its stored feature matrices.

    Model versions trained on the night are kept (readable, usable for scoring) and list its id
    in ``trained_on_deleted_nights``; the night's held-out predictions and night metrics leave
    every stored version, whose held-out figures are computed again over the nights left
    (:func:`service.store.version_edits.forget_deleted_night`).

    Returns
    -------
    deleted : dict
        ``night_id``, ``scorings`` and ``features`` removed, and ``marked_versions``: the
        versions marked (``kind``, ``participant_id`` (None for pooled), ``version``).

    Raises
    ------
    NotFound
        If the study, participant or night does not exist.
    """
    # the study lock first, as renames and ingest take it: a deletion and a rename in one study never deadlock
    study = study_snapshot(lock_study(session, study_id))
    row = night_row(session, study_id, participant_id, night_id)
    night_pk, content_hash, label = row.pk, row.content_hash, row.label
    scorings = _count(session, db.Scoring, db.Scoring.night_pk == night_pk)
    features = _count(session, db.NightFeatures, db.NightFeatures.night_pk == night_pk)
    if row.recording_pk is not None:  # a night of a recording: its period keeps no night
        recording = session.get(db.RecordingRow, row.recording_pk)
        if recording is not None:
            recording.periods = [p | {"night_id": None} if p.get("night_id") == night_id else p
                                 for p in recording.periods]
    owner_pk = row.participant_pk
    _delete_nights(session, [night_pk])
    changed = version_edits.forget_deleted_night(session, study=study, participant_pk=owner_pk,
                                                 participant_id=participant_id, content_hash=content_hash,
                                                 night_id=night_id, label=label)
    owners = [m["participant_pk"] for m in changed if m["participant_pk"] is not None]
    ids = {pk: pid for pk, pid in session.execute(select(db.Participant.pk, db.Participant.participant_id)
                                                  .where(db.Participant.pk.in_(owners)))}

    def named(m: dict[str, Any]) -> dict[str, Any]:
        return {"kind": m["kind"], "participant_id": ids.get(m["participant_pk"]), "version": m["version"]}

    out = {"night_id": night_id, "scorings": scorings, "features": features,
           "marked_versions": [named(m) for m in changed if m["marked"]]}
    record_audit(session, actor=actor, action="night.delete", study_id=study_id, subject=participant_id,
                 detail=out | {"label": label,
                               "held_out_removed_from": [named(m) for m in changed if m["held_out_removed"]]})
    return out


def update_night(session: Session, *, study_id: str, participant_id: str, night_id: str, actor: str,
                 set_label: bool = False, label: str | None = None, excluded: bool | None = None) -> NightInfo:
    """Correct a night's label and/or exclude it from (or include it again in) training.

    Parameters
    ----------
    set_label : bool, default=False
        Change the label to ``label`` (None clears it); otherwise the label is kept.
    label : str or None, default=None
    excluded : bool or None, default=None
        Exclude the night from personal and pooled training (True) or include it again (False);
        None keeps it as it is. An excluded night stays stored, listed and scorable.

    Returns
    -------
    NightInfo
        The night after the change (unchanged, and no audit entry, when nothing changes).
    """
    row = night_row(session, study_id, participant_id, night_id)
    changes: dict[str, Any] = {}
    if set_label and label != row.label:
        changes["label"] = label
    if excluded is not None and bool(excluded) != bool(row.excluded):
        changes["excluded"] = bool(excluded)
    if changes:
        before = {k: getattr(row, k) for k in changes}
        for key, value in changes.items():
            setattr(row, key, value)
        session.flush()
        record_audit(session, actor=actor, action="night.update", study_id=study_id, subject=participant_id,
                     detail={"night_id": night_id, "before": before, "after": changes})
    return night_snapshot(row, participant_id)


def _refuse_overlaps(session: Session, *, source_pk: int, target_pk: int, dropped: list[int], participant_id: str,
                     to: str) -> None:
    """Refuse a merge whose moving nights overlap in clock time, [start, end), nights of the target."""
    moving, staying = aliased(db.Night), aliased(db.Night)
    pairs = session.execute(
        select(moving.night_id, moving.start, staying.night_id, staying.label, staying.start)
        .join(staying, (staying.participant_pk == target_pk) & (moving.start_utc < staying.end_utc)
              & (moving.end_utc > staying.start_utc))
        .where(moving.participant_pk == source_pk, moving.pk.not_in(dropped or [-1]))
        .order_by(moving.start_utc, staying.start_utc)).all()
    if not pairs:
        return
    named = "; ".join(f"night {m!r} (starts {m_start}) overlaps night {t!r}"
                      f"{'' if label is None else f' (label {label!r})'} (starts {t_start})"
                      for m, m_start, t, label, t_start in pairs[:5])
    more = f"; and {len(pairs) - 5} more pair(s)" if len(pairs) > 5 else ""
    raise Conflict(f"{len({p[0] for p in pairs})} night(s) of participant {participant_id!r} overlap in time nights of "
                   f"participant {to!r}: {named}{more}; rename with allow_overlap=true to merge anyway",
                   code="overlapping_night")


def rename_participant(session: Session, *, study_id: str, participant_id: str, to: str,
                       actor: str, allow_overlap: bool = False) -> dict[str, Any]:
    """Give a participant the id ``to``, merging it into participant ``to`` when that one exists.

    Without a participant ``to``, the participant keeps everything under the new id. Otherwise
    its nights move to ``to``: a night whose content ``to`` already has is dropped as a duplicate
    (counted in ``duplicates_dropped``), the others move with their stored features; finished
    training jobs move too; then the old participant is removed. In both cases personal model
    versions stay readable: they take new numbers under ``to`` after every number ``to`` has had
    (``personal_versions`` maps old to new numbers), and are candidates if ``to`` has an active
    version (else the active one stays active). Cached scorings of the moved nights are dropped
    (they name version numbers and offsets of the old id). Every stored version's records (personal
    and pooled: training and held-out night lists, night metrics, offsets, descriptors, fold models)
    name ``to`` from then on (:func:`service.store.version_edits.rename_in_versions`); in a merge
    ``to`` keeps its own pooled offset and descriptors where the pooled version has them. The
    audit log keeps ids as they were (this entry names both and counts ``versions_rewritten``).
    A merge is refused while a night that would move overlaps in clock time, [start, end), a night
    of ``to`` (duplicates, which do not move, aside), unless ``allow_overlap``.

    Returns
    -------
    renamed : dict
        ``participant_id`` (``to``), ``previous_id``, ``merged`` (``to`` existed), ``nights_moved``,
        ``duplicates_dropped`` and ``personal_versions`` (list of ``{"previous_version", "version"}``).

    Raises
    ------
    BadRequest
        If ``to`` is not a valid participant id.
    Unprocessable
        Code ``same_participant`` if ``to`` is the participant's own id.
    Conflict
        Code ``training_in_progress`` while a training of the participant is queued or running;
        ``participant_id_case_clash`` if ``to`` differs from another participant's id only by case;
        ``overlapping_night`` (naming the nights) if moving nights overlap nights of ``to``.
    """
    check_id(to, "participant id")
    if to == participant_id:
        raise Unprocessable(f"participant {participant_id!r} already has this id", code="same_participant")
    study = study_snapshot(lock_study(session, study_id))
    source = find_participant(session, study, participant_id)
    job = session.scalar(select(db.Job.job_id).where(db.Job.participant_pk == source.pk,
                                                     db.Job.active_key.is_not(None)).limit(1))
    if job is not None:
        raise Conflict(f"a training of participant {participant_id!r} is queued or running (job {job}); wait for it "
                       "or cancel it, then rename", code="training_in_progress")
    target_row = session.scalar(select(db.Participant).where(db.Participant.study_pk == study.pk,
                                                             db.Participant.participant_id == to))
    night_pks = list(session.scalars(select(db.Night.pk).where(db.Night.participant_pk == source.pk)))
    dropped: list[int] = []
    if target_row is None:
        if (clash := case_clash(session, study_pk=study.pk, participant_id=to, ignore_pk=source.pk)) is not None:
            raise Conflict(f"participant id {to!r} differs only by case from participant {clash!r} of study "
                           f"{study_id!r}; rename to {clash!r} to merge", code="participant_id_case_clash")
        numbers = versions.move_personal_versions(session, study=study, source_pk=source.pk, target_pk=source.pk,
                                                  target_id=to, keep_active=True)
        session.execute(update(db.Participant).where(db.Participant.pk == source.pk).values(participant_id=to))
    else:
        target = participant_snapshot(target_row, study.study_id)
        have = set(session.scalars(select(db.Night.content_hash).where(db.Night.participant_pk == target.pk)))
        for pk, content_hash in session.execute(select(db.Night.pk, db.Night.content_hash)
                                                .where(db.Night.participant_pk == source.pk)):
            (dropped if content_hash in have else []).append(pk)
        if not allow_overlap:
            _refuse_overlaps(session, source_pk=source.pk, target_pk=target.pk, dropped=dropped,
                             participant_id=participant_id, to=to)
        _delete_nights(session, dropped)
        session.execute(update(db.Night).where(db.Night.participant_pk == source.pk).values(participant_pk=target.pk))
        keep_active = versions.active_version(session, study=study, participant=target) is None
        numbers = versions.move_personal_versions(session, study=study, source_pk=source.pk, target_pk=target.pk,
                                                  target_id=to, keep_active=keep_active)
        session.execute(update(db.Job).where(db.Job.participant_pk == source.pk).values(participant_pk=target.pk))
        _move_recordings(session, source_pk=source.pk, target_pk=target.pk)
        session.execute(delete(db.Participant).where(db.Participant.pk == source.pk))
    moved = [pk for pk in night_pks if pk not in set(dropped)]
    if moved:
        session.execute(delete(db.Scoring).where(db.Scoring.night_pk.in_(moved)))
    rewritten = version_edits.rename_in_versions(session, study=study, previous_id=participant_id, to=to)
    out = {"participant_id": to, "previous_id": participant_id, "merged": target_row is not None,
           "nights_moved": len(moved), "duplicates_dropped": len(dropped),
           "personal_versions": [{"previous_version": old, "version": new} for old, new in numbers.items()]}
    record_audit(session, actor=actor, action="participant.rename", study_id=study_id, subject=participant_id,
                 detail=out | {"versions_rewritten": rewritten})
    return out
