"""Frozen snapshots of stored studies, participants and nights: what store functions return instead of ORM rows.

Also the id rule of studies and participants, and the builders of snapshots from rows.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from ..errors import BadRequest
from . import tables

__all__ = ["ID_PATTERN", "NightInfo", "ParticipantInfo", "ParticipantSummary", "StudyInfo", "check_id",
           "night_snapshot", "participant_snapshot", "study_snapshot"]

#: Study and participant ids: letters, digits, ``.``, ``_`` and ``-``; 1 to 64 characters.
ID_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$"
_ID = re.compile(ID_PATTERN)


def check_id(value: str, what: str) -> None:
    """Refuse an id that does not match :data:`ID_PATTERN` (``what`` names it in the message).

    Raises
    ------
    BadRequest
    """
    if not _ID.match(value):
        raise BadRequest(f"{what} {value!r} is not valid: use 1-64 letters, digits, '.', '_' or '-' "
                         "starting with a letter or digit")


@dataclass(frozen=True)
class StudyInfo:
    """A study; ``pk`` is its database key; ``epoch_seconds`` the epoch length of its stored nights."""

    study_id: str
    name: str
    created_at: datetime
    pk: int
    epoch_seconds: int = 30


@dataclass(frozen=True)
class ParticipantInfo:
    """A participant and the method their nights are scored with.

    ``chosen_method`` is ``personal``, ``pooled`` or ``pooled+offset`` once a personal model was trained and
    compared with the pooled one (None before); ``choice`` records why (``method``, ``reason``,
    the versions compared, ``policy``). ``pk`` is the participant's database key.
    """

    participant_id: str
    study_id: str
    created_at: datetime
    chosen_method: str | None
    choice: dict[str, Any] | None
    pk: int


@dataclass(frozen=True)
class ParticipantSummary(ParticipantInfo):
    """A participant with the facts a lab needs to decide on (re)training.

    ``untrained_labelled_nights`` counts labelled nights that the active personal model was not
    trained on (all labelled nights without a personal model): a retrain would use them.
    """

    n_nights: int
    n_labelled_nights: int
    active_personal_version: int | None
    untrained_labelled_nights: int


@dataclass(frozen=True)
class NightInfo:
    """A stored night's metadata and QC flags (no epoch data).

    ``source_epoch_seconds`` is the epoch length of the posted night when it was aggregated to the
    study's length (None: stored as posted); ``excluded`` nights are left out of training.
    """

    night_id: str
    participant_id: str
    content_hash: str
    label: str | None
    start: str
    epoch_seconds: int
    n_epochs: int
    lights_off: str | None
    lights_on: str | None
    labelled: bool
    qc: list[dict[str, Any]]
    source_format: str
    created_at: datetime
    source_epoch_seconds: int | None = None
    excluded: bool = False


def night_snapshot(row: tables.Night, participant_id: str) -> NightInfo:
    """The snapshot of a night row (or a row of its non-array columns) of participant ``participant_id``."""
    return NightInfo(night_id=row.night_id, participant_id=participant_id, content_hash=row.content_hash,
                     label=row.label, start=row.start, epoch_seconds=row.epoch_seconds, n_epochs=row.n_epochs,
                     lights_off=row.lights_off, lights_on=row.lights_on, labelled=row.labelled, qc=list(row.qc),
                     source_format=row.source_format, created_at=row.created_at,
                     source_epoch_seconds=row.source_epoch_seconds, excluded=bool(row.excluded))


def study_snapshot(row: tables.Study) -> StudyInfo:
    """The snapshot of a study row (for store queries that join rows themselves)."""
    return StudyInfo(study_id=row.study_id, name=row.name, created_at=row.created_at, pk=row.pk,
                     epoch_seconds=row.epoch_seconds)


def participant_snapshot(row: tables.Participant, study_id: str) -> ParticipantInfo:
    """The snapshot of a participant row of study ``study_id``."""
    return ParticipantInfo(participant_id=row.participant_id, study_id=study_id, created_at=row.created_at,
                           chosen_method=row.chosen_method, choice=None if row.choice is None else dict(row.choice),
                           pk=row.pk)
