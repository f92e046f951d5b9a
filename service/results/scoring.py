"""Scoring a stored night with a rule or a model version, with a cache of results.

Methods (the ``method`` query parameter):

- ``auto``: the participant's chosen method (``personal``, ``pooled`` or ``pooled+offset``, the
  personal one only while active), else ``pooled+offset``; a flagged model (no better than
  always-sleep, or below the study's floor: :mod:`service.results.model_flags`) is passed over,
  and with every model flagged ``auto`` scores with the classical default rule; the body's
  ``auto`` names what was passed over and why;
- ``personal``: the participant's active personal model (or ``version``);
- ``pooled``: the study's active pooled model (or ``version``) without participant offset;
- ``pooled+offset``: the pooled model plus the participant's offset (0 for a participant without
  labelled nights when the pooled model was trained);
- any classical rule id of :data:`models.METHOD_IDS` (``cole-kripke``, ``sadeh``,
  ``count-threshold``, each also ``+webster``).

Pooled models also take the participant's descriptors: those used in training for participants
the model saw, otherwise computed from all the participant's current nights.

Model methods of a model with decoding (a fitted :attr:`SleepModel.decoding_ <models.SleepModel>`)
add per-night intervals of the sleep parameters (``intervals``: ``[low, high]`` per name of
:data:`INTERVAL_PARAMETERS`, at the study protocol's ``interval_level``), the review score
``uncertainty_min`` and, for the HMM decoder, the posterior P(sleep) per epoch
(``p_sleep_posterior``); all from the model's own :meth:`SleepModel.intervals` and decoder, with
:data:`INTERVAL_PATHS` posterior paths drawn from a seed derived from the night id and the model's
content (:func:`interval_seed`), so the same request, and the same nights trained again, give the same
numbers. Rules and models without decoding answer ``null`` for these. The per-night score is part of the stored body;
:func:`service.results.bulk_scoring.study_uncertainty` reads it for every night of a study at once.

Each result is stored (zlib-compressed JSON) under the night and a key naming the rule, or the
model version's uid plus the participant inputs (offset, descriptors); a repeat request returns the
stored body. The stored row records the model version that produced it.
"""

from __future__ import annotations

import hashlib
import json
import math
import threading
import zlib
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from cachetools import LRUCache
from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, sessionmaker

from models import (
    DEFAULT_PROTOCOL,
    METHOD_IDS,
    MODEL_METHODS,
    PARAMETER_NAMES,
    FeatureMatrix,
    Night,
    StudyProtocol,
    compare_night,
    json_record,
    night_features,
    participant_descriptors,
    score_with_rule,
    sleep_parameters,
)

from ..errors import BadRequest, NotFound, Unprocessable
from ..store import db, versions
from ..store.cachewriter import CacheWriter
from ..store.codec import night_from_row
from ..store.features import features_row, load_features
from ..store.protocols import study_protocol
from ..store.registry import find_participant, find_study, participant_snapshot, study_snapshot
from ..store.snapshots import ParticipantInfo, StudyInfo
from .model_flags import auto_choice
from .night_intervals import at_level, decoded_extras, interval_seed, model_key, probabilities

__all__ = ["SCORING_METHODS", "compute_scoring", "fresh_scoring", "resolve_method", "score_night", "scoring_key",
           "uses_current_nights"]

SCORING_METHODS: tuple[str, ...] = ("auto", *MODEL_METHODS, *METHOD_IDS)
#: part of every cache key: bump when a stored scoring body would now come out differently
#: (2: epochs without counts are unscored, ``null``, instead of sleep or wake; 3: intervals, the review
#: score and the posterior P(sleep) of models with decoding; 4: the intervals' seed from the model's content,
#: not its uid)
SCORING_REVISION = "s4"


@dataclass(frozen=True)
class _Resolved:
    method: str
    version: versions.VersionInfo | None
    passed_over: dict[str, str] | None = None


def resolve_method(session: Session, *, study: StudyInfo, participant: ParticipantInfo, method: str,
                   version: int | None) -> _Resolved:
    """The concrete method and model version a request means.

    Raises
    ------
    BadRequest
        If the method is unknown, or ``version`` is given for a rule or ``auto``.
    Unprocessable
        If the needed model has not been trained (code ``no_model``).
    """
    if method not in SCORING_METHODS:
        raise BadRequest(f"unknown method {method!r}; choose one of {', '.join(SCORING_METHODS)}")
    if version is not None and method not in MODEL_METHODS:
        raise BadRequest("version applies to the personal, pooled and pooled+offset methods only")
    if method in METHOD_IDS:
        return _Resolved(method, None)
    if method == "auto":
        choice = auto_choice(session, study=study, participant=participant)
        if choice is not None:
            return _Resolved(choice.method, choice.version, choice.passed_over)
        method = "pooled+offset"  # no model at all: the error below says so
    owner = participant if method == "personal" else None
    if version is not None:
        return _Resolved(method, versions.get_version(session, study=study, participant=owner, version=version))
    found = versions.active_version(session, study=study, participant=owner)
    if found is None:
        what = "personal model for this participant" if owner else "pooled model for this study"
        raise Unprocessable(f"no active {what}; train one first", code="no_model")
    return _Resolved(method, found)


_DESCRIPTORS: LRUCache[tuple[int, str], dict[str, float]] = LRUCache(maxsize=1024)
_DESCRIPTORS_LOCK = threading.Lock()


def _descriptors(session: Session, participant: ParticipantInfo) -> dict[str, float]:
    """Participant descriptors over all their nights (cached per set of nights)."""
    hashes = sorted(session.scalars(select(db.Night.content_hash).where(db.Night.participant_pk == participant.pk)))
    key = (participant.pk, hashlib.sha1("".join(hashes).encode()).hexdigest())
    with _DESCRIPTORS_LOCK:
        if key in _DESCRIPTORS:
            return _DESCRIPTORS[key]
    rows = session.scalars(select(db.Night).where(db.Night.participant_pk == participant.pk))
    found = participant_descriptors([night_from_row(r, participant_id=participant.participant_id) for r in rows])
    with _DESCRIPTORS_LOCK:
        _DESCRIPTORS[key] = found
    return found


def compute_scoring(night: Night, *, method: str, model: Any = None, version: int | None = None,
                    offset: float = 0.0, descriptors: dict[str, float] | None = None,
                    features: FeatureMatrix | None = None,
                    protocol: StudyProtocol = DEFAULT_PROTOCOL, seed: int = 0) -> dict[str, Any]:
    """Score one night and build the response body (pure computation, no database).

    Parameters
    ----------
    night : Night
    method : str
        Concrete method (a rule id, ``personal``, ``pooled`` or ``pooled+offset``).
    model : SleepModel, optional
        Required for the model methods.
    version : int, optional
        The model's version number, recorded in the body.
    offset : float, default=0.0
        Participant offset in log-odds (``pooled+offset``).
    descriptors : dict, optional
        Participant descriptors (pooled models).
    features : FeatureMatrix, optional
        The night's stored features for the model's feature set (computed when None).
    protocol : StudyProtocol, default=DEFAULT_PROTOCOL
        The study's parameter definitions, applied to the night's and the reference's parameters;
        its ``interval_level`` is the level of the intervals.
    seed : int, default=0
        Seed of the interval paths (:func:`interval_seed` in :func:`score_night`).

    Returns
    -------
    body : dict
        ``method``, ``model_version``, ``epoch_seconds``, ``start``, ``n_epochs``, ``in_bed``,
        ``p_sleep`` (None for rules), ``sleep`` (1 = sleep, None = unscored: no counts), ``parameters`` over the in-bed
        epochs, ``agreement`` with the reference (None without one; the night's
        :func:`models.compare_night`: epoch metrics, the reference's parameters, and method -
        reference differences with the reference's unscored epochs masked), ``protocol`` (the
        definitions applied), ``intervals``, ``interval_level``, ``uncertainty_min`` and
        ``p_sleep_posterior`` (see the module docstring; None for rules and models without decoding)
        and, for models, ``offset``. NaN values are None.
    """
    first, stop = night.in_bed
    if model is None:
        rule = score_with_rule(night.counts, night.epoch_seconds, method)
        sleep, p_sleep, score = rule.sleep, None, rule.score
    else:
        p_sleep = model.predict_proba(night, offset=offset, descriptors=descriptors, features=features)
        sleep = model.calls(p_sleep)  # NaN (unscored) where the night has no counts
        score = p_sleep
    params = sleep_parameters(sleep, night.epoch_seconds, lights_off_idx=first, lights_on_idx=stop,
                              protocol=protocol).as_dict()
    agreement = None
    reference = night.reference_sleep()
    if reference is not None and night.has_reference:
        compared = compare_night(reference, {method: (sleep, score)}, epoch_seconds=night.epoch_seconds,
                                 lights_off_idx=first, lights_on_idx=stop, missing=night.missing,
                                 parameter_options={"protocol": protocol})
        reference_parameters = compared.reference_parameters.as_dict()
        agreement = {
            "epochs": json_record(compared.epoch_metrics[method]),
            "reference_parameters": json_record({k: reference_parameters[k] for k in PARAMETER_NAMES}),
            "differences": json_record(compared.differences[method]),
        }
    body: dict[str, Any] = {
        "method": method, "model_version": version,
        "epoch_seconds": int(night.epoch_seconds), "start": night.start.isoformat(), "n_epochs": night.n_epochs,
        "in_bed": [int(first), int(stop)],
        "p_sleep": None if p_sleep is None else probabilities(p_sleep),
        "sleep": [None if math.isnan(v) else int(v) for v in np.asarray(sleep, dtype=np.float64).tolist()],
        "parameters": json_record(params),
        "agreement": agreement,
        "protocol": protocol.to_dict(),
    }
    body |= {"intervals": None, "interval_level": None, "uncertainty_min": None, "p_sleep_posterior": None}
    if model is not None:
        body["offset"] = float(offset)
        body |= decoded_extras(model, night, p_sleep, protocol=protocol, seed=seed)
    return body


def uses_current_nights(resolved: _Resolved, model: Any, participant_id: str) -> bool:
    """Whether the scoring's inputs include descriptors computed from the participant's current nights."""
    return (resolved.version is not None and bool(model.descriptor_names_)
            and not resolved.version.metadata.descriptors.get(participant_id))


def scoring_key(session: Session, *, participant: ParticipantInfo, resolved: _Resolved,
                protocol: StudyProtocol) -> tuple[str, Any, float, Mapping[str, float | None] | None]:
    """The cache key of a resolved scoring, with the model, offset and descriptors it scores with.

    The key names the scoring revision, the protocol's fingerprint, the rule or the model
    version's uid with the participant inputs (offset, descriptors), and what ``auto`` passed over.
    """
    revision = f"{SCORING_REVISION}:{protocol.fingerprint()}"  # a new protocol never finds old results
    offset, model = 0.0, None
    descriptors: Mapping[str, float | None] | None = None
    if resolved.version is None:
        key = f"{revision}:{resolved.method}"
    else:
        model = versions.load_model(session, resolved.version)
        if resolved.method == "pooled+offset":
            offset = resolved.version.metadata.offset_of(participant.participant_id)
        if model.descriptor_names_:  # as in training for participants it saw, else from all current nights
            descriptors = (resolved.version.metadata.descriptors.get(participant.participant_id)
                           or _descriptors(session, participant))
        inputs = json.dumps([resolved.method, offset, descriptors], sort_keys=True)
        key = f"{revision}:m:{resolved.version.uid[:16]}:{hashlib.sha1(inputs.encode()).hexdigest()[:16]}"
    if resolved.passed_over:  # auto passed over flagged models: its body says so, so it is kept apart
        key += ":a" + hashlib.sha1(json.dumps(resolved.passed_over, sort_keys=True).encode()).hexdigest()[:6]
    return key, model, offset, descriptors


def score_night(factory: sessionmaker[Session], *, study_id: str, participant_id: str, night_id: str, method: str,
                version: int | None = None, writer: CacheWriter | None = None,
                interval_level: float | None = None) -> bytes:
    """JSON body of a night's scoring, from the cache or computed (and then cached).

    With a ``writer`` the new cache rows (scoring, features) are stored in the background;
    without, before returning. ``interval_level`` (in (0, 1)) replaces the study protocol's level
    of the intervals (None: the protocol's); the protocol's fingerprint keys the cache, so each
    level is cached apart.

    Raises
    ------
    NotFound
        If the study, participant, night or version does not exist.
    BadRequest, Unprocessable
        See :func:`resolve_method`.
    """
    with db.session_scope(factory) as session:
        found = session.execute(
            select(db.Night, db.Participant, db.Study)
            .join(db.Participant, db.Participant.pk == db.Night.participant_pk)
            .join(db.Study, db.Study.pk == db.Participant.study_pk)
            .where(db.Study.study_id == study_id, db.Participant.participant_id == participant_id,
                   db.Night.night_id == night_id)).first()
        if found is None:
            find_participant(session, find_study(session, study_id), participant_id)  # names what is missing
            raise NotFound(f"no night {night_id!r} for participant {participant_id!r}")
        row, participant_row, study_row = found
        study = study_snapshot(study_row)
        participant = participant_snapshot(participant_row, study.study_id)
        resolved = resolve_method(session, study=study, participant=participant, method=method, version=version)
        protocol = at_level(study_protocol(session, study), interval_level)
        key, model, offset, descriptors = scoring_key(session, participant=participant, resolved=resolved,
                                                      protocol=protocol)
        cached = session.scalar(select(db.Scoring.body).where(db.Scoring.night_pk == row.pk,
                                                              db.Scoring.cache_key == key))
        if cached is not None:
            return zlib.decompress(cached)
        night = night_from_row(row, participant_id=participant_id)
        night_pk, night_hash, stored_id = row.pk, row.content_hash, row.night_id
        features = None if model is None else load_features(session, night_pk=night_pk, config=model.feature_config_)
    if model is not None and features is None:
        features = night_features(night, model.feature_config_)
        _save(factory, writer, features_row(night_pk=night_pk, config=model.feature_config_, features=features))
    body, stored = fresh_scoring(night, night_pk=night_pk, night_hash=night_hash, night_id=stored_id,
                                 resolved=resolved, key=key, model=model, offset=offset, descriptors=descriptors,
                                 protocol=protocol, features=features)
    _save(factory, writer, stored)
    return body


def fresh_scoring(night: Night, *, night_pk: int, night_hash: str, night_id: str, resolved: _Resolved, key: str,
                  model: Any, offset: float, descriptors: Mapping[str, float | None] | None,
                  protocol: StudyProtocol, features: FeatureMatrix | None) -> tuple[bytes, db.Scoring]:
    """A night's scoring computed now: the JSON body and the ``scorings`` row that stores it (not added yet)."""
    number = None if resolved.version is None else resolved.version.version
    v = resolved.version
    seed = 0 if v is None else interval_seed(night_id, model_key(v.kind, v.version, v.metadata.training_hashes))
    # stored descriptors keep a missing value as None (JSON); the model reads it as NaN
    numeric = None if descriptors is None else {k: math.nan if v is None else v for k, v in descriptors.items()}
    result = compute_scoring(night, method=resolved.method, model=model, version=number,
                             offset=offset, descriptors=numeric, features=features, protocol=protocol,
                             seed=seed)
    if resolved.passed_over:
        result["auto"] = {"method": resolved.method, "passed_over": resolved.passed_over}
    body = json.dumps(result, separators=(",", ":"), allow_nan=False).encode()
    return body, db.Scoring(night_pk=night_pk, model_version_pk=None if resolved.version is None
                            else resolved.version.pk, cache_key=key, night_hash=night_hash,
                            method=resolved.method, body=zlib.compress(body, 1), created_at=db.utcnow())


def _save(factory: sessionmaker[Session], writer: CacheWriter | None, row: db.Base) -> None:
    """Store a cache row now, or hand it to the background writer."""
    if writer is not None:
        writer.submit(row)
        return
    try:
        with db.session_scope(factory, write=True) as session:
            session.add(row)
    except IntegrityError:
        pass  # a concurrent request stored the same result

