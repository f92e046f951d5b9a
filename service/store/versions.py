"""The model registry: immutable, numbered versions of personal and pooled models.

Versions are numbered per participant (personal) and per study (pooled), from 1, and never
change once stored but by the edits below. A number is never given out twice: the last one of each numbering key
(``pooled``, or ``personal:<participant id>``) is kept in ``version_counters`` and taken in the
transaction that stores the version, so deleting a participant (and with it versions), or adding
a participant again under the same id, never brings a number back. Later changes to a version: the
list of its training nights deleted since (``trained_on_deleted_nights``) with the deleted nights'
held-out predictions removed, and a participant rename carried into its records (both
:mod:`service.store.version_edits`, each raising ``revision``); a rename also moves personal
versions to new numbers (:func:`move_personal_versions`).

Each version holds the model bytes (XGBoost UBJSON plus JSON metadata; no pickle) and its
metadata (:class:`~service.store.metadata.ModelMetadata`): training nights with their hashes,
feature-set version, hyperparameters, threshold, offsets, held-out validation figures and library
versions; the version row also names the job that made it.

Promotion rule: a new version becomes active only if its held-out balanced accuracy is not worse
than the active version's (or no version is active; paired on the nights both held out when they
share any); otherwise it is kept as a candidate, which
an admin may activate. Activating an older version is a rollback.

The promotion is a selection on held-out nights, so those nights' figure flatters the version kept.
Each stored version records its activation evidence (:func:`models.activation_evidence`, in
``ModelMetadata.activation``): the paired comparison with the version active then, on the nights
both held out, and the candidate's figure on its other held-out nights, which the choice did not use.
"""

from __future__ import annotations

import math
import threading
import uuid
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from cachetools import LRUCache, cached
from sqlalchemy import Table, case, func, select, update
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.orm import Session

from models import HeldOutNight, SleepModel, model_from_bytes

from ..errors import NotFound
from . import db
from .activation import activation_record
from .audit import record_audit
from .codec import decode_held_out
from .metadata import FlaggedNight, ModelMetadata
from .snapshots import ParticipantInfo, StudyInfo

__all__ = ["POOLED_SCOPE", "SELECTION_METRIC", "VersionInfo", "activate_version", "active_personal_versions",
           "active_version", "add_version", "counter_key", "get_version", "list_versions", "load_held_out",
           "load_model", "move_personal_versions", "next_version_number", "night_flags",
           "personal_versions_trained_on", "row_metadata", "scope_of", "stored_hashes"]

POOLED_SCOPE = "pooled"
#: Held-out metric that decides promotion ("higher is better").
SELECTION_METRIC = "balanced_accuracy"


@dataclass(frozen=True)
class VersionInfo:
    """Snapshot of a stored model version (without its bytes); ``metadata`` is shared: read it only."""

    pk: int
    uid: str
    kind: str
    version: int
    active: bool
    created_at: datetime
    job_id: str | None
    metadata: ModelMetadata
    #: night ids of the training nights no longer stored (deleted after, or while, the model trained)
    trained_on_deleted_nights: tuple[str, ...] = ()
    #: times the stored records were rewritten since (:mod:`service.store.version_edits`)
    revision: int = 0

    @property
    def status(self) -> str:
        return "active" if self.active else "candidate"

    @property
    def selection_score(self) -> float | None:
        return self.metadata.selection_score


def scope_of(participant: ParticipantInfo | None) -> str:
    """Scope of the version rows: ``participant:<pk>`` or ``pooled``."""
    return POOLED_SCOPE if participant is None else f"participant:{participant.pk}"


def counter_key(participant_id: str | None) -> str:
    """Numbering key of a scope: ``pooled``, or ``personal:<participant id>`` (outlives the participant row)."""
    return POOLED_SCOPE if participant_id is None else f"personal:{participant_id}"


def next_version_number(session: Session, *, study_pk: int, key: str, floor: int = 0) -> int:
    """Take the next version number of ``key``: one more than the last given out (and than ``floor``).

    One atomic upsert of the counter row in the caller's transaction: concurrent callers queue on
    the row and get different numbers; a rolled-back transaction gives its number back unused.

    Parameters
    ----------
    study_pk : int
    key : str
        From :func:`counter_key`.
    floor : int, default=0
        The highest number already stored in the scope (numbers stored before counters existed).
    """
    table = db.VersionCounter.__table__
    assert isinstance(table, Table)
    dialect = session.get_bind().dialect.name
    if dialect in ("postgresql", "sqlite"):
        insert = postgresql.insert if dialect == "postgresql" else sqlite.insert
        bumped = case((table.c.last_version > floor, table.c.last_version), else_=floor) + 1
        statement = (insert(table).values(study_pk=study_pk, key=key, last_version=floor + 1)
                     .on_conflict_do_update(index_elements=["study_pk", "key"], set_={"last_version": bumped})
                     .returning(table.c.last_version))
        return int(session.execute(statement).scalar_one())
    row = session.scalar(select(db.VersionCounter).where(db.VersionCounter.study_pk == study_pk,
                                                         db.VersionCounter.key == key).with_for_update())
    if row is None:
        row = db.VersionCounter(study_pk=study_pk, key=key, last_version=floor)
        session.add(row)
    row.last_version = max(row.last_version, floor) + 1
    session.flush()
    return row.last_version


def _highest(session: Session, study_pk: int, scope: str) -> int:
    """The highest stored version number of the scope (0 without one; numbers set aside while renumbering are < 0)."""
    return max(session.scalar(select(func.max(db.ModelVersion.version)).where(
        db.ModelVersion.study_pk == study_pk, db.ModelVersion.scope == scope)) or 0, 0)


def stored_hashes(session: Session, study_pk: int, hashes: set[str]) -> set[str]:
    """Those of ``hashes`` that some night of the study has."""
    return set(session.scalars(select(db.Night.content_hash).join(
        db.Participant, db.Participant.pk == db.Night.participant_pk).where(
        db.Participant.study_pk == study_pk, db.Night.content_hash.in_(sorted(hashes)))))


@cached(LRUCache(maxsize=256), key=lambda row: (row.uid, row.revision or 0), lock=threading.Lock())
def row_metadata(row: db.ModelVersion) -> ModelMetadata:
    """A version's metadata, read once per process and revision (records change only by a new revision)."""
    return ModelMetadata.from_json(row.info)  # loads the deferred column


def _info(row: db.ModelVersion) -> VersionInfo:
    return VersionInfo(pk=row.pk, uid=row.uid, kind=row.kind, version=row.version, active=row.is_active,
                       created_at=row.created_at, job_id=row.job_id, metadata=row_metadata(row),
                       trained_on_deleted_nights=tuple(row.trained_on_deleted_nights or ()),
                       revision=row.revision or 0)


def _not_worse(new: float | None, old: float | None) -> bool:
    if old is None or math.isnan(old):
        return True
    return new is not None and not math.isnan(new) and new >= old


def add_version(session: Session, *, study: StudyInfo, participant: ParticipantInfo | None, booster: bytes,
                model_meta: dict[str, Any], metadata: ModelMetadata, job_id: str | None, actor: str,
                held_out: bytes | None = None) -> VersionInfo:
    """Store a new version and apply the promotion rule.

    Parameters
    ----------
    study : StudyInfo
    participant : ParticipantInfo or None
        Owner of a personal model; None for the study's pooled model.
    booster : bytes
        XGBoost UBJSON bytes.
    model_meta : dict
        Metadata from :func:`models.model_to_bytes`.
    metadata : ModelMetadata
        Registry record; ``metadata.selection.value`` (the held-out balanced accuracy) is what the
        promotion rule compares.
    job_id : str or None
        Training job that produced the version.
    actor : str
        Token id of whoever requested the training (audit log).
    held_out : bytes, optional
        Held-out predictions of the validation (:func:`service.store.codec.encode_held_out`).

    Returns
    -------
    VersionInfo
        ``active`` tells whether it was promoted; ``trained_on_deleted_nights`` lists training
        nights deleted while the model trained.
    """
    scope = scope_of(participant)
    number = next_version_number(session, study_pk=study.pk,
                                 key=counter_key(None if participant is None else participant.participant_id),
                                 floor=_highest(session, study.pk, scope))
    trained = {n.content_hash: n.night_id for n in metadata.training_nights if n.content_hash}
    stored = stored_hashes(session, study.pk, set(trained)) if trained else set()
    gone = sorted(n for h, n in trained.items() if h not in stored)
    current = session.scalar(select(db.ModelVersion).where(db.ModelVersion.study_pk == study.pk,
                                                           db.ModelVersion.scope == scope, db.ModelVersion.is_active))
    previous = None if current is None else row_metadata(current)
    promote = _not_worse(metadata.selection_score, None if previous is None else previous.selection_score)
    kind = "pooled" if participant is None else "personal"
    if (evidence := activation_record(metadata, previous, kind=kind)) is not None:
        if evidence.compared_nights and evidence.candidate_value is not None and evidence.active_value is not None:
            promote = evidence.activate  # paired: on the nights both versions held out
        metadata = metadata.model_copy(update={"activation": evidence.model_copy(update={
            "activate": promote, "against_version": None if current is None else current.version})})
    if promote and current is not None:
        current.is_active = False
        session.flush()
    row = db.ModelVersion(uid=uuid.uuid4().hex, study_pk=study.pk,
                          participant_pk=None if participant is None else participant.pk, scope=scope,
                          kind=kind, version=number, is_active=promote,
                          booster=booster, model_meta=model_meta, info=metadata.to_json(), held_out=held_out,
                          job_id=job_id, trained_on_deleted_nights=gone or None, created_at=db.utcnow())
    session.add(row)
    session.flush()
    subject = POOLED_SCOPE if participant is None else participant.participant_id
    record_audit(session, actor=actor, action="model.create", study_id=study.study_id, subject=subject,
                 detail={"version": number, "active": promote, "job_id": job_id,
                         "previous_active": None if current is None else current.version})
    return _info(row)


def personal_versions_trained_on(session: Session, *, study: StudyInfo, hashes: set[str],
                                 other_than: int) -> list[VersionInfo]:
    """Personal versions of the study's participants but ``other_than`` (a participant pk) trained on any of
    these contents: those that started from a pooled model trained on them."""
    rows = session.scalars(select(db.ModelVersion).where(db.ModelVersion.study_pk == study.pk,
                                                         db.ModelVersion.participant_pk.is_not(None),
                                                         db.ModelVersion.participant_pk != other_than))
    return [_info(r) for r in rows if hashes & set(row_metadata(r).training_hashes)]


def list_versions(session: Session, *, study: StudyInfo, participant: ParticipantInfo | None) -> list[VersionInfo]:
    """Every version of the scope, newest first."""
    rows = session.scalars(select(db.ModelVersion).where(db.ModelVersion.study_pk == study.pk,
                                                         db.ModelVersion.scope == scope_of(participant))
                           .order_by(db.ModelVersion.version.desc()))
    return [_info(r) for r in rows]


def get_version(session: Session, *, study: StudyInfo, participant: ParticipantInfo | None,
                version: int) -> VersionInfo:
    """One version.

    Raises
    ------
    NotFound
        If the scope has no such version.
    """
    row = session.scalar(select(db.ModelVersion).where(db.ModelVersion.study_pk == study.pk,
                                                       db.ModelVersion.scope == scope_of(participant),
                                                       db.ModelVersion.version == version))
    if row is None:
        raise NotFound(f"no model version {version}")
    return _info(row)


def active_version(session: Session, *, study: StudyInfo, participant: ParticipantInfo | None) -> VersionInfo | None:
    """The active version of the scope, or None."""
    row = session.scalar(select(db.ModelVersion).where(db.ModelVersion.study_pk == study.pk,
                                                       db.ModelVersion.scope == scope_of(participant),
                                                       db.ModelVersion.is_active))
    return None if row is None else _info(row)


def active_personal_versions(session: Session, *, participant_pks: list[int]) -> dict[int, VersionInfo]:
    """The active personal version of each of these participants that has one, by participant ``pk``."""
    rows = session.scalars(select(db.ModelVersion).where(db.ModelVersion.participant_pk.in_(participant_pks),
                                                         db.ModelVersion.is_active))
    return {row.participant_pk: _info(row) for row in rows if row.participant_pk is not None}


def activate_version(session: Session, *, study: StudyInfo, participant: ParticipantInfo | None, version: int,
                     actor: str) -> VersionInfo:
    """Make ``version`` the active one of its scope (promotion of a candidate, or rollback)."""
    target = get_version(session, study=study, participant=participant, version=version)
    previous = active_version(session, study=study, participant=participant)
    session.execute(update(db.ModelVersion).where(db.ModelVersion.study_pk == study.pk,
                                                  db.ModelVersion.scope == scope_of(participant))
                    .values(is_active=False).execution_options(synchronize_session=False))
    session.execute(update(db.ModelVersion).where(db.ModelVersion.pk == target.pk).values(is_active=True)
                    .execution_options(synchronize_session=False))
    subject = POOLED_SCOPE if participant is None else participant.participant_id
    record_audit(session, actor=actor, action="model.activate", study_id=study.study_id, subject=subject,
                 detail={"version": version, "previous_active": None if previous is None else previous.version})
    return get_version(session, study=study, participant=participant, version=version)


def load_held_out(session: Session, version: VersionInfo) -> list[HeldOutNight]:
    """The held-out predictions stored with a version (empty if none were stored)."""
    blob = session.scalar(select(db.ModelVersion.held_out).where(db.ModelVersion.pk == version.pk))
    return [] if blob is None else decode_held_out(blob)


@cached(LRUCache(maxsize=64), key=lambda session, version: (version.uid, version.revision),
        condition=threading.Condition())
def load_model(session: Session, version: VersionInfo) -> SleepModel:
    """The :class:`models.SleepModel` of a version (kept in a small per-process cache by ``uid``)."""
    row = session.get(db.ModelVersion, version.pk)
    if row is None:
        raise NotFound(f"model version {version.version} was removed")
    return model_from_bytes(row.booster, row.model_meta)


def move_personal_versions(session: Session, *, study: StudyInfo, source_pk: int, target_pk: int,
                           target_id: str, keep_active: bool) -> dict[int, int]:
    """Move a participant's personal versions to another participant row (or renumber them in place).

    The versions keep their bytes, metadata and uid; they take new numbers from the target's
    numbering key (``personal:<target_id>``), after every number it gave out, in their old order.

    Parameters
    ----------
    source_pk, target_pk : int
        Participant rows (equal when a participant is renamed in place).
    target_id : str
        The participant id the versions are numbered under from now on.
    keep_active : bool
        Keep the active flag (the target has no active version); else the moved versions become candidates.

    Returns
    -------
    numbers : dict of int to int
        Old version number -> new one.
    """
    rows = list(session.scalars(select(db.ModelVersion).where(db.ModelVersion.participant_pk == source_pk)
                                .order_by(db.ModelVersion.version)))
    old = {row.pk: row.version for row in rows}
    for row in rows:  # out of the way of the unique (study, scope, version) while renumbering
        row.version = -row.pk
    session.flush()
    scope, numbers = f"participant:{target_pk}", {}
    for row in rows:
        number = next_version_number(session, study_pk=study.pk, key=counter_key(target_id),
                                     floor=_highest(session, study.pk, scope))
        row.participant_pk, row.scope, row.version = target_pk, scope, number
        row.is_active = row.is_active and keep_active
        session.flush()
        numbers[old[row.pk]] = number
    return numbers


def night_flags(session: Session, *, study_pk: int, codes: Sequence[str],
                participant_pk: int | None = None) -> dict[tuple[str, str], FlaggedNight]:
    """Labelled nights of a study (or of one participant) carrying a QC flag of one of ``codes``.

    What a training job records in a version's ``flagged_nights`` for those of its training nights.

    Parameters
    ----------
    study_pk : int
    codes : sequence of str
        QC codes looked for; a night's :attr:`FlaggedNight.codes` keep this order.
    participant_pk : int, optional
        Only this participant's nights (default: the whole study's).

    Returns
    -------
    dict of (participant id, content hash) to FlaggedNight
    """
    query = (select(db.Participant.participant_id, db.Night.content_hash, db.Night.night_id, db.Night.label,
                    db.Night.qc)
             .join(db.Participant, db.Participant.pk == db.Night.participant_pk)
             .where(db.Participant.study_pk == study_pk, db.Night.labelled))
    if participant_pk is not None:
        query = query.where(db.Night.participant_pk == participant_pk)
    out = {}
    for pid, content_hash, night_id, label, qc in session.execute(query):
        present = {flag.get("code") for flag in qc or () if isinstance(flag, Mapping)}
        if found := tuple(code for code in codes if code in present):
            out[(pid, content_hash)] = FlaggedNight(participant_id=pid, night_id=night_id, codes=found, label=label)
    return out
