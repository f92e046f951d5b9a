"""Reviews of nights without PSG and their adjudicated corrections: storage and the review status.

Blind double entry: a night takes two reviews, each from its own reviewer name and its own token
(so "the caller's own review" is always the one posted with the caller's token). A third review
is refused, and so is any review once the night has a correction. An analyst adjudicates: the
correction is stored as the night's corrected labels with its provenance (the reviews'
reviewers, the adjudicator, the scoring shown) and is replaced by a later adjudication.

Labels are stored one byte per epoch, zlib-compressed: 1 sleep, 0 wake, 2 not judged (outside
the rest interval); :func:`decode_labels` gives them back as 1.0 / 0.0 / NaN.

Statuses: ``open`` (no review), ``in_review`` (one), ``reviewed`` (two), ``adjudicated``
(a correction is stored).
"""

from __future__ import annotations

import secrets
import zlib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from models import Night

from ..errors import Conflict
from . import db
from .audit import record_audit
from .codec import night_from_row
from .snapshots import ParticipantInfo

__all__ = ["REVIEWS_PER_NIGHT", "REVIEW_STATUSES", "CorrectionInfo", "ReviewInfo", "add_review",
           "corrections_by_participant", "decode_labels",
           "encode_labels", "night_correction", "night_reviews", "participant_corrections", "review_statuses",
           "save_correction", "study_corrections", "study_review_pairs"]

REVIEWS_PER_NIGHT = 2
REVIEW_STATUSES: tuple[str, ...] = ("open", "in_review", "reviewed", "adjudicated")
_NOT_JUDGED = 2


def encode_labels(labels: ArrayLike) -> bytes:
    """Labels of shape (n_epochs,) (1.0 sleep, 0.0 wake, NaN not judged) as compact bytes."""
    values = np.asarray(labels, dtype=np.float64)
    out = np.full(values.shape, _NOT_JUDGED, dtype=np.uint8)
    out[values == 1.0] = 1
    out[values == 0.0] = 0
    return zlib.compress(out.tobytes(), 6)


def decode_labels(blob: bytes) -> NDArray[np.float64]:
    """Stored label bytes back as an array of shape (n_epochs,): 1.0 sleep, 0.0 wake, NaN not judged."""
    raw = np.frombuffer(zlib.decompress(blob), dtype=np.uint8)
    out = raw.astype(np.float64)
    out[raw == _NOT_JUDGED] = np.nan
    return out


@dataclass(frozen=True)
class ReviewInfo:
    """A stored review; ``labels`` of shape (n_epochs,) as :func:`decode_labels` gives them."""

    review_id: str
    night_pk: int
    reviewer: str
    token_id: str
    labels: NDArray[np.float64]
    intervals: dict[str, Any]
    note: str | None
    model_version_shown: str
    submitted_at: datetime


@dataclass(frozen=True)
class CorrectionInfo:
    """A night's adjudicated correction and its provenance."""

    night_pk: int
    labels: NDArray[np.float64]
    reviewers: list[str]
    review_ids: list[str]
    accepted_review_id: str | None
    adjudicator: str
    adjudicator_token_id: str
    note: str | None
    model_version_shown: str
    adjudicated_at: datetime

    def provenance(self) -> dict[str, Any]:
        """The provenance as the night detail shows it."""
        return {"adjudicated_by": self.adjudicator, "reviewers": list(self.reviewers),
                "adjudicated_at": self.adjudicated_at.isoformat(), "model_version_shown": self.model_version_shown,
                "accepted_review_id": self.accepted_review_id, "review_ids": list(self.review_ids)}


def _review(row: db.NightReview) -> ReviewInfo:
    return ReviewInfo(review_id=row.review_id, night_pk=row.night_pk, reviewer=row.reviewer, token_id=row.token_id,
                      labels=decode_labels(row.labels), intervals=dict(row.intervals), note=row.note,
                      model_version_shown=row.model_version_shown, submitted_at=row.submitted_at)


def _correction(row: db.NightCorrection) -> CorrectionInfo:
    return CorrectionInfo(night_pk=row.night_pk, labels=decode_labels(row.labels), reviewers=list(row.reviewers),
                          review_ids=list(row.review_ids), accepted_review_id=row.accepted_review_id,
                          adjudicator=row.adjudicator, adjudicator_token_id=row.adjudicator_token_id, note=row.note,
                          model_version_shown=row.model_version_shown, adjudicated_at=row.adjudicated_at)


def night_reviews(session: Session, night_pk: int) -> list[ReviewInfo]:
    """The night's reviews in the order they were submitted."""
    rows = session.scalars(select(db.NightReview).where(db.NightReview.night_pk == night_pk)
                           .order_by(db.NightReview.submitted_at, db.NightReview.pk))
    return [_review(r) for r in rows]


def night_correction(session: Session, night_pk: int) -> CorrectionInfo | None:
    """The night's stored correction, or None."""
    row = session.scalar(select(db.NightCorrection).where(db.NightCorrection.night_pk == night_pk))
    return None if row is None else _correction(row)


def review_statuses(session: Session, night_pks: Iterable[int]) -> dict[int, str]:
    """Review status of each night (``open`` for a night without reviews)."""
    pks = list(night_pks)
    out = dict.fromkeys(pks, "open")
    for start in range(0, len(pks), 500):
        part = pks[start:start + 500]
        counted = session.execute(select(db.NightReview.night_pk, func.count()).where(
            db.NightReview.night_pk.in_(part)).group_by(db.NightReview.night_pk))
        for pk, n in counted:
            out[pk] = "reviewed" if n >= REVIEWS_PER_NIGHT else "in_review"
        for pk in session.scalars(select(db.NightCorrection.night_pk).where(db.NightCorrection.night_pk.in_(part))):
            out[pk] = "adjudicated"
    return out


def _lock_night(session: Session, night_pk: int) -> None:
    """Hold the night's row for the transaction (PostgreSQL; SQLite writers are serialised anyway)."""
    session.execute(select(db.Night.pk).where(db.Night.pk == night_pk).with_for_update())


def add_review(session: Session, *, study_id: str, night_pk: int, night_id: str, reviewer: str, token_id: str,
               labels: ArrayLike, intervals: dict[str, Any], note: str | None,
               model_version_shown: str) -> ReviewInfo:
    """Store one review of a night (audited).

    Raises
    ------
    Conflict
        ``already_reviewed`` if this token or this reviewer name already reviewed the night;
        ``review_complete`` if the night has its two reviews; ``already_adjudicated`` if it has a
        correction. Nothing is stored then.
    """
    _lock_night(session, night_pk)
    if session.scalar(select(db.NightCorrection.pk).where(db.NightCorrection.night_pk == night_pk)) is not None:
        raise Conflict(f"night {night_id!r} is already adjudicated; it takes no more reviews",
                       code="already_adjudicated")
    existing = night_reviews(session, night_pk)
    for other in existing:
        if other.token_id == token_id:
            raise Conflict(f"this token already reviewed night {night_id!r} (review {other.review_id}); each review "
                           "comes from its own reviewer's token", code="already_reviewed")
        if other.reviewer == reviewer:
            raise Conflict(f"reviewer {reviewer!r} already reviewed night {night_id!r}", code="already_reviewed")
    if len(existing) >= REVIEWS_PER_NIGHT:
        raise Conflict(f"night {night_id!r} already has its {REVIEWS_PER_NIGHT} reviews", code="review_complete")
    row = db.NightReview(review_id=secrets.token_hex(8), night_pk=night_pk, reviewer=reviewer, token_id=token_id,
                         labels=encode_labels(labels), intervals=intervals, note=note,
                         model_version_shown=model_version_shown, submitted_at=db.utcnow())
    session.add(row)
    session.flush()
    record_audit(session, actor=token_id, action="review.submit", study_id=study_id, subject=night_id,
                 detail={"review_id": row.review_id, "reviewer": reviewer})
    return _review(row)


def save_correction(session: Session, *, study_id: str, night_pk: int, night_id: str, labels: ArrayLike,
                    reviews: Sequence[ReviewInfo], adjudicator: str, token_id: str, note: str | None,
                    model_version_shown: str, accepted_review_id: str | None = None) -> CorrectionInfo:
    """Store (or replace) the night's adjudicated correction (audited)."""
    _lock_night(session, night_pk)
    row = session.scalar(select(db.NightCorrection).where(db.NightCorrection.night_pk == night_pk))
    values: dict[str, Any] = {
        "labels": encode_labels(labels), "reviewers": [r.reviewer for r in reviews],
        "review_ids": [r.review_id for r in reviews], "accepted_review_id": accepted_review_id,
        "adjudicator": adjudicator, "adjudicator_token_id": token_id, "note": note,
        "model_version_shown": model_version_shown, "adjudicated_at": db.utcnow()}
    replaced = row is not None
    if row is None:
        row = db.NightCorrection(night_pk=night_pk, **values)
        session.add(row)
    else:
        for key, value in values.items():
            setattr(row, key, value)
    session.flush()
    record_audit(session, actor=token_id, action="review.adjudicate", study_id=study_id, subject=night_id,
                 detail={"adjudicator": adjudicator, "accepted_review_id": accepted_review_id, "replaced": replaced})
    return _correction(row)


def _study_nights(study_id: str) -> Any:
    return (select(db.Night.pk, db.Night.night_id, db.Participant.participant_id)
            .join(db.Participant, db.Participant.pk == db.Night.participant_pk)
            .join(db.Study, db.Study.pk == db.Participant.study_pk)
            .where(db.Study.study_id == study_id))


def study_corrections(session: Session, study_id: str) -> dict[int, tuple[str, str, CorrectionInfo]]:
    """The study's corrections: night pk -> (participant id, night id, correction)."""
    nights = {pk: (pid, nid) for pk, nid, pid in session.execute(_study_nights(study_id))}
    out: dict[int, tuple[str, str, CorrectionInfo]] = {}
    pks = list(nights)
    for start in range(0, len(pks), 500):
        rows = session.scalars(select(db.NightCorrection)
                               .where(db.NightCorrection.night_pk.in_(pks[start:start + 500])))
        for row in rows:
            out[row.night_pk] = (*nights[row.night_pk], _correction(row))
    return out


def study_review_pairs(session: Session, study_id: str) -> dict[int, tuple[str, str, list[ReviewInfo]]]:
    """Every reviewed night of the study: night pk -> (participant id, night id, its reviews)."""
    nights = {pk: (pid, nid) for pk, nid, pid in session.execute(_study_nights(study_id))}
    out: dict[int, tuple[str, str, list[ReviewInfo]]] = {}
    pks = list(nights)
    for start in range(0, len(pks), 500):
        rows = session.scalars(select(db.NightReview).where(db.NightReview.night_pk.in_(pks[start:start + 500]))
                               .order_by(db.NightReview.submitted_at, db.NightReview.pk))
        for row in rows:
            out.setdefault(row.night_pk, (*nights[row.night_pk], []))[2].append(_review(row))
    return out


def participant_corrections(session: Session, *, participant_pk: int, participant_id: str,
                            include_excluded: bool = False) -> list[tuple[Night, NDArray[np.float64]]]:
    """The participant's corrected nights without PSG, in start order, each with its corrected labels.

    Nights excluded from training are left out unless ``include_excluded``; a night whose labels
    no longer match its length (never expected: nights do not change) is left out.
    """
    query = (select(db.Night, db.NightCorrection.labels)
             .join(db.NightCorrection, db.NightCorrection.night_pk == db.Night.pk)
             .where(db.Night.participant_pk == participant_pk, db.Night.labelled.is_(False))
             .order_by(db.Night.start_utc, db.Night.pk))
    if not include_excluded:
        query = query.where(db.Night.excluded.is_(False))
    out = []
    for row, blob in session.execute(query):
        labels = decode_labels(blob)
        if labels.size == row.n_epochs:
            out.append((night_from_row(row, participant_id=participant_id), labels))
    return out


def corrections_by_participant(session: Session, participants: Iterable[ParticipantInfo]
                               ) -> dict[str, list[tuple[Night, NDArray[np.float64]]]]:
    """:func:`participant_corrections` of each participant that has any, by participant id."""
    out = {}
    for p in participants:
        found = participant_corrections(session, participant_pk=p.pk, participant_id=p.participant_id)
        if found:
            out[p.participant_id] = found
    return out
