"""Stored feature matrices: computed once per night and feature configuration, reused by training and scoring.

Computing a night's features is the costly part of training on it or scoring it with a model.
Features depend only on the night's content and the feature configuration, so they are stored
(zlib-compressed float32, ``night_features`` table, deleted with the night) the first time they
are computed with :func:`models.night_features`:

- by idle training workers, right after nights arrive (:func:`warm_features`), for the default
  configuration of :class:`models.TrainingConfig` and the configurations of active models;
- otherwise by the first training (:mod:`service.jobs.training`) or scoring that needs them.

The stored matrix carries its feature-set version and names; models check both before use.
"""

from __future__ import annotations

import zlib
from collections.abc import Iterable
from typing import Any

import numpy as np
from sqlalchemy import and_, select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, sessionmaker

from models import FeatureConfig, FeatureMatrix, NightbankError, TrainingConfig, night_features

from . import db
from .codec import night_from_row

__all__ = ["features_row", "load_features", "load_features_of", "store_features", "warm_features"]

#: Night keys per ``IN (...)`` query when loading in bulk (well under SQLite's variable limit).
_CHUNK = 500


def _matrix(row: db.NightFeatures) -> FeatureMatrix:
    values = np.frombuffer(zlib.decompress(row.matrix), dtype="<f4").reshape(row.n_epochs, len(row.names))
    return FeatureMatrix(values, tuple(row.names), row.version)


def load_features(session: Session, *, night_pk: int, config: FeatureConfig) -> FeatureMatrix | None:
    """The stored matrix of a night for ``config``, or None."""
    row = session.scalar(select(db.NightFeatures).where(db.NightFeatures.night_pk == night_pk,
                                                        db.NightFeatures.config_version == config.version))
    return None if row is None else _matrix(row)


def load_features_of(session: Session, *, night_pks: Iterable[int], config: FeatureConfig) -> dict[int, FeatureMatrix]:
    """The stored matrices of several nights for ``config``: night pk -> matrix (nights without one left out)."""
    pks = sorted(set(night_pks))
    found: dict[int, FeatureMatrix] = {}
    for start in range(0, len(pks), _CHUNK):
        rows = session.scalars(select(db.NightFeatures).where(
            db.NightFeatures.night_pk.in_(pks[start:start + _CHUNK]),
            db.NightFeatures.config_version == config.version))
        found.update((row.night_pk, _matrix(row)) for row in rows)
    return found


def features_row(*, night_pk: int, config: FeatureConfig, features: FeatureMatrix) -> db.NightFeatures:
    """A new ``night_features`` row holding ``features``."""
    return db.NightFeatures(night_pk=night_pk, config_version=config.version, version=features.version,
                            names=list(features.names), n_epochs=int(features.values.shape[0]),
                            matrix=zlib.compress(np.ascontiguousarray(features.values, dtype="<f4").tobytes(), 1),
                            created_at=db.utcnow())


def store_features(factory: sessionmaker[Session], *, night_pk: int, config: FeatureConfig,
                   features: FeatureMatrix) -> None:
    """Store a matrix (a concurrent store of the same matrix, or a deleted night, is ignored)."""
    try:
        with db.session_scope(factory, write=True) as session:
            session.add(features_row(night_pk=night_pk, config=config, features=features))
    except IntegrityError:
        pass


def _configs(session: Session) -> list[FeatureConfig]:
    """The default configuration and those of active models."""
    found = {TrainingConfig().features.version: TrainingConfig().features}
    for meta in session.scalars(select(db.ModelVersion.model_meta).where(db.ModelVersion.is_active)):
        config = FeatureConfig.from_dict(meta["feature_set"]["config"])
        found.setdefault(config.version, config)
    return list(found.values())


def warm_features(factory: sessionmaker[Session], *, limit: int = 8, failed: set[tuple[int, str]] | None = None) -> int:
    """Compute and store missing features of up to ``limit`` nights; returns how many were stored.

    ``failed`` collects ``(night pk, config version)`` pairs whose features could not be computed;
    they are not tried again by the caller that passes the same set.
    """
    failed = set() if failed is None else failed
    with db.session_scope(factory) as session:
        todo: list[tuple[int, FeatureConfig, Any]] = []
        for config in _configs(session):
            missing = (select(db.Night, db.Participant.participant_id)
                       .join(db.Participant, db.Participant.pk == db.Night.participant_pk)
                       .outerjoin(db.NightFeatures, and_(db.NightFeatures.night_pk == db.Night.pk,
                                                         db.NightFeatures.config_version == config.version))
                       .where(db.NightFeatures.pk.is_(None)).order_by(db.Night.pk.desc())
                       .limit(limit - len(todo) + len(failed)))
            for row, pid in session.execute(missing):
                if (row.pk, config.version) not in failed and len(todo) < limit:
                    todo.append((row.pk, config, night_from_row(row, participant_id=pid)))
            if len(todo) >= limit:
                break
    stored = 0
    for night_pk, config, night in todo:
        try:
            features = night_features(night, config)
        except NightbankError:
            failed.add((night_pk, config.version))
            continue
        store_features(factory, night_pk=night_pk, config=config, features=features)
        stored += 1
    return stored
