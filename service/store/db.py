"""Database: engine, ORM tables and the transaction scope.

Portable SQLAlchemy 2 code: the same tables and queries run on SQLite (the embedded default) and
on PostgreSQL (``postgresql+psycopg://``). The only dialect-specific code is the SQLite connect
hook (WAL, foreign keys, busy timeout) and its ``BEGIN IMMEDIATE`` for write transactions, which
makes concurrent writers queue on the busy timeout instead of failing on a lock upgrade.

Arrays are never stored one row per epoch: a night's counts are zlib-compressed little-endian
float64 bytes and its reference labels zlib-compressed text (see :mod:`service.nightstore`).
Timestamps are stored as UTC and read back timezone-aware (:class:`UTCDateTime`); a night's own
local times keep their UTC offset as ISO 8601 text.
"""

from __future__ import annotations

import contextlib
import threading
import weakref
from collections.abc import Iterator
from datetime import UTC, datetime
from typing import Any

from sqlalchemy import (
    JSON,
    Boolean,
    DateTime,
    Engine,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    String,
    Text,
    TypeDecorator,
    UniqueConstraint,
    create_engine,
    event,
)
from sqlalchemy.exc import DBAPIError, IntegrityError, SQLAlchemyError
from sqlalchemy.orm import DeclarativeBase, Mapped, Session, mapped_column, sessionmaker

from ..config import Settings
from ..errors import StorageError

__all__ = [
    "AuditEntry",
    "Base",
    "Job",
    "ModelVersion",
    "Night",
    "NightFeatures",
    "Participant",
    "Scoring",
    "Study",
    "Token",
    "UTCDateTime",
    "make_engine",
    "make_session_factory",
    "session_scope",
    "utcnow",
]

SQLITE_PRAGMAS = ("journal_mode=WAL", "foreign_keys=ON", "synchronous=NORMAL", "busy_timeout=15000")


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
                      Index("ix_nights_participant_start", "participant_pk", "start_utc"))

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    participant_pk: Mapped[int] = mapped_column(ForeignKey("participants.pk", ondelete="CASCADE"))
    night_id: Mapped[str] = mapped_column(String(32))
    content_hash: Mapped[str] = mapped_column(String(64))
    label: Mapped[str | None] = mapped_column(String(200), nullable=True)
    start: Mapped[str] = mapped_column(String(40))
    start_utc: Mapped[datetime] = mapped_column(UTCDateTime())
    epoch_seconds: Mapped[int] = mapped_column(Integer)
    n_epochs: Mapped[int] = mapped_column(Integer)
    lights_off: Mapped[str | None] = mapped_column(String(40), nullable=True)
    lights_on: Mapped[str | None] = mapped_column(String(40), nullable=True)
    labelled: Mapped[bool] = mapped_column(Boolean)
    counts: Mapped[bytes] = mapped_column(LargeBinary)
    reference: Mapped[bytes | None] = mapped_column(LargeBinary, nullable=True)
    qc: Mapped[list[dict[str, Any]]] = mapped_column(JSON)
    source_format: Mapped[str] = mapped_column(String(16))
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
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)


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


#: SQLite admits one writer at a time: threads of a process queue on this lock rather than in
#: SQLite's busy handler, which sleeps in coarse steps (other processes still wait there)
_WRITE_LOCKS: weakref.WeakKeyDictionary[Engine, threading.Lock] = weakref.WeakKeyDictionary()


def _sqlite_hooks(engine: Engine) -> None:
    """WAL, foreign keys and busy timeout on every connection; BEGIN IMMEDIATE for writers."""

    @event.listens_for(engine, "connect")
    def _pragmas(dbapi_conn: Any, _record: Any) -> None:
        dbapi_conn.isolation_level = None  # transactions are begun by the hook below
        cur = dbapi_conn.cursor()
        for pragma in SQLITE_PRAGMAS:
            cur.execute(f"PRAGMA {pragma}")
        cur.close()

    @event.listens_for(engine, "begin")
    def _begin(conn: Any) -> None:
        mode = conn.get_execution_options().get("nightbank_begin", "")
        conn.exec_driver_sql(f"BEGIN {mode}".strip())


def make_engine(settings: Settings) -> Engine:
    """Engine for ``settings.db``; SQLite files get their folder created and the pragma hooks.

    Parameters
    ----------
    settings : Settings

    Returns
    -------
    sqlalchemy.Engine
    """
    url = settings.db
    kwargs: dict[str, Any] = {}
    path = settings.sqlite_path()
    if path is not None:
        path.parent.mkdir(parents=True, exist_ok=True)
        kwargs["connect_args"] = {"check_same_thread": False, "timeout": 15}
        kwargs["pool_size"] = 20
        kwargs["max_overflow"] = 20
    elif not settings.is_sqlite:
        kwargs["pool_pre_ping"] = True
        kwargs["pool_size"] = 10
        kwargs["max_overflow"] = 20
    engine = create_engine(url, **kwargs)
    if settings.is_sqlite:
        _sqlite_hooks(engine)
        _WRITE_LOCKS[engine] = threading.Lock()
    return engine


def make_session_factory(engine: Engine) -> sessionmaker[Session]:
    """Session factory bound to ``engine`` (objects stay readable after commit)."""
    return sessionmaker(engine, expire_on_commit=False)


@contextlib.contextmanager
def session_scope(factory: sessionmaker[Session], *, write: bool = False) -> Iterator[Session]:
    """One transaction: commit on success, roll back on any error.

    Parameters
    ----------
    factory : sessionmaker
    write : bool, default=False
        The transaction writes: on SQLite it takes the write lock at BEGIN (``BEGIN IMMEDIATE``)
        so concurrent writers wait for each other instead of failing, and writers of the same
        process take turns on an in-process lock first.

    Raises
    ------
    StorageError
        If the database fails (other than a constraint violation, re-raised as
        :class:`sqlalchemy.exc.IntegrityError` for the caller to interpret).
    """
    bind = factory.kw.get("bind")
    lock = _WRITE_LOCKS.get(bind) if write and bind is not None else None
    if lock is not None:
        lock.acquire()
    session = factory()
    if write:
        session.connection(execution_options={"nightbank_begin": "IMMEDIATE"})
    try:
        yield session
        session.commit()
    except IntegrityError:
        session.rollback()
        raise
    except (DBAPIError, SQLAlchemyError) as exc:
        session.rollback()
        raise StorageError(_storage_message(exc)) from exc
    except BaseException:
        session.rollback()
        raise
    finally:
        session.close()
        if lock is not None:
            lock.release()


def _storage_message(exc: Exception) -> str:
    text = str(getattr(exc, "orig", exc)).lower()
    if "locked" in text or "busy" in text:
        return "the database stayed locked by another writer for too long; retry the request"
    if "no such table" in text or "does not exist" in text:
        return "the database is not migrated; run `nightbank migrate`"
    return "the database failed to complete the request"
