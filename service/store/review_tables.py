"""ORM tables of night reviews: reviewers' judgements and adjudicated corrections (see :mod:`service.store.tables`).

:mod:`service.store.db` re-exports them with the other tables, so callers write ``db.NightReview``.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import JSON, ForeignKey, Integer, LargeBinary, String, Text, UniqueConstraint
from sqlalchemy.orm import Mapped, mapped_column

from .tables import Base, UTCDateTime, utcnow

__all__ = ["NightCorrection", "NightReview"]


class NightReview(Base):
    """One reviewer's sleep/wake judgement of a night without PSG (blind double entry: two per night).

    ``labels`` are the reviewed calls per epoch as zlib-compressed bytes, one byte each: 1 sleep,
    0 wake, 2 not judged (outside the rest interval); see :mod:`service.store.reviews`.
    ``intervals`` keeps what was submitted (the intervals, or the per-epoch labels' count).
    """

    __tablename__ = "night_reviews"
    __table_args__ = (UniqueConstraint("night_pk", "token_id", name="uq_night_review_token"),
                      UniqueConstraint("night_pk", "reviewer", name="uq_night_review_reviewer"))

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    review_id: Mapped[str] = mapped_column(String(32), unique=True)
    night_pk: Mapped[int] = mapped_column(ForeignKey("nights.pk", ondelete="CASCADE"), index=True)
    reviewer: Mapped[str] = mapped_column(String(64))
    token_id: Mapped[str] = mapped_column(String(16))
    labels: Mapped[bytes] = mapped_column(LargeBinary)
    intervals: Mapped[dict[str, Any]] = mapped_column(JSON)
    note: Mapped[str | None] = mapped_column(Text, nullable=True)
    #: the scoring the reviewer was shown: its method and model version ("pooled+offset v3", "cole-kripke")
    model_version_shown: Mapped[str] = mapped_column(String(64))
    submitted_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)


class NightCorrection(Base):
    """A night's adjudicated corrected labels (their own kind of label: never a PSG reference).

    ``labels`` are encoded as :attr:`NightReview.labels`; the provenance names the reviews'
    reviewers, the adjudicator and the scoring shown.
    """

    __tablename__ = "night_corrections"

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    night_pk: Mapped[int] = mapped_column(ForeignKey("nights.pk", ondelete="CASCADE"), unique=True)
    labels: Mapped[bytes] = mapped_column(LargeBinary)
    reviewers: Mapped[list[str]] = mapped_column(JSON)
    review_ids: Mapped[list[str]] = mapped_column(JSON)
    #: the review taken as is, or NULL when the adjudicator submitted their own intervals or labels
    accepted_review_id: Mapped[str | None] = mapped_column(String(32), nullable=True)
    adjudicator: Mapped[str] = mapped_column(String(64))
    adjudicator_token_id: Mapped[str] = mapped_column(String(16))
    note: Mapped[str | None] = mapped_column(Text, nullable=True)
    model_version_shown: Mapped[str] = mapped_column(String(64))
    adjudicated_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)
