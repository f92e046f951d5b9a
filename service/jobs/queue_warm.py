"""After a training: the study's review-queue nights scored with the models now active, before anyone asks.

A new or newly chosen model makes every stored scoring of ``auto`` stale, so the first review-queue
request after a training would score every night without PSG (features, the model, the per-night
intervals) while the reviewer waits. The training job does it instead, right after storing the
version: the missing features of those nights for the active models' feature sets (computed with
the job's processes, as training's own), then :func:`service.results.review_queue.review_queue`,
which scores and stores what is missing (:mod:`service.results.bulk_scoring`). The queue request
then reads stored bodies only. A failure here is logged and leaves the job's outcome as it is: the
request computes what is missing, as before.
"""

from __future__ import annotations

import logging

from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from models import FeatureConfig

from ..store import db
from ..store.codec import night_from_row
from ..store.registry import find_study
from .training_inputs import training_features

__all__ = ["warm_review_queue"]

log = logging.getLogger("nightbank.worker")


def _quiet(done: int, total: int, stage: str) -> None:
    """No progress report (see :func:`warm_review_queue`)."""


def _configs(session: Session, study_pk: int) -> list[FeatureConfig]:
    found: dict[str, FeatureConfig] = {}
    for meta in session.scalars(select(db.ModelVersion.model_meta).where(db.ModelVersion.study_pk == study_pk,
                                                                         db.ModelVersion.is_active)):
        config = FeatureConfig.from_dict(meta["feature_set"]["config"])
        found.setdefault(config.version, config)
    return list(found.values())


def warm_review_queue(factory: sessionmaker[Session], *, study_id: str, n_jobs: int) -> None:
    """Store the features and scorings the study's review queue reads (errors are logged, not raised).

    The job's progress is not reported from here: it stays at the training's (done = total).

    Parameters
    ----------
    study_id : str
    n_jobs : int
        Processes computing missing features.
    """
    from ..results.review_queue import review_queue  # the results layer sits above the jobs

    try:
        with db.session_scope(factory) as session:
            study = find_study(session, study_id)
            rows = session.execute(
                select(db.Night, db.Participant.participant_id)
                .join(db.Participant, db.Participant.pk == db.Night.participant_pk)
                .where(db.Participant.study_pk == study.pk, db.Night.labelled.is_(False))
                .order_by(db.Night.pk)).all()
            nights = [night_from_row(row, participant_id=pid) for row, pid in rows]
            pks = [row.pk for row, _ in rows]
            configs = _configs(session, study.pk)
        for config in configs:
            training_features(factory, nights, pks, config=config, n_jobs=n_jobs, progress=_quiet,
                              stage="review queue: night features")
        review_queue(factory, study_id=study_id)
    except Exception:  # noqa: BLE001 - the version is stored; the queue request computes what is missing
        log.warning("study %s: the review queue was not prepared after training", study_id, exc_info=True)
