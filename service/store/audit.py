"""The audit log: who changed what, and when. Every write of the service adds one entry."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from . import db

__all__ = ["AuditRecord", "list_audit", "record_audit"]


@dataclass(frozen=True)
class AuditRecord:
    """One audit entry. ``actor`` is a token id, or ``cli`` for commands run on the server."""

    at: datetime
    actor: str
    action: str
    study_id: str | None
    subject: str | None
    detail: dict[str, Any]


def record_audit(session: Session, *, actor: str, action: str, study_id: str | None = None,
                 subject: str | None = None, detail: dict[str, Any] | None = None) -> None:
    """Add an audit entry in the caller's transaction (it commits or rolls back with the write).

    Parameters
    ----------
    session : Session
    actor : str
        Token id of the caller, or ``"cli"``.
    action : str
        Dotted verb, e.g. ``"night.create"``, ``"participant.delete"``.
    study_id, subject : str, optional
        The study and the object acted on (participant id, version, token id).
    detail : dict, optional
        JSON-serialisable facts (counts removed, version numbers). Never count data or secrets.
    """
    session.add(db.AuditEntry(actor=actor, action=action, study_id=study_id, subject=subject,
                              detail=detail or {}, at=db.utcnow()))


def list_audit(session: Session, *, study_id: str | None = None, limit: int = 100) -> list[AuditRecord]:
    """Most recent audit entries first, optionally of one study."""
    query = select(db.AuditEntry).order_by(db.AuditEntry.pk.desc()).limit(limit)
    if study_id is not None:
        query = query.where(db.AuditEntry.study_id == study_id)
    return [AuditRecord(at=e.at, actor=e.actor, action=e.action, study_id=e.study_id, subject=e.subject,
                        detail=dict(e.detail)) for e in session.scalars(query)]
