"""A study's protocol: the parameter definitions and agreement settings its figures are computed under.

Stored per study in its JSON form (:meth:`models.StudyProtocol.to_dict`) after validation by
:meth:`models.StudyProtocol.from_dict`; a study that never set one uses
:data:`models.DEFAULT_PROTOCOL`. Setting a protocol changes no stored model: scorings,
comparisons and exports computed under another protocol are simply not found again, because
their cache keys carry the protocol's fingerprint.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from models import DEFAULT_PROTOCOL, InvalidProtocolError, Problem, StudyProtocol

from . import db
from .audit import record_audit
from .registry import find_study
from .snapshots import StudyInfo

__all__ = ["DEFAULT_CORRECTION_WEIGHT", "ProtocolInfo", "protocol_info", "save_protocol", "study_protocol"]

#: training weight of corrected labels when the study sets none (common practice: below PSG's 1)
DEFAULT_CORRECTION_WEIGHT = 0.5


@dataclass(frozen=True)
class ProtocolInfo:
    """A study's protocol; ``updated_at`` and ``updated_by`` (token id) are None for the default."""

    study_id: str
    protocol: StudyProtocol
    updated_at: datetime | None
    updated_by: str | None
    #: lowest held-out balanced accuracy a model may have to be chosen by ``auto`` (None: no floor beyond
    #: always-sleep's 0.5)
    model_floor: float | None = None
    #: training weight of a night's adjudicated corrected labels, 0..1 (a PSG night's weigh 1)
    correction_weight: float = DEFAULT_CORRECTION_WEIGHT

    @property
    def is_default(self) -> bool:
        return self.updated_at is None

    def to_dict(self) -> dict[str, Any]:
        """The JSON answer of the protocol routes."""
        return {"study_id": self.study_id, "protocol": self.protocol.to_dict(),
                "fingerprint": self.protocol.fingerprint(), "is_default": self.is_default,
                "model_floor": self.model_floor, "correction_weight": self.correction_weight,
                "updated_at": None if self.updated_at is None else self.updated_at.isoformat(),
                "updated_by": self.updated_by}


def _study(session: Session, study: str | StudyInfo) -> StudyInfo:
    return find_study(session, study) if isinstance(study, str) else study


def _row(session: Session, study: StudyInfo) -> db.StudyProtocolRow | None:
    return session.scalar(select(db.StudyProtocolRow).where(db.StudyProtocolRow.study_pk == study.pk))


def _weight(value: float | None) -> float:
    return DEFAULT_CORRECTION_WEIGHT if value is None else float(value)


def protocol_info(session: Session, study: str | StudyInfo) -> ProtocolInfo:
    """The study's protocol with when and by whom it was set.

    Raises
    ------
    NotFound
        If the study does not exist.
    """
    found = _study(session, study)
    row = _row(session, found)
    if row is None:
        return ProtocolInfo(found.study_id, DEFAULT_PROTOCOL, None, None)
    return ProtocolInfo(found.study_id, StudyProtocol.from_dict(row.body), row.updated_at, row.updated_by,
                        row.model_floor, _weight(row.correction_weight))


def study_protocol(session: Session, study: str | StudyInfo) -> StudyProtocol:
    """The protocol a study's figures are computed under (the default until one is set)."""
    return protocol_info(session, study).protocol


def save_protocol(session: Session, *, study_id: str, body: Mapping[str, Any], actor: str) -> ProtocolInfo:
    """Validate and store the study's protocol (replacing the one set before); audited.

    Parameters
    ----------
    body : mapping
        The protocol's JSON form; fields left out take their defaults. ``model_floor`` (optional,
        a balanced accuracy in (0.5, 1), or null for none) is the study's floor for models;
        ``correction_weight`` (optional, 0..1, null: 0.5) the training weight of corrected labels.

    Raises
    ------
    InvalidProtocolError
        Naming every bad field (``problems``, each with ``location.field``); nothing is stored.
    NotFound
        If the study does not exist.
    """
    fields = dict(body) if isinstance(body, Mapping) else body
    floor = fields.pop("model_floor", None) if isinstance(fields, dict) else None
    problems = [] if floor is None or (isinstance(floor, int | float) and not isinstance(floor, bool)
                                       and 0.5 < floor < 1) else [
        Problem(code="invalid_protocol_field", message=f"model_floor: must be a balanced accuracy in (0.5, 1) "
                f"or null, got {floor!r}", location={"field": "model_floor"})]
    weight = fields.pop("correction_weight", None) if isinstance(fields, dict) else None
    if weight is not None and not (isinstance(weight, int | float) and not isinstance(weight, bool)
                                   and 0 <= weight <= 1):
        problems.append(Problem(code="invalid_protocol_field", message=f"correction_weight: must be a training "
                                f"weight between 0 and 1 or null, got {weight!r}", location={"field":
                                                                                             "correction_weight"}))
    try:
        protocol = StudyProtocol.from_dict(fields)
    except InvalidProtocolError as exc:
        raise InvalidProtocolError([*exc.problems, *problems]) from None
    if problems:
        raise InvalidProtocolError(problems)
    study = find_study(session, study_id)
    row = _row(session, study)
    before = None if row is None else row.fingerprint
    if row is None:
        row = db.StudyProtocolRow(study_pk=study.pk, body=protocol.to_dict(), fingerprint=protocol.fingerprint(),
                                  model_floor=floor, correction_weight=weight, updated_at=db.utcnow(),
                                  updated_by=actor)
        session.add(row)
    else:
        row.body, row.fingerprint, row.model_floor = protocol.to_dict(), protocol.fingerprint(), floor
        row.correction_weight = weight
        row.updated_at, row.updated_by = db.utcnow(), actor
    session.flush()
    record_audit(session, actor=actor, action="protocol.set", study_id=study_id, subject=protocol.fingerprint(),
                 detail={"previous": before or DEFAULT_PROTOCOL.fingerprint()})
    return ProtocolInfo(study_id, protocol, row.updated_at, row.updated_by, row.model_floor,
                        _weight(row.correction_weight))
