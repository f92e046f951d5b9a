"""The model registry: immutable, numbered versions of personal and pooled models.

Versions are numbered per participant (personal) and per study (pooled), from 1, and never
change once stored. Each holds the model bytes (XGBoost UBJSON plus JSON metadata; no pickle)
and its metadata (:class:`~service.store.metadata.ModelMetadata`): training nights with their
hashes, feature-set version, hyperparameters, threshold, offsets, held-out validation figures and
library versions; the version row also names the job that made it.

Promotion rule: a new version becomes active only if its held-out balanced accuracy is not worse
than the active version's (or no version is active); otherwise it is kept as a candidate, which
an admin may activate. Activating an older version is a rollback.
"""

from __future__ import annotations

import math
import threading
import uuid
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from cachetools import LRUCache, cached
from sqlalchemy import func, select, update
from sqlalchemy.orm import Session

from models import HeldOutNight, SleepModel, model_from_bytes

from ..errors import NotFound
from . import db
from .audit import record_audit
from .codec import decode_held_out
from .metadata import ModelMetadata
from .snapshots import ParticipantInfo, StudyInfo

__all__ = ["POOLED_SCOPE", "SELECTION_METRIC", "VersionInfo", "activate_version", "active_personal_versions",
           "active_version", "add_version", "get_version", "list_versions", "load_held_out", "load_model", "scope_of"]

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

    @property
    def status(self) -> str:
        return "active" if self.active else "candidate"

    @property
    def selection_score(self) -> float | None:
        return self.metadata.selection_score


def scope_of(participant: ParticipantInfo | None) -> str:
    """Numbering scope: ``participant:<pk>`` or ``pooled``."""
    return POOLED_SCOPE if participant is None else f"participant:{participant.pk}"


@cached(LRUCache(maxsize=256), key=lambda row: row.uid, lock=threading.Lock())
def _metadata(row: db.ModelVersion) -> ModelMetadata:
    """A version's metadata, read once per process (it is immutable like the version)."""
    return ModelMetadata.from_json(row.info)  # loads the deferred column


def _info(row: db.ModelVersion) -> VersionInfo:
    return VersionInfo(pk=row.pk, uid=row.uid, kind=row.kind, version=row.version, active=row.is_active,
                       created_at=row.created_at, job_id=row.job_id, metadata=_metadata(row))


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
        ``active`` tells whether it was promoted.
    """
    scope = scope_of(participant)
    number = (session.scalar(select(func.max(db.ModelVersion.version)).where(
        db.ModelVersion.study_pk == study.pk, db.ModelVersion.scope == scope)) or 0) + 1
    current = session.scalar(select(db.ModelVersion).where(db.ModelVersion.study_pk == study.pk,
                                                           db.ModelVersion.scope == scope, db.ModelVersion.is_active))
    promote = _not_worse(metadata.selection_score, None if current is None else _metadata(current).selection_score)
    if promote and current is not None:
        current.is_active = False
        session.flush()
    row = db.ModelVersion(uid=uuid.uuid4().hex, study_pk=study.pk,
                          participant_pk=None if participant is None else participant.pk, scope=scope,
                          kind="pooled" if participant is None else "personal", version=number, is_active=promote,
                          booster=booster, model_meta=model_meta, info=metadata.to_json(), held_out=held_out,
                          job_id=job_id, created_at=db.utcnow())
    session.add(row)
    session.flush()
    subject = POOLED_SCOPE if participant is None else participant.participant_id
    record_audit(session, actor=actor, action="model.create", study_id=study.study_id, subject=subject,
                 detail={"version": number, "active": promote, "job_id": job_id,
                         "previous_active": None if current is None else current.version})
    return _info(row)


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


@cached(LRUCache(maxsize=64), key=lambda session, version: version.uid, condition=threading.Condition())
def load_model(session: Session, version: VersionInfo) -> SleepModel:
    """The :class:`models.SleepModel` of a version (kept in a small per-process cache by ``uid``)."""
    row = session.get(db.ModelVersion, version.pk)
    if row is None:
        raise NotFound(f"model version {version.version} was removed")
    return model_from_bytes(row.booster, row.model_meta)
