"""What a training job hands to :mod:`models` training: the nights' database keys and their features.

Training gets its night features from the database (:mod:`service.store.features`): the stored
matrices are loaded in bulk and the missing ones computed here and stored, before the training
call, which receives them as a :class:`models.PrecomputedFeatures` source and computes none.
"""

from __future__ import annotations

from collections.abc import Sequence

from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from models import FeatureConfig, Night, PrecomputedFeatures, Progress

from ..store import db
from ..store.features import load_features_of, store_features

__all__ = ["night_pks_of", "training_features"]


def night_pks_of(session: Session, *, study_pk: int, nights: Sequence[Night]) -> list[int]:
    """Database keys of ``nights`` (of the study), in order."""
    pk_of = {(pid, content_hash): pk for pk, pid, content_hash in session.execute(
        select(db.Night.pk, db.Participant.participant_id, db.Night.content_hash)
        .join(db.Participant, db.Participant.pk == db.Night.participant_pk)
        .where(db.Participant.study_pk == study_pk))}
    return [pk_of[(n.participant_id, n.content_hash)] for n in nights]


def training_features(factory: sessionmaker[Session], nights: Sequence[Night], night_pks: Sequence[int], *,
                       config: FeatureConfig, n_jobs: int, progress: Progress, stage: str) -> PrecomputedFeatures:
    """Features of ``nights`` for training: the stored ones, and the missing ones computed here and stored.

    Parameters
    ----------
    nights : sequence of Night
        The nights training computes features of (the labelled ones).
    night_pks : sequence of int
        Their database keys, in the same order.
    config : FeatureConfig
    n_jobs : int
        Processes computing missing features.
    progress : callable
        Called after each computed night (it raises to stop the job).
    stage : str
        Progress label.
    """
    with db.session_scope(factory) as session:
        stored = load_features_of(session, night_pks=night_pks, config=config)
    source = PrecomputedFeatures({n.content_hash: stored[pk] for n, pk in zip(nights, night_pks, strict=True)
                                  if pk in stored})
    missing = [(n, pk) for n, pk in zip(nights, night_pks, strict=True) if source.lookup(n, config) is None]
    computed = source.features_of([n for n, _ in missing], config, n_jobs=n_jobs)
    for done, ((_, pk), features) in enumerate(zip(missing, computed, strict=True), start=1):
        store_features(factory, night_pk=pk, config=config, features=features)
        progress(done, len(missing), stage)
    return source
