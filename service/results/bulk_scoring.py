"""Scorings of many nights of a study at once: the same bodies as :func:`~service.results.scoring.score_night`.

Exports and pages that need one method's scoring of many nights ask :func:`bulk_scorings`, which

- resolves the method once per participant (concrete method, model version, cache key, offset
  and descriptors: :func:`~service.results.scoring.resolve_method` and
  :func:`~service.results.scoring.scoring_key`; models come from the per-process cache of
  :func:`~service.store.versions.load_model`, so each version is read once);
- reads the stored bodies of a chunk of nights with one query, and the nights and stored
  features still needed with one more each;
- computes what is missing (:func:`~service.results.scoring.fresh_scoring`, the computation
  :func:`score_night` makes) and stores the chunk's new rows in one transaction (or hands them to
  the background writer) before the chunk is yielded, so a request that stops early keeps what
  was computed and a second request finds it stored.

Answers come chunk by chunk in the order asked, so a caller can send the first rows while later
nights are still computed. A night or participant that cannot be scored gets the error
:func:`score_night` would raise, in place of its body.
"""

from __future__ import annotations

import json
import zlib
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, sessionmaker

from models import NightbankError, night_features

from ..errors import BadRequest, NotFound, Unprocessable
from ..store import db
from ..store.cachewriter import CacheWriter
from ..store.codec import night_from_row
from ..store.features import features_row, load_features_of
from ..store.protocols import study_protocol
from ..store.registry import find_study
from ..store.snapshots import participant_snapshot, study_snapshot
from .night_intervals import at_level
from .scoring import SCORING_METHODS, fresh_scoring, resolve_method, scoring_key

__all__ = ["CHUNK_NIGHTS", "bulk_scorings", "score_nights", "study_uncertainty"]

#: nights read, computed and stored together
CHUNK_NIGHTS = 50


@dataclass(frozen=True)
class _Plan:
    """One participant's resolution: what :func:`score_night` works out before it looks for a stored body."""

    resolved: Any
    key: str
    model: Any
    offset: float
    descriptors: Any
    protocol: Any


def _plans(session: Session, study_id: str, participant_ids: set[str], method: str,
           interval_level: float | None) -> dict[str, _Plan | Exception]:
    study_row = session.scalar(select(db.Study).where(db.Study.study_id == study_id))
    if study_row is None:
        find_study(session, study_id)  # names what is missing
    assert study_row is not None
    study = study_snapshot(study_row)
    protocol = at_level(study_protocol(session, study), interval_level)
    out: dict[str, _Plan | Exception] = {}
    rows = session.scalars(select(db.Participant).where(db.Participant.study_pk == study_row.pk,
                                                        db.Participant.participant_id.in_(sorted(participant_ids))))
    for row in rows:
        participant = participant_snapshot(row, study.study_id)
        try:
            resolved = resolve_method(session, study=study, participant=participant, method=method, version=None)
            key, model, offset, descriptors = scoring_key(session, participant=participant, resolved=resolved,
                                                          protocol=protocol)
        except NightbankError as exc:
            out[participant.participant_id] = exc
            continue
        out[participant.participant_id] = _Plan(resolved, key, model, offset, descriptors, protocol)
    for pid in participant_ids - set(out):
        out[pid] = NotFound(f"no participant {pid!r} in study {study_id!r}")
    return out


def bulk_scorings(factory: sessionmaker[Session], *, study_id: str, method: str,
                  nights: Sequence[tuple[str, str]], writer: CacheWriter | None = None,
                  chunk: int = CHUNK_NIGHTS, interval_level: float | None = None,
                  ) -> Iterator[list[tuple[str, str, bytes | Exception]]]:
    """JSON bodies of ``method``'s scoring of ``nights`` ((participant id, night id) pairs), chunk by chunk,
    intervals at ``interval_level`` (None: the study protocol's), as :func:`score_night` gives them.

    Yields
    ------
    list of (participant_id, night_id, body or error)
        Up to ``chunk`` nights, in the order given; ``body`` is the bytes :func:`score_night` answers
        (stored, or computed and stored now); an error (NotFound, Unprocessable ``no_model``, ...)
        where it would raise one.

    Raises
    ------
    NotFound
        If the study does not exist.
    BadRequest
        If the method is unknown.
    """
    if method not in SCORING_METHODS:
        raise BadRequest(f"unknown method {method!r}; choose one of {', '.join(SCORING_METHODS)}")
    with db.session_scope(factory) as session:
        plans = _plans(session, study_id, {pid for pid, _ in nights}, method, interval_level)
        study_pk = session.scalar(select(db.Study.pk).where(db.Study.study_id == study_id))
        found = session.execute(
            select(db.Participant.participant_id, db.Night.night_id, db.Night.pk)
            .join(db.Night, db.Night.participant_pk == db.Participant.pk)
            .where(db.Participant.study_pk == study_pk)).all()
    pks = {(pid, night_id): pk for pid, night_id, pk in found}
    for start in range(0, len(nights), chunk):
        yield _chunk(factory, list(nights[start:start + chunk]), plans, pks, writer)


class _NightGone(NotFound):
    """A night asked for that is not stored (deleted since it was listed)."""


def score_nights(factory: sessionmaker[Session], *, study_id: str, nights: Sequence[tuple[str, str]],
                 methods: Sequence[str], writer: CacheWriter | None = None,
                 ) -> dict[tuple[str, str, str], bytes | Exception]:
    """:func:`bulk_scorings` of several methods as one mapping; nights not stored are left out.

    Returns
    -------
    dict of (participant id, night id, method) to bytes or error
        The body :func:`score_night` answers, or the error its resolution raises.
    """
    out: dict[tuple[str, str, str], bytes | Exception] = {}
    for method in methods:
        for chunk in bulk_scorings(factory, study_id=study_id, method=method, nights=nights, writer=writer):
            out |= {(pid, night_id, method): body for pid, night_id, body in chunk if not isinstance(body, _NightGone)}
    return out


def study_uncertainty(factory: sessionmaker[Session], *, study_id: str, method: str = "auto",
                      writer: CacheWriter | None = None) -> list[dict[str, Any]]:
    """Every night's review score in a study, from the stored scoring bodies (computed and stored when missing,
    in bulk: :func:`bulk_scorings`).

    Parameters
    ----------
    method : str, default="auto"
        As for :func:`score_night`.

    Returns
    -------
    list of dict
        One per night (participants and nights in storage order): ``participant_id``, ``night_id``,
        ``label``, ``method`` (the concrete method; None when the participant has no model for it),
        ``model_version``, ``uncertainty_min`` (minutes; None for rules, models without decoding
        and nights without a model) and ``interval_level``.

    Raises
    ------
    NotFound
        If the study does not exist.
    BadRequest
        If the method is unknown.
    """
    if method not in SCORING_METHODS:
        raise BadRequest(f"unknown method {method!r}; choose one of {', '.join(SCORING_METHODS)}")
    with db.session_scope(factory) as session:
        study = find_study(session, study_id)
        nights = session.execute(
            select(db.Participant.participant_id, db.Night.night_id, db.Night.label)
            .join(db.Night, db.Night.participant_pk == db.Participant.pk)
            .where(db.Participant.study_pk == study.pk)
            .order_by(db.Participant.participant_id, db.Night.start_utc, db.Night.night_id)).all()
    labels = {(pid, night_id): label for pid, night_id, label in nights}
    out = []
    for chunk in bulk_scorings(factory, study_id=study_id, method=method, nights=list(labels), writer=writer):
        for participant_id, night_id, body in chunk:
            row: dict[str, Any] = {"participant_id": participant_id, "night_id": night_id,
                                   "label": labels[(participant_id, night_id)], "method": None,
                                   "model_version": None, "uncertainty_min": None, "interval_level": None}
            if isinstance(body, Exception):
                if not (isinstance(body, Unprocessable) and body.code == "no_model"):
                    raise body
            else:
                found = json.loads(body)
                row |= {k: found.get(k) for k in ("method", "model_version", "uncertainty_min", "interval_level")}
            out.append(row)
    return out


def _chunk(factory: sessionmaker[Session], nights: list[tuple[str, str]], plans: dict[str, _Plan | Exception],
           pks: dict[tuple[str, str], int], writer: CacheWriter | None) -> list[tuple[str, str, bytes | Exception]]:
    answers: dict[tuple[str, str], bytes | Exception] = {}
    wanted: dict[tuple[str, str], tuple[int, _Plan]] = {}
    for pid, night_id in nights:
        plan = plans[pid]
        if isinstance(plan, Exception):
            answers[(pid, night_id)] = plan
        elif (pid, night_id) not in pks:
            answers[(pid, night_id)] = _NightGone(f"no night {night_id!r} for participant {pid!r}")
        else:
            wanted[(pid, night_id)] = (pks[(pid, night_id)], plan)
    new_rows: list[db.Base] = []
    with db.session_scope(factory) as session:
        night_pks = sorted({pk for pk, _ in wanted.values()})
        stored = {(pk, key): body for pk, key, body in session.execute(
            select(db.Scoring.night_pk, db.Scoring.cache_key, db.Scoring.body)
            .where(db.Scoring.night_pk.in_(night_pks),
                   db.Scoring.cache_key.in_(sorted({plan.key for _, plan in wanted.values()}))))}
        missing = {k: v for k, v in wanted.items() if (v[0], v[1].key) not in stored}
        for k, (pk, plan) in wanted.items():
            if (pk, plan.key) in stored:
                answers[k] = zlib.decompress(stored[(pk, plan.key)])
        rows = {} if not missing else {r.pk: r for r in session.scalars(
            select(db.Night).where(db.Night.pk.in_(sorted({pk for pk, _ in missing.values()}))))}
        configs = {plan.model.feature_config_.version: plan.model.feature_config_
                   for _, plan in missing.values() if plan.model is not None}
        features = {version: load_features_of(session, night_pks=[pk for pk, _ in missing.values()], config=config)
                    for version, config in configs.items()}
        for (pid, night_id), (pk, plan) in missing.items():
            row = rows[pk]
            night = night_from_row(row, participant_id=pid)
            matrix = None
            if plan.model is not None:
                config = plan.model.feature_config_
                matrix = features[config.version].get(pk)
                if matrix is None:
                    matrix = night_features(night, config)
                    features[config.version][pk] = matrix
                    new_rows.append(features_row(night_pk=pk, config=config, features=matrix))
            body, scoring_row = fresh_scoring(night, night_pk=pk, night_hash=row.content_hash, night_id=row.night_id,
                                              resolved=plan.resolved, key=plan.key, model=plan.model,
                                              offset=plan.offset, descriptors=plan.descriptors,
                                              protocol=plan.protocol,
                                              features=matrix)
            answers[(pid, night_id)] = body
            new_rows.append(scoring_row)
    _store(factory, writer, new_rows)
    return [(pid, night_id, answers[(pid, night_id)]) for pid, night_id in nights]


def _store(factory: sessionmaker[Session], writer: CacheWriter | None, rows: list[db.Base]) -> None:
    """Store a chunk's new cache rows in one transaction (row by row when one of them was stored meanwhile)."""
    if not rows:
        return
    if writer is not None:
        for row in rows:
            writer.submit(row)
        return
    try:
        with db.session_scope(factory, write=True) as session:
            session.add_all(rows)
    except IntegrityError:  # a concurrent request stored some of them: keep the others
        for row in rows:
            try:
                with db.session_scope(factory, write=True) as session:
                    session.add(_copy(row))
            except IntegrityError:
                pass


def _copy(row: db.Base) -> db.Base:
    """A transient copy of a row that a failed transaction left detached."""
    columns = {c.key: getattr(row, c.key) for c in row.__table__.columns if c.key != "pk"}  # type: ignore[attr-defined]
    return type(row)(**columns)
