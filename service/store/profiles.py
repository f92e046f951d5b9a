"""Saved import profiles of a study: how a lab's export is laid out, stored by name.

A profile is stored in its JSON form (:meth:`models.ImportProfile.to_dict`) after validation by
:meth:`models.ImportProfile.from_dict`; names are unique within a study. Reading one back gives
the :class:`models.ImportProfile` the night readers take.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from models import ImportProfile

from ..errors import Conflict, NotFound
from . import db
from .audit import record_audit
from .registry import find_study
from .snapshots import StudyInfo

__all__ = ["ProfileInfo", "delete_profile", "get_profile", "list_profiles", "profile_info", "save_profile"]


@dataclass(frozen=True)
class ProfileInfo:
    """A stored profile: its validated value, when and by whom (token id) it was saved."""

    profile: ImportProfile
    created_at: datetime
    created_by: str

    @property
    def name(self) -> str:
        return self.profile.name


def _study(session: Session, study: str | StudyInfo) -> StudyInfo:
    return find_study(session, study) if isinstance(study, str) else study


def _row(session: Session, study: StudyInfo, name: str) -> db.ImportProfileRow:
    row = session.scalar(select(db.ImportProfileRow).where(db.ImportProfileRow.study_pk == study.pk,
                                                           db.ImportProfileRow.name == name))
    if row is None:
        raise NotFound(f"no import profile {name!r} in study {study.study_id!r}")
    return row


def _info(row: db.ImportProfileRow) -> ProfileInfo:
    return ProfileInfo(profile=ImportProfile.from_dict(row.body), created_at=row.created_at, created_by=row.created_by)


def save_profile(session: Session, *, study_id: str, body: Mapping[str, Any], actor: str,
                 replace: bool = False) -> tuple[ProfileInfo, bool]:
    """Validate and store a profile under its ``name``.

    Parameters
    ----------
    body : mapping
        The profile's JSON form.
    replace : bool, default=False
        Replace a stored profile of the same name (else that is a conflict).

    Returns
    -------
    info : ProfileInfo
    created : bool
        False if a stored profile was replaced.

    Raises
    ------
    InvalidProfileError
        Naming every bad field (``problems``, each with ``location.field``).
    NotFound
        If the study does not exist.
    Conflict
        Code ``profile_exists`` if the name is taken and ``replace`` is False.
    """
    profile = ImportProfile.from_dict(body)
    study = find_study(session, study_id)
    row = session.scalar(select(db.ImportProfileRow).where(db.ImportProfileRow.study_pk == study.pk,
                                                           db.ImportProfileRow.name == profile.name))
    if row is not None and not replace:
        raise Conflict(f"import profile {profile.name!r} exists in study {study_id!r}; send replace=true to "
                       "replace it", code="profile_exists")
    created = row is None
    if row is None:
        row = db.ImportProfileRow(study_pk=study.pk, name=profile.name, body=profile.to_dict(),
                                  created_at=db.utcnow(), created_by=actor)
        session.add(row)
    else:
        row.body, row.created_at, row.created_by = profile.to_dict(), db.utcnow(), actor
    session.flush()
    record_audit(session, actor=actor, action="profile.create" if created else "profile.replace", study_id=study_id,
                 subject=profile.name)
    return _info(row), created


def list_profiles(session: Session, *, study_id: str) -> list[ProfileInfo]:
    """The study's profiles, by name."""
    study = find_study(session, study_id)
    rows = session.scalars(select(db.ImportProfileRow).where(db.ImportProfileRow.study_pk == study.pk)
                           .order_by(db.ImportProfileRow.name))
    return [_info(row) for row in rows]


def profile_info(session: Session, study: str | StudyInfo, name: str) -> ProfileInfo:
    """One stored profile with when and by whom it was saved.

    Raises
    ------
    NotFound
        If the study or the profile does not exist (the message names the profile).
    """
    return _info(_row(session, _study(session, study), name))


def get_profile(session: Session, study: str | StudyInfo, name: str) -> ImportProfile:
    """The stored profile ``name`` of ``study`` (a study id or snapshot), ready for the night readers.

    Raises
    ------
    NotFound
        If the study or the profile does not exist (the message names the profile).
    """
    return profile_info(session, study, name).profile


def delete_profile(session: Session, *, study_id: str, name: str, actor: str) -> ProfileInfo:
    """Delete a stored profile (audited); returns it as it was.

    Raises
    ------
    NotFound
        If the study or the profile does not exist.
    """
    study = find_study(session, study_id)
    row = _row(session, study, name)
    info = _info(row)
    session.execute(delete(db.ImportProfileRow).where(db.ImportProfileRow.pk == row.pk))
    record_audit(session, actor=actor, action="profile.delete", study_id=study_id, subject=name)
    return info
