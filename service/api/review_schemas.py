"""HTTP shapes of the review queue, night reviews, adjudication and inter-rater agreement."""

from __future__ import annotations

from datetime import datetime
from typing import Any, Literal

from pydantic import BaseModel, Field, model_validator

from .schemas import _Strict

__all__ = ["AdjudicationIn", "AdjudicationOut", "AgreementOut", "CorrectionOut", "EpochIntervalIn", "NightRef",
           "PreviewIn", "PreviewOut", "QueueItemOut", "QueuePage", "ReviewAccepted", "ReviewContextOut", "ReviewIn",
           "ReviewOut", "ReviewsOut"]

ReviewStatus = Literal["open", "in_review", "reviewed", "adjudicated"]
_MAX_INTERVALS = 5000
_MAX_EPOCHS = 200_000


class EpochIntervalIn(_Strict):
    """Epochs [start_epoch, end_epoch) of the night (end exclusive, 0-based)."""

    start_epoch: int = Field(ge=0, le=10**9)
    end_epoch: int = Field(ge=0, le=10**9)


class ReviewIn(_Strict):
    """A review: intervals marked on the calls shown (wake, then sleep, within a rest interval), or labels."""

    reviewer: str = Field(min_length=1, max_length=64, pattern=r"^\S(.*\S)?$", description="the reviewer's name")
    wake_intervals: list[EpochIntervalIn] = Field(default_factory=list, max_length=_MAX_INTERVALS)
    sleep_intervals: list[EpochIntervalIn] = Field(default_factory=list, max_length=_MAX_INTERVALS)
    rest_interval: EpochIntervalIn | None = Field(
        default=None, description="the rest period judged; epochs outside it are not judged (null: the whole night)")
    labels: list[Literal[0, 1] | None] | None = Field(
        default=None, max_length=_MAX_EPOCHS,
        description="instead of intervals: per epoch 1 sleep, 0 wake, null not judged")
    note: str | None = Field(default=None, max_length=2000)

    @model_validator(mode="after")
    def _labels_or_intervals(self) -> ReviewIn:
        if self.labels is not None and (self.wake_intervals or self.sleep_intervals or self.rest_interval):
            raise ValueError("send either labels or intervals (wake_intervals, sleep_intervals, rest_interval), "
                             "not both")
        return self

    def submitted(self) -> dict[str, Any]:
        """What is stored as submitted (the intervals, or how many labels were sent)."""
        if self.labels is not None:
            return {"labels": len(self.labels)}
        return {"wake_intervals": [i.model_dump() for i in self.wake_intervals],
                "sleep_intervals": [i.model_dump() for i in self.sleep_intervals],
                "rest_interval": None if self.rest_interval is None else self.rest_interval.model_dump()}


class AdjudicationIn(ReviewIn):
    """The final correction: a review's body (the adjudicator's own judgement), or ``accept`` one review as is."""

    accept: str | None = Field(default=None, pattern=r"^[0-9a-f]{1,32}$",
                               description="a review id of the night whose labels become the correction")

    @model_validator(mode="after")
    def _accept_alone(self) -> AdjudicationIn:
        if self.accept is not None and (self.labels is not None or self.wake_intervals or self.sleep_intervals
                                        or self.rest_interval):
            raise ValueError("accept takes the review's labels as they are; send no labels or intervals with it")
        return self


class PreviewIn(ReviewIn):
    """A review's body; the reviewer's name is optional here."""

    reviewer: str | None = Field(default=None, max_length=64)  # type: ignore[assignment]


class ReviewAccepted(BaseModel):
    review_id: str
    night_id: str
    reviewer: str
    submitted_at: datetime
    parameters: dict[str, Any]
    status: ReviewStatus


class ReviewOut(BaseModel):
    """A review as the caller may see it: content (labels, parameters) only where the blind rule allows."""

    review_id: str
    reviewer: str
    submitted_at: datetime
    own: bool = Field(description="posted with the caller's token")
    labels: list[int | None] | None = None
    parameters: dict[str, Any] | None = None
    intervals: dict[str, Any] | None = None
    note: str | None = None
    model_version_shown: str | None = None


class CorrectionOut(BaseModel):
    adjudicated_by: str
    reviewers: list[str]
    adjudicated_at: datetime
    model_version_shown: str
    accepted_review_id: str | None = None
    review_ids: list[str]


class ReviewsOut(BaseModel):
    night_id: str
    status: ReviewStatus
    reviews_needed: int = Field(description="reviews still to come before the night is reviewed")
    data: list[ReviewOut]
    discrepancy: dict[str, Any] | None = Field(default=None, description="once both reviews are in")
    correction: CorrectionOut | None = None


class AdjudicationOut(BaseModel):
    night_id: str
    status: ReviewStatus
    parameters: dict[str, Any]
    correction: CorrectionOut


class PreviewOut(BaseModel):
    parameters: dict[str, Any]
    labels_summary: dict[str, Any]


class QueueItemOut(BaseModel):
    night_id: str
    participant_id: str
    priority: float
    reasons: list[str]
    status: ReviewStatus
    expected_change_min: float
    label: str | None
    start: str


class QueuePage(BaseModel):
    data: list[QueueItemOut]
    count: int
    limit: int
    offset: int


class NightRef(BaseModel):
    participant_id: str
    night_id: str


class ReviewContextOut(BaseModel):
    night_id: str
    participant_id: str
    epoch_seconds: int
    start: str
    counts: list[float | None]
    calls: list[int | None]
    p_sleep: list[float | None] | None
    intervals: dict[str, Any] | None
    uncertainty_min: float | None
    method: str
    model_version: int | None
    model_version_shown: str
    parameters: dict[str, Any]
    in_bed: list[int]
    status: ReviewStatus
    queue_neighbours: dict[str, NightRef | None]


class AgreementOut(BaseModel):
    """Inter-rater figures of a study (:func:`models.inter_rater_summary` each; null without pairs)."""

    study_id: str
    epoch_seconds: int
    n_reviews: int
    n_nights_reviewed: int = Field(description="nights with both reviews in")
    n_corrections: int
    reviewer_vs_reviewer: dict[str, Any] | None
    reviewers_vs_model: dict[str, Any] | None = Field(description="each review against the scoring shown")
    corrections_vs_model: dict[str, Any] | None
    nights: list[dict[str, Any]] = Field(description="per night with both reviews: participant_id, night_id, kappa")
