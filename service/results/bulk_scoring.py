"""Many nights' scorings at once: the same bodies as :func:`~service.results.scoring.score_night`, in bulk.

The review queue needs every candidate night scored with the deployed method and the compared
rules. One by one that is a lookup, a resolution, a cache query and a write transaction per night
and method; here it is

- one resolution per participant and method (the model loaded once per version), with the cache
  key of :func:`~service.results.scoring.scoring_key`;
- one query (per chunk of nights) for every stored body under those keys;
- for the missing ones: the nights and their stored features read in one query each, the bodies
  built by :func:`~service.results.scoring.scoring_body` (the same computation and bytes as a
  single request), and the new rows (scorings, features) stored in one transaction.

A resolution error (``no_model``, for instance) is returned in place of the body, so the caller
can answer as a single request would.
"""

from __future__ import annotations

import zlib
from collections.abc import Sequence
from typing import Any

from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, sessionmaker

from models import FeatureMatrix, NightbankError, night_features

from ..store import db
from ..store.codec import night_from_row
from ..store.features import features_row, load_features_of
from ..store.protocols import study_protocol
from ..store.registry import find_study, participant_snapshot
from .scoring import resolve_method, scoring_body, scoring_key

__all__ = ["score_nights"]

#: Night keys per ``IN (...)`` query (well under SQLite's variable limit).
_CHUNK = 400

Answer = bytes | NightbankError


def _chunks(values: Sequence[int]) -> list[Sequence[int]]:
    return [values[i:i + _CHUNK] for i in range(0, len(values), _CHUNK)]


def _resolutions(session: Session, study: Any, participant_ids: set[str], methods: Sequence[str]
                 ) -> dict[tuple[str, str], Any]:
    """(participant id, method) -> (resolved, key, model, offset, descriptors), or the resolution's error."""
    protocol = study_protocol(session, study)
    out: dict[tuple[str, str], Any] = {}
    rows = session.scalars(select(db.Participant).where(db.Participant.study_pk == study.pk,
                                                        db.Participant.participant_id.in_(sorted(participant_ids))))
    for row in rows:
        participant = participant_snapshot(row, study.study_id)
        for method in methods:
            try:
                resolved = resolve_method(session, study=study, participant=participant, method=method, version=None)
                key, model, offset, descriptors = scoring_key(session, participant=participant, resolved=resolved,
                                                              protocol=protocol)
            except NightbankError as exc:
                out[(participant.participant_id, method)] = exc
            else:
                out[(participant.participant_id, method)] = (resolved, key, model, offset, descriptors, protocol)
    return out


def score_nights(factory: sessionmaker[Session], *, study_id: str, nights: Sequence[tuple[str, str]],
                 methods: Sequence[str]) -> dict[tuple[str, str, str], Answer]:
    """Bodies of many nights' scorings, from the cache or computed (and then cached).

    Parameters
    ----------
    nights : sequence of (participant id, night id)
        Nights of the study (unknown ones are left out of the answer).
    methods : sequence of str
        Methods as for :func:`~service.results.scoring.score_night`, without ``version``.

    Returns
    -------
    dict of (participant id, night id, method) to bytes or NightbankError
        The JSON body :func:`~service.results.scoring.score_night` answers, or the error its
        resolution raises.

    Raises
    ------
    NotFound
        If the study does not exist.
    """
    wanted = set(nights)
    with db.session_scope(factory) as session:
        study = find_study(session, study_id)
        found = session.execute(
            select(db.Night.pk, db.Night.night_id, db.Night.content_hash, db.Participant.participant_id)
            .join(db.Participant, db.Participant.pk == db.Night.participant_pk)
            .where(db.Participant.study_pk == study.pk)).all()
        rows = {(pid, nid): (pk, content_hash) for pk, nid, content_hash, pid in found if (pid, nid) in wanted}
        resolutions = _resolutions(session, study, {pid for pid, _ in rows}, methods)
        keys = sorted({r[1] for r in resolutions.values() if not isinstance(r, NightbankError)})
        stored: dict[tuple[int, str], bytes] = {}
        for chunk in _chunks(sorted(pk for pk, _ in rows.values())):
            stored.update(((pk, key), body) for pk, key, body in session.execute(
                select(db.Scoring.night_pk, db.Scoring.cache_key, db.Scoring.body)
                .where(db.Scoring.night_pk.in_(chunk), db.Scoring.cache_key.in_(keys))))
    out: dict[tuple[str, str, str], Answer] = {}
    missing: list[tuple[str, str, str]] = []
    for (pid, nid), (pk, _) in rows.items():
        for method in methods:
            resolution = resolutions[(pid, method)]
            if isinstance(resolution, NightbankError):
                out[(pid, nid, method)] = resolution
            elif (pk, resolution[1]) in stored:
                out[(pid, nid, method)] = zlib.decompress(stored[(pk, resolution[1])])
            else:
                missing.append((pid, nid, method))
    if missing:
        out |= _compute(factory, missing, rows, resolutions)
    return out


def _compute(factory: sessionmaker[Session], missing: Sequence[tuple[str, str, str]],
             rows: dict[tuple[str, str], tuple[int, str]], resolutions: dict[tuple[str, str], Any]
             ) -> dict[tuple[str, str, str], Answer]:
    """Build and store the missing bodies (features read in bulk, computed when not stored)."""
    pks = sorted({rows[(pid, nid)][0] for pid, nid, _ in missing})
    configs = {m.feature_config_.version: m.feature_config_ for pid, _, method in missing
               if (m := resolutions[(pid, method)][2]) is not None}
    with db.session_scope(factory) as session:
        nights = {}
        for chunk in _chunks(pks):
            for row, pid in session.execute(select(db.Night, db.Participant.participant_id)
                                            .join(db.Participant, db.Participant.pk == db.Night.participant_pk)
                                            .where(db.Night.pk.in_(chunk))):
                nights[row.pk] = (night_from_row(row, participant_id=pid), row.night_id, row.content_hash)
        features = {version: load_features_of(session, night_pks=pks, config=config)
                    for version, config in configs.items()}
    new_rows: list[db.Base] = []
    out: dict[tuple[str, str, str], Answer] = {}
    done: dict[tuple[int, str], bytes] = {}  # two methods resolving to one key (auto = a rule) share a body
    for pid, nid, method in missing:
        pk = rows[(pid, nid)][0]
        resolved, key, model, offset, descriptors, protocol = resolutions[(pid, method)]
        if (pk, key) in done:
            out[(pid, nid, method)] = done[(pk, key)]
            continue
        night, stored_id, night_hash = nights[pk]
        matrix: FeatureMatrix | None = None
        if model is not None:
            config = model.feature_config_
            matrix = features[config.version].get(pk)
            if matrix is None:
                matrix = features[config.version][pk] = night_features(night, config)
                new_rows.append(features_row(night_pk=pk, config=config, features=matrix))
        try:
            body, cache_row = scoring_body(night, resolved=resolved, key=key, model=model, offset=offset,
                                     descriptors=descriptors, features=matrix, protocol=protocol, night_pk=pk,
                                     night_hash=night_hash, night_id=stored_id)
        except NightbankError as exc:
            out[(pid, nid, method)] = exc
            continue
        new_rows.append(cache_row)
        out[(pid, nid, method)] = done[(pk, key)] = body
    _store(factory, new_rows)
    return out


def _store(factory: sessionmaker[Session], new_rows: Sequence[db.Base]) -> None:
    """Store the new cache rows in one transaction; on a conflict (a concurrent request stored some), one by one."""
    if not new_rows:
        return
    try:
        with db.session_scope(factory, write=True) as session:
            session.add_all(new_rows)
        return
    except IntegrityError:
        pass
    for row in new_rows:
        try:
            with db.session_scope(factory, write=True) as session:
                session.add(_copy(row))
        except IntegrityError:
            pass


def _copy(row: db.Base) -> db.Base:
    """A fresh ORM object with the column values of ``row`` (a rolled-back object cannot be added again)."""
    values = {c.key: getattr(row, c.key) for c in row.__table__.columns if c.key != "pk"}  # type: ignore[attr-defined]
    return type(row)(**values)

