"""Database: engine and the transaction scope; the ORM tables are in :mod:`service.store.tables`.

Portable SQLAlchemy 2 code: the same tables and queries run on SQLite (the embedded default) and
on PostgreSQL (``postgresql+psycopg://``). The only dialect-specific code is the SQLite connect
hook (WAL, foreign keys, busy timeout) and its ``BEGIN IMMEDIATE`` for write transactions, which
makes concurrent writers queue on the busy timeout instead of failing on a lock upgrade.

Every table class of :mod:`service.store.tables` is re-exported here (``db.Night``, ``db.Study``).
"""

from __future__ import annotations

import contextlib
import threading
import weakref
from collections.abc import Iterator
from typing import Any

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.exc import DBAPIError, IntegrityError, SQLAlchemyError
from sqlalchemy.orm import Session, sessionmaker

from ..config import Settings
from ..errors import StorageError
from .review_tables import NightCorrection, NightReview
from .tables import (
    AuditEntry,
    Base,
    ImportProfileRow,
    Job,
    ModelVersion,
    Night,
    NightFeatures,
    Participant,
    PooledFoldModel,
    RecordingRow,
    Scoring,
    Study,
    StudyProtocolRow,
    Token,
    UTCDateTime,
    VersionCounter,
    utcnow,
)

__all__ = [
    "AuditEntry",
    "Base",
    "ImportProfileRow",
    "Job",
    "ModelVersion",
    "Night",
    "NightCorrection",
    "NightFeatures",
    "NightReview",
    "Participant",
    "PooledFoldModel",
    "RecordingRow",
    "Scoring",
    "Study",
    "StudyProtocolRow",
    "Token",
    "UTCDateTime",
    "VersionCounter",
    "make_engine",
    "make_session_factory",
    "session_scope",
    "utcnow",
]

SQLITE_PRAGMAS = ("journal_mode=WAL", "foreign_keys=ON", "synchronous=NORMAL", "busy_timeout=15000")


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
