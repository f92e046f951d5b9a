"""ORM tables of nightbank (SQLAlchemy 2 declarative), portable between SQLite and PostgreSQL.

Arrays are never stored one row per epoch: a night's counts are zlib-compressed little-endian
float64 bytes and its reference labels zlib-compressed text (see :mod:`service.store.codec`).
Timestamps are stored as UTC and read back timezone-aware (:class:`UTCDateTime`); a night's own
local times keep their UTC offset as ISO 8601 text. :mod:`service.store.db` re-exports every
name here, so callers write ``db.Night``.
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

from sqlalchemy import (
    JSON,
    Boolean,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    String,
    Text,
    TypeDecorator,
    UniqueConstraint,
    false,
    text,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

__all__ = [
    "AuditEntry",
    "Base",
    "ImportProfileRow",
    "Job",
    "ModelVersion",
    "Night",
    "NightFeatures",
    "RecordingRow",
    "Participant",
    "PooledFoldModel",
    "Scoring",
    "Study",
    "StudyProtocolRow",
    "Token",
    "UTCDateTime",
    "VersionCounter",
    "utcnow",
]


def utcnow() -> datetime:
    """Current time, timezone-aware UTC."""
    return datetime.now(UTC)


class UTCDateTime(TypeDecorator[datetime]):
    """Timezone-aware datetime stored as naive UTC (same on every database)."""

    impl = DateTime
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Any) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetime given to a UTC column")
        return value.astimezone(UTC).replace(tzinfo=None)

    def process_result_value(self, value: datetime | None, dialect: Any) -> datetime | None:
        return None if value is None else value.replace(tzinfo=UTC)


class Base(DeclarativeBase):
    """Declarative base of every nightbank table."""


class Study(Base):
    __tablename__ = "studies"

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    study_id: Mapped[str] = mapped_column(String(64), unique=True)
    name: Mapped[str] = mapped_column(String(200))
    #: epoch length of every stored night of the study (30 or 60 s); shorter nights are aggregated at ingest
    epoch_seconds: Mapped[int] = mapped_column(Integer, default=30, server_default=text("30"))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)


class Participant(Base):
    __tablename__ = "participants"
    __table_args__ = (UniqueConstraint("study_pk", "participant_id", name="uq_participant"),)

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    study_pk: Mapped[int] = mapped_column(ForeignKey("studies.pk", ondelete="CASCADE"), index=True)
    participant_id: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)
    #: "personal" or "pooled" once a personal model was trained and compared; None before
    chosen_method: Mapped[str | None] = mapped_column(String(16), nullable=True)
    choice: Mapped[dict[str, Any] | None] = mapped_column(JSON, nullable=True)


class Night(Base):
    __tablename__ = "nights"
    __table_args__ = (UniqueConstraint("participant_pk", "content_hash", name="uq_night_content"),
                      UniqueConstraint("participant_pk", "night_id", name="uq_night_id"),
                      Index("ix_nights_participant_start", "participant_pk", "start_utc"),
                      Index("ix_nights_content_hash", "content_hash"))

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    participant_pk: Mapped[int] = mapped_column(ForeignKey("participants.pk", ondelete="CASCADE"))
    night_id: Mapped[str] = mapped_column(String(32))
    content_hash: Mapped[str] = mapped_column(String(64))
    label: Mapped[str | None] = mapped_column(String(200), nullable=True)
    start: Mapped[str] = mapped_column(String(40))
    start_utc: Mapped[datetime] = mapped_column(UTCDateTime())
    #: end of the last epoch (``start_utc`` + ``n_epochs`` x ``epoch_seconds``): overlaps are [start_utc, end_utc)
    end_utc: Mapped[datetime] = mapped_column(UTCDateTime())
    epoch_seconds: Mapped[int] = mapped_column(Integer)
    #: epoch length of the posted night when it was aggregated to the study's length; NULL: stored as posted
    source_epoch_seconds: Mapped[int | None] = mapped_column(Integer, nullable=True)
    n_epochs: Mapped[int] = mapped_column(Integer)
    lights_off: Mapped[str | None] = mapped_column(String(40), nullable=True)
    lights_on: Mapped[str | None] = mapped_column(String(40), nullable=True)
    labelled: Mapped[bool] = mapped_column(Boolean)
    counts: Mapped[bytes] = mapped_column(LargeBinary)
    reference: Mapped[bytes | None] = mapped_column(LargeBinary, nullable=True)
    qc: Mapped[list[dict[str, Any]]] = mapped_column(JSON)
    source_format: Mapped[str] = mapped_column(String(16))
    #: left out of personal and pooled training (still stored, listed and scored)
    excluded: Mapped[bool] = mapped_column(Boolean, default=False, server_default=false())
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)
    #: a night that is a view of a continuous recording: its epochs are the recording's
    #: [first_epoch, first_epoch + n_epochs) and ``counts`` is empty (see :mod:`service.store.recordings`)
    recording_pk: Mapped[int | None] = mapped_column(ForeignKey("recordings.pk", ondelete="CASCADE"), nullable=True,
                                                     index=True)
    first_epoch: Mapped[int | None] = mapped_column(Integer, nullable=True)


class RecordingRow(Base):
    """A continuous recording of a participant (days to weeks of epochs), stored whole and compressed.

    ``counts`` and ``markers`` are zlib blobs (:mod:`service.store.recordings`); the diary, the
    non-wear intervals, the sleep periods and the posted PSG references are JSON. Its main sleep
    periods are nights (``nights.recording_pk``) that read their epochs from here.
    """

    __tablename__ = "recordings"
    __table_args__ = (UniqueConstraint("participant_pk", "content_hash", name="uq_recording_content"),
                      UniqueConstraint("participant_pk", "recording_id", name="uq_recording_id"),
                      Index("ix_recordings_participant_start", "participant_pk", "start_utc"))

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    participant_pk: Mapped[int] = mapped_column(ForeignKey("participants.pk", ondelete="CASCADE"))
    recording_id: Mapped[str] = mapped_column(String(32))
    content_hash: Mapped[str] = mapped_column(String(64))
    #: ISO 8601 start of the first epoch with its UTC offset
    start: Mapped[str] = mapped_column(String(40))
    #: the recording's IANA zone (local days and clock times), or None: the start's fixed offset
    tz: Mapped[str | None] = mapped_column(String(64), nullable=True)
    start_utc: Mapped[datetime] = mapped_column(UTCDateTime())
    end_utc: Mapped[datetime] = mapped_column(UTCDateTime())
    epoch_seconds: Mapped[int] = mapped_column(Integer)
    source_epoch_seconds: Mapped[int | None] = mapped_column(Integer, nullable=True)
    n_epochs: Mapped[int] = mapped_column(Integer)
    counts: Mapped[bytes] = mapped_column(LargeBinary, deferred=True)
    markers: Mapped[bytes] = mapped_column(LargeBinary, deferred=True)
    source_format: Mapped[str] = mapped_column(String(16))
    source_name: Mapped[str | None] = mapped_column(String(200), nullable=True)
    diary: Mapped[list[dict[str, Any]] | None] = mapped_column(JSON(none_as_null=True), nullable=True)
    nonwear: Mapped[list[dict[str, Any]]] = mapped_column(JSON)
    periods: Mapped[list[dict[str, Any]]] = mapped_column(JSON)
    references: Mapped[list[dict[str, Any]]] = mapped_column(JSON)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)


class NightFeatures(Base):
    """Cached feature matrix of a night for one feature configuration (derived data)."""

    __tablename__ = "night_features"
    __table_args__ = (UniqueConstraint("night_pk", "config_version", name="uq_night_features"),)

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    night_pk: Mapped[int] = mapped_column(ForeignKey("nights.pk", ondelete="CASCADE"))
    #: ``FeatureConfig.version``; ``version`` is the matrix's own (it adds the epoch length)
    config_version: Mapped[str] = mapped_column(String(64))
    version: Mapped[str] = mapped_column(String(80))
    names: Mapped[list[str]] = mapped_column(JSON)
    n_epochs: Mapped[int] = mapped_column(Integer)
    matrix: Mapped[bytes] = mapped_column(LargeBinary)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)


class ModelVersion(Base):
    __tablename__ = "model_versions"
    __table_args__ = (UniqueConstraint("study_pk", "scope", "version", name="uq_model_version"),)

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    #: random id, never reused (keys the in-process cache of loaded models)
    uid: Mapped[str] = mapped_column(String(32), unique=True)
    study_pk: Mapped[int] = mapped_column(ForeignKey("studies.pk", ondelete="CASCADE"), index=True)
    participant_pk: Mapped[int | None] = mapped_column(ForeignKey("participants.pk", ondelete="CASCADE"),
                                                       nullable=True, index=True)
    #: "pooled" or "participant:<pk>": the numbering scope of ``version``
    scope: Mapped[str] = mapped_column(String(64))
    kind: Mapped[str] = mapped_column(String(16))
    version: Mapped[int] = mapped_column(Integer)
    is_active: Mapped[bool] = mapped_column(Boolean, default=False)
    #: large columns are loaded only when read
    booster: Mapped[bytes] = mapped_column(LargeBinary, deferred=True)
    model_meta: Mapped[dict[str, Any]] = mapped_column(JSON, deferred=True)
    info: Mapped[dict[str, Any]] = mapped_column(JSON, deferred=True)
    #: held-out predictions of the nested validation (see :func:`service.store.codec.encode_held_out`)
    held_out: Mapped[bytes | None] = mapped_column(LargeBinary, nullable=True, deferred=True)
    job_id: Mapped[str | None] = mapped_column(String(32), nullable=True)
    #: night ids of training nights deleted since
    trained_on_deleted_nights: Mapped[list[str] | None] = mapped_column(JSON(none_as_null=True), nullable=True)
    #: raised whenever the stored records are rewritten (rename carried in, deleted night's held-out rows
    #: removed: :mod:`service.store.version_edits`); keys the per-process caches with ``uid``
    revision: Mapped[int] = mapped_column(Integer, default=0, server_default=text("0"))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)


class PooledFoldModel(Base):
    """A stored pooled version's fold model: the model that left out ``participants`` (XGBoost UBJSON + JSON)."""

    __tablename__ = "pooled_fold_models"
    __table_args__ = (UniqueConstraint("version_pk", "fold", name="uq_pooled_fold_model"),)

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    version_pk: Mapped[int] = mapped_column(ForeignKey("model_versions.pk", ondelete="CASCADE"), index=True)
    fold: Mapped[int] = mapped_column(Integer)
    #: participant ids the fold model never saw
    participants: Mapped[list[str]] = mapped_column(JSON)
    booster: Mapped[bytes] = mapped_column(LargeBinary, deferred=True)
    model_meta: Mapped[dict[str, Any]] = mapped_column(JSON, deferred=True)


class VersionCounter(Base):
    """Last version number given out per numbering key; numbers are never given out twice.

    ``key`` is ``pooled`` or ``personal:<participant id>``: keyed by the participant's id, not its
    row, so a participant deleted and added again continues after its earlier numbers.
    """

    __tablename__ = "version_counters"
    __table_args__ = (UniqueConstraint("study_pk", "key", name="uq_version_counter"),)

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    study_pk: Mapped[int] = mapped_column(ForeignKey("studies.pk", ondelete="CASCADE"))
    key: Mapped[str] = mapped_column(String(80))
    last_version: Mapped[int] = mapped_column(Integer)


class Job(Base):
    __tablename__ = "jobs"
    __table_args__ = (Index("ix_jobs_state_created", "state", "created_at"),)

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    job_id: Mapped[str] = mapped_column(String(32), unique=True)
    kind: Mapped[str] = mapped_column(String(16))
    study_pk: Mapped[int] = mapped_column(ForeignKey("studies.pk", ondelete="CASCADE"), index=True)
    participant_pk: Mapped[int | None] = mapped_column(ForeignKey("participants.pk", ondelete="CASCADE"),
                                                       nullable=True)
    #: set while queued or running, NULL once finished: the unique constraint allows one active
    #: training per participant (or per study for the pooled model)
    active_key: Mapped[str | None] = mapped_column(String(96), unique=True, nullable=True)
    state: Mapped[str] = mapped_column(String(16))
    progress_done: Mapped[int] = mapped_column(Integer, default=0)
    progress_total: Mapped[int] = mapped_column(Integer, default=0)
    progress_stage: Mapped[str] = mapped_column(String(64), default="queued")
    params: Mapped[dict[str, Any]] = mapped_column(JSON)
    result: Mapped[dict[str, Any] | None] = mapped_column(JSON, nullable=True)
    error: Mapped[str | None] = mapped_column(Text, nullable=True)
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    cancel_requested: Mapped[bool] = mapped_column(Boolean, default=False)
    lease_owner: Mapped[str | None] = mapped_column(String(64), nullable=True)
    lease_expires_at: Mapped[datetime | None] = mapped_column(UTCDateTime(), nullable=True)
    created_by: Mapped[str | None] = mapped_column(String(32), nullable=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)
    started_at: Mapped[datetime | None] = mapped_column(UTCDateTime(), nullable=True)
    finished_at: Mapped[datetime | None] = mapped_column(UTCDateTime(), nullable=True)


class Scoring(Base):
    __tablename__ = "scorings"
    __table_args__ = (UniqueConstraint("night_pk", "cache_key", name="uq_scoring"),)

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    night_pk: Mapped[int] = mapped_column(ForeignKey("nights.pk", ondelete="CASCADE"))
    model_version_pk: Mapped[int | None] = mapped_column(ForeignKey("model_versions.pk", ondelete="CASCADE"),
                                                         nullable=True, index=True)
    #: the method id for rules, "model:<version pk>" for models
    cache_key: Mapped[str] = mapped_column(String(64))
    night_hash: Mapped[str] = mapped_column(String(64))
    method: Mapped[str] = mapped_column(String(40))
    body: Mapped[bytes] = mapped_column(LargeBinary)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)


class Token(Base):
    __tablename__ = "tokens"

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    token_id: Mapped[str] = mapped_column(String(16), unique=True)
    study_id: Mapped[str | None] = mapped_column(String(64), nullable=True)
    role: Mapped[str] = mapped_column(String(16))
    salt: Mapped[str] = mapped_column(String(32))
    secret_hash: Mapped[str] = mapped_column(String(64))
    label: Mapped[str | None] = mapped_column(String(200), nullable=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)
    revoked_at: Mapped[datetime | None] = mapped_column(UTCDateTime(), nullable=True)


class AuditEntry(Base):
    __tablename__ = "audit_log"

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow, index=True)
    actor: Mapped[str] = mapped_column(String(64))
    action: Mapped[str] = mapped_column(String(64))
    study_id: Mapped[str | None] = mapped_column(String(64), nullable=True)
    subject: Mapped[str | None] = mapped_column(String(200), nullable=True)
    detail: Mapped[dict[str, Any]] = mapped_column(JSON)


class ImportProfileRow(Base):
    """A saved import profile of a study (:class:`models.ImportProfile` in its JSON form)."""

    __tablename__ = "import_profiles"
    __table_args__ = (UniqueConstraint("study_pk", "name", name="uq_import_profile"),)

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    study_pk: Mapped[int] = mapped_column(ForeignKey("studies.pk", ondelete="CASCADE"))
    name: Mapped[str] = mapped_column(String(64))
    body: Mapped[dict[str, Any]] = mapped_column(JSON)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)
    created_by: Mapped[str] = mapped_column(String(64))


class StudyProtocolRow(Base):
    """A study's protocol (:class:`models.StudyProtocol` in its JSON form); no row: the default protocol."""

    __tablename__ = "study_protocols"

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    study_pk: Mapped[int] = mapped_column(ForeignKey("studies.pk", ondelete="CASCADE"), unique=True)
    body: Mapped[dict[str, Any]] = mapped_column(JSON)
    fingerprint: Mapped[str] = mapped_column(String(32))
    #: lowest held-out balanced accuracy a model may have to be chosen by ``auto`` (NULL: always-sleep's 0.5)
    model_floor: Mapped[float | None] = mapped_column(Float, nullable=True)
    #: training weight of an adjudicated night's corrected labels, 0..1 (PSG nights weigh 1; NULL: 0.5)
    correction_weight: Mapped[float | None] = mapped_column(Float, nullable=True)
    updated_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)
    updated_by: Mapped[str] = mapped_column(String(64))
