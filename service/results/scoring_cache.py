"""Serving stored scorings: one query for the lookup, resolutions and ready bytes kept per process.

A request for a night's scoring runs one query (:data:`_LOOKUP`) that finds the night under
its study and participant and reads everything the scoring's cache key depends on: the
participant's id and chosen method, the study protocol's fingerprint and model floor, and the
active pooled and personal versions (uid and number), or the requested version. That row is
the request's *stamp*. Per process, :class:`ScoringCache` keeps

- the resolution of each stamp and method (the concrete method, model version and cache key of
  :func:`~service.results.scoring.scoring_key`), so an unchanged study resolves without the
  registry queries, the protocol's validation or the model metadata's reading; a resolution is
  only kept when the stamp read after it equals the one before (no change meanwhile);
- the stored response bytes (the zlib-decompressed body of the ``scorings`` row), keyed by the
  night's pk and content hash, the cache key and the model version's number, filled only from
  the stored row of that key.

Nothing is invalidated by hand: a new night, version, activation, protocol or choice changes the
stamp or the key, so old entries are never found again and age out of the LRU. A key whose
descriptors come from the participant's current nights is computed again on every request
(it reads their content hashes). Everything else (a missing night, an unknown method, a result
not stored yet) goes to :func:`~service.results.scoring.score_night`, which answers as before.
Access (token, study scope, role) is checked before, by the route's dependencies.
"""

from __future__ import annotations

import threading
import zlib
from dataclasses import dataclass
from typing import Any

from cachetools import LRUCache
from sqlalchemy import Engine, String, and_, bindparam, cast, select
from sqlalchemy.orm import Session, sessionmaker

from models import MODEL_METHODS, NightbankError, StudyProtocol

from ..errors import NotFound
from ..store import db
from ..store.cachewriter import CacheWriter
from ..store.protocols import study_protocol
from ..store.snapshots import ParticipantInfo, participant_snapshot, study_snapshot
from .scoring import SCORING_METHODS, resolve_method, score_night, scoring_key, uses_current_nights

__all__ = ["ScoringCache", "serve_scoring"]

_N, _P, _S, _V = db.Night, db.Participant, db.Study, db.ModelVersion


def _version_tag(scope: Any, *, active: bool) -> Any:
    """Scalar subquery: ``uid:number`` of the scope's active version (or of the requested number)."""
    condition = _V.is_active if active else _V.version == bindparam("version")
    return (select(_V.uid + ":" + cast(_V.version, String))
            .where(_V.study_pk == _S.pk, _V.scope == scope, condition)
            .limit(1).scalar_subquery())


def _lookup(*, requested: str | None) -> Any:
    """The one lookup query; ``requested`` is None, ``pooled`` or ``personal`` (the scope of ``version``)."""
    personal_scope = "participant:" + cast(_P.pk, String)
    protocol = db.StudyProtocolRow
    columns = [
        _N.pk, _N.content_hash, _S.pk, _P.pk, _P.participant_id, _P.chosen_method,
        select(protocol.fingerprint).where(protocol.study_pk == _S.pk).scalar_subquery(),
        select(protocol.model_floor).where(protocol.study_pk == _S.pk).scalar_subquery(),
        _version_tag("pooled", active=True), _version_tag(personal_scope, active=True),
    ]
    if requested is not None:
        columns.append(_version_tag("pooled" if requested == "pooled" else personal_scope, active=False))
    return (select(*columns)
            .join(_P, _P.pk == _N.participant_pk).join(_S, _S.pk == _P.study_pk)
            .where(and_(_S.study_id == bindparam("study_id"), _P.participant_id == bindparam("participant_id"),
                        _N.night_id == bindparam("night_id"))))


_LOOKUP = {requested: _lookup(requested=requested) for requested in (None, "pooled", "personal")}
_STORED_BODY = select(db.Scoring.body, db.Scoring.night_hash).where(db.Scoring.night_pk == bindparam("night_pk"),
                                              db.Scoring.cache_key == bindparam("cache_key"))


@dataclass(frozen=True)
class _Resolution:
    """What a stamp and method resolve to: the scoring's cache key (None: it depends on the current nights)."""

    key: str | None
    number: int | None
    participant: ParticipantInfo
    resolved: Any
    protocol: StudyProtocol


class _DriverQuery:
    """A statement compiled once for the engine's dialect, run on a pooled DBAPI connection."""

    def __init__(self, statement: Any, engine: Engine) -> None:
        compiled = statement.compile(dialect=engine.dialect)
        self.sql = str(compiled)
        self.names = compiled.positiontup if compiled.positional else None
        self.constants = {k: v for k, v in compiled.construct_params(_check=False).items() if v is not None}

    def params(self, values: dict[str, Any]) -> Any:
        merged = {**self.constants, **values}
        return merged if self.names is None else [merged[name] for name in self.names]


class ScoringCache:
    """Per-process resolutions (by stamp) and ready response bytes (LRU, bounded in bytes).

    Parameters
    ----------
    engine : Engine, optional
        For :meth:`kept`, the lookup of a kept answer on a pooled DBAPI connection.
    max_bytes : int, default=64 MiB
        Total size of the kept response bodies.
    max_resolutions : int, default=8192
        Number of kept resolutions.
    """

    def __init__(self, engine: Engine | None = None, *, max_bytes: int = 64 * 2**20,
                 max_resolutions: int = 8192) -> None:
        self._bodies: LRUCache[tuple[Any, ...], bytes] = LRUCache(maxsize=max_bytes, getsizeof=len)
        self._resolutions: LRUCache[tuple[Any, ...], _Resolution] = LRUCache(maxsize=max_resolutions)
        self._lock = threading.Lock()
        self._engine = engine
        self._held = threading.local()
        self._lookups = {} if engine is None else {k: _DriverQuery(q, engine) for k, q in _LOOKUP.items()}
        self._stored_body = None if engine is None else _DriverQuery(_STORED_BODY, engine)
        #: SQLite file: :meth:`kept` runs on the event loop (a read in WAL mode waits for no writer)
        self.inline = engine is not None and engine.dialect.name == "sqlite"

    def kept(self, *, study_id: str, participant_id: str, night_id: str, method: str,
             version: int | None = None) -> bytes | None:
        """The answer when its resolution and bytes are kept (or its row is stored): one or two queries.

        None when anything else is needed (not resolved here yet, not stored, descriptors from the
        current nights, an invalid request, a database error): then :func:`serve_scoring` answers.
        """
        if self._engine is None or method not in SCORING_METHODS or (version is not None
                                                                     and method not in MODEL_METHODS):
            return None
        requested = _requested(method, version)
        values: dict[str, Any] = {"study_id": study_id, "participant_id": participant_id, "night_id": night_id}
        if version is not None:
            values["version"] = version
        try:
            conn = self._connection()
        except Exception:  # noqa: BLE001 - serve_scoring meets the same failure and answers it
            return None
        broken = False
        try:
            cursor = conn.cursor()
            try:
                return self._kept_on(cursor, values, requested=requested, method=method, version=version)
            finally:
                cursor.close()
        except Exception:  # noqa: BLE001 - as above; the connection is opened afresh next time
            broken = True
            self._held.__dict__.pop("conn", None)
            return None
        finally:
            if broken or not self.inline:
                conn.close()  # back to the pool (held, it would keep a transaction open on other databases)

    def _kept_on(self, cursor: Any, values: dict[str, Any], *, requested: str | None, method: str,
                 version: int | None) -> bytes | None:
        lookup = self._lookups[requested]
        cursor.execute(lookup.sql, lookup.params(values))
        row = cursor.fetchone()
        resolution = None if row is None else self.resolution(_stamp_of(row, method=method, version=version))
        if resolution is None or resolution.key is None:
            return None
        body_key = (row[0], row[1], resolution.key, resolution.number)
        body = self.body(body_key)
        if body is None and self._stored_body is not None:
            query = self._stored_body
            cursor.execute(query.sql, query.params({"night_pk": row[0], "cache_key": resolution.key}))
            stored = cursor.fetchone()
            if stored is None or stored[1] != row[1]:  # not stored yet (or for other content under this pk)
                return None
            body = zlib.decompress(stored[0])
            self.keep_body(body_key, body)
        return body

    def _connection(self) -> Any:
        """This thread's DBAPI connection, taken from the pool once and held (reads only, autocommit on SQLite)."""
        assert self._engine is not None
        if not self.inline:
            return self._engine.raw_connection()
        conn = getattr(self._held, "conn", None)
        if conn is None:
            conn = self._held.conn = self._engine.raw_connection()
        return conn

    def body(self, key: tuple[Any, ...]) -> bytes | None:
        """The kept body under ``key``, or None."""
        with self._lock:
            return self._bodies.get(key)

    def keep_body(self, key: tuple[Any, ...], body: bytes) -> None:
        """Keep a body (bodies larger than the whole cache are not kept)."""
        with self._lock:
            if len(body) <= self._bodies.maxsize:
                self._bodies[key] = body

    def resolution(self, stamp: tuple[Any, ...]) -> _Resolution | None:
        with self._lock:
            return self._resolutions.get(stamp)

    def keep_resolution(self, stamp: tuple[Any, ...], resolution: _Resolution) -> None:
        with self._lock:
            self._resolutions[stamp] = resolution


def _requested(method: str, version: int | None) -> str | None:
    """Which lookup a request needs: None, or the scope (``pooled``, ``personal``) of its ``version``."""
    return None if version is None else ("personal" if method == "personal" else "pooled")


def _stamp_of(row: Any, *, method: str, version: int | None) -> tuple[Any, ...]:
    # night pk and content hash are left out: the resolution is the participant's, for every night
    return (*tuple(row)[2:], method, version)


def _resolve(session: Session, row: Any, *, study_id: str, method: str, version: int | None) -> _Resolution:
    """Resolve as :func:`~service.results.scoring.score_night` does, for the lookup row's study and participant."""
    study_row, participant_row = session.get(db.Study, row[2]), session.get(db.Participant, row[3])
    if study_row is None or participant_row is None:
        raise NotFound("removed meanwhile")
    study = study_snapshot(study_row)
    participant = participant_snapshot(participant_row, study_id)
    resolved = resolve_method(session, study=study, participant=participant, method=method, version=version)
    protocol = study_protocol(session, study)
    key, model, _, _ = scoring_key(session, participant=participant, resolved=resolved, protocol=protocol)
    dynamic = uses_current_nights(resolved, model, participant.participant_id)
    number = None if resolved.version is None else resolved.version.version
    return _Resolution(None if dynamic else key, number, participant, resolved, protocol)


def serve_scoring(cache: ScoringCache, factory: sessionmaker[Session], *, study_id: str, participant_id: str,
                  night_id: str, method: str, version: int | None = None,
                  writer: CacheWriter | None = None) -> bytes:
    """JSON body of a night's scoring: the kept bytes, the stored row, or :func:`score_night`'s answer.

    Same answers and errors as :func:`~service.results.scoring.score_night`, which serves
    everything but a stored result.
    """
    if not cache.inline:  # on the event loop otherwise, before this
        kept = cache.kept(study_id=study_id, participant_id=participant_id, night_id=night_id, method=method,
                          version=version)
        if kept is not None:
            return kept
    if method in SCORING_METHODS and (version is None or method in MODEL_METHODS):
        requested = _requested(method, version)
        params: dict[str, Any] = {"study_id": study_id, "participant_id": participant_id, "night_id": night_id}
        if version is not None:
            params["version"] = version
        with db.session_scope(factory) as session:
            row = session.execute(_LOOKUP[requested], params).first()
            if row is not None:
                body = _stored(cache, session, row, params, method=method, version=version)
                if body is not None:
                    return body
    return score_night(factory, study_id=study_id, participant_id=participant_id, night_id=night_id, method=method,
                       version=version, writer=writer)


def _stored(cache: ScoringCache, session: Session, row: Any, params: dict[str, Any], *, method: str,
            version: int | None) -> bytes | None:
    """The stored body for the lookup ``row``, kept per process; None when not stored (or not resolvable)."""
    stamp = _stamp_of(row, method=method, version=version)
    resolution = cache.resolution(stamp)
    if resolution is None:
        try:
            resolution = _resolve(session, row, study_id=params["study_id"], method=method, version=version)
        except NightbankError:  # score_night answers with the same error
            return None
        again = session.execute(_LOOKUP[_requested(method, version)], params).first()
        if again is None or _stamp_of(again, method=method, version=version) != stamp:
            return None  # changed meanwhile: score_night resolves afresh
        cache.keep_resolution(stamp, resolution)
    key = resolution.key
    if key is None:  # descriptors from the participant's current nights
        key = scoring_key(session, participant=resolution.participant, resolved=resolution.resolved,
                          protocol=resolution.protocol)[0]
    body_key = (row[0], row[1], key, resolution.number)
    body = cache.body(body_key)
    if body is not None:
        return body
    stored = session.execute(_STORED_BODY, {"night_pk": row[0], "cache_key": key}).first()
    if stored is None or stored[1] != row[1]:  # not stored yet (or stored for other content under this pk)
        return None
    body = zlib.decompress(stored[0])
    cache.keep_body(body_key, body)
    return body
