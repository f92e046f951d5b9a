"""Frozen snapshots of stored studies, participants and nights: what store functions return instead of ORM rows."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any

__all__ = ["NightInfo", "ParticipantInfo", "ParticipantSummary", "StudyInfo"]


@dataclass(frozen=True)
class StudyInfo:
    """A study; ``pk`` is its database key."""

    study_id: str
    name: str
    created_at: datetime
    pk: int


@dataclass(frozen=True)
class ParticipantInfo:
    """A participant and the method their nights are scored with.

    ``chosen_method`` is ``personal`` or ``pooled`` once a personal model was trained and
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
    """A stored night's metadata and QC flags (no epoch data)."""

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
