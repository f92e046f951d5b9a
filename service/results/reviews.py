"""Reviews of a night: labels from a submission, the blind rule, adjudication and the review context.

Blind double entry, for every role: until a night has both its reviews, a caller sees the content
(labels, parameters, intervals, note) of their own review only (the one posted with their token).
Reviewers see nothing of another review; analysts and admins see that it exists (id, reviewer,
time). Once both are in, everyone allowed on the night sees both reviews and their
``discrepancy`` (:func:`models.review_discrepancy`).

A review's labels start from the calls the reviewer is shown (the deployed scoring,
:func:`service.results.review_queue.shown_scoring`), as :func:`models.labels_from_review` sets them.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sqlalchemy.orm import Session, sessionmaker

from models import Night, StudyProtocol, labels_from_review, review_discrepancy, review_parameters

from ..errors import Conflict, Unprocessable
from ..store import db, registry
from ..store.protocols import study_protocol
from ..store.reviews import (
    REVIEWS_PER_NIGHT,
    CorrectionInfo,
    ReviewInfo,
    add_review,
    night_correction,
    night_reviews,
    review_statuses,
    save_correction,
)
from ..store.tokens import Principal, Role
from .review_queue import model_version_shown, review_queue, shown_scoring

__all__ = ["Submission", "adjudicate", "json_safe", "labels_list", "labels_summary", "night_review_state", "preview",
           "review_context", "submit_review"]


def json_safe(value: Any) -> Any:
    """``value`` with every NaN or infinite float (nested in dicts, lists, tuples) as None, numpy scalars as Python."""
    if isinstance(value, dict):
        return {k: json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_safe(v) for v in value]
    if isinstance(value, np.ndarray):
        return [json_safe(v) for v in value.tolist()]
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, float | np.floating):
        return float(value) if math.isfinite(value) else None
    return value


@dataclass(frozen=True)
class Submission:
    """A review's content as posted (intervals as ``{"start_epoch", "end_epoch"}`` dicts, or labels)."""

    wake_intervals: Sequence[dict[str, int]] = ()
    sleep_intervals: Sequence[dict[str, int]] = ()
    rest_interval: dict[str, int] | None = None
    labels: Sequence[int | None] | None = None


def labels_list(labels: NDArray[np.float64]) -> list[int | None]:
    """Labels as JSON: 1 sleep, 0 wake, null not judged."""
    return [None if math.isnan(v) else int(v) for v in labels.tolist()]


def labels_summary(labels: NDArray[np.float64], *, epoch_seconds: int) -> dict[str, Any]:
    """How many epochs the labels call sleep, wake or leave unjudged (and the judged minutes)."""
    judged = ~np.isnan(labels)
    return {"n_epochs": int(labels.size), "sleep_epochs": int(np.sum(labels == 1.0)),
            "wake_epochs": int(np.sum(labels == 0.0)), "not_judged_epochs": int(np.sum(~judged)),
            "judged_min": float(np.sum(judged)) * epoch_seconds / 60.0}


def _base_calls(shown: dict[str, Any]) -> NDArray[np.float64]:
    return np.array([np.nan if v is None else float(v) for v in shown["sleep"]], dtype=np.float64)


def _labels(night: Night, shown: dict[str, Any], submission: Submission) -> NDArray[np.float64]:
    return labels_from_review(night.n_epochs, base_calls=_base_calls(shown),
                              wake_intervals=list(submission.wake_intervals),
                              sleep_intervals=list(submission.sleep_intervals),
                              rest_interval=submission.rest_interval,
                              labels=None if submission.labels is None else
                              [np.nan if v is None else float(v) for v in submission.labels])


def _load(factory: sessionmaker[Session], study_id: str, participant_id: str,
          night_id: str) -> tuple[Night, int, StudyProtocol]:
    """The night, its row key and the study's protocol; a night with PSG is refused (409 ``has_reference``)."""
    with db.session_scope(factory) as session:
        row = registry.night_row(session, study_id, participant_id, night_id)
        night = registry.load_night(session, study_id=study_id, participant_id=participant_id, night_id=night_id)[1]
        protocol = study_protocol(session, study_id)
        if row.labelled:
            raise Conflict(f"night {night_id!r} has a PSG reference; only nights without one are reviewed",
                           code="has_reference")
        return night, row.pk, protocol


def preview(factory: sessionmaker[Session], *, study_id: str, participant_id: str, night_id: str,
            submission: Submission) -> dict[str, Any]:
    """Parameters and a summary of the labels a submission would give (nothing stored)."""
    night, _, protocol = _load(factory, study_id, participant_id, night_id)
    shown = shown_scoring(factory, study_id=study_id, participant_id=participant_id, night_id=night_id)
    labels = _labels(night, shown, submission)
    return {"parameters": json_safe(review_parameters(labels, epoch_seconds=night.epoch_seconds, protocol=protocol)),
            "labels_summary": labels_summary(labels, epoch_seconds=night.epoch_seconds)}


def submit_review(factory: sessionmaker[Session], *, study_id: str, participant_id: str, night_id: str,
                  reviewer: str, token_id: str, submission: Submission, submitted: dict[str, Any],
                  note: str | None) -> dict[str, Any]:
    """Store a review; the answer of ``POST .../reviews``.

    Raises
    ------
    InvalidReviewError
        If an interval or the labels do not fit the night (the message names the field and index).
    Conflict
        See :func:`service.store.reviews.add_review`; ``has_reference`` for a night with PSG.
    """
    night, night_pk, protocol = _load(factory, study_id, participant_id, night_id)
    shown = shown_scoring(factory, study_id=study_id, participant_id=participant_id, night_id=night_id)
    labels = _labels(night, shown, submission)
    parameters = json_safe(review_parameters(labels, epoch_seconds=night.epoch_seconds, protocol=protocol))
    with db.session_scope(factory, write=True) as session:
        info = add_review(session, study_id=study_id, night_pk=night_pk, night_id=night_id, reviewer=reviewer,
                          token_id=token_id, labels=labels, intervals=submitted, note=note,
                          model_version_shown=model_version_shown(shown))
        status = review_statuses(session, [night_pk])[night_pk]
    return {"review_id": info.review_id, "night_id": night_id, "reviewer": info.reviewer,
            "submitted_at": info.submitted_at, "parameters": parameters, "status": status}


def _shown_review(review: ReviewInfo, *, principal: Principal, complete: bool, epoch_seconds: int,
                  protocol: StudyProtocol) -> dict[str, Any] | None:
    own = review.token_id == principal.token_id
    head = {"review_id": review.review_id, "reviewer": review.reviewer, "submitted_at": review.submitted_at,
            "own": own}
    if complete or own:
        return {**head, "labels": labels_list(review.labels), "intervals": review.intervals, "note": review.note,
                "model_version_shown": review.model_version_shown,
                "parameters": json_safe(review_parameters(review.labels, epoch_seconds=epoch_seconds,
                                                          protocol=protocol))}
    return head if principal.role >= Role.analyst else None


def _status(reviews: Sequence[ReviewInfo], correction: CorrectionInfo | None) -> str:
    if correction is not None:
        return "adjudicated"
    return "open" if not reviews else "reviewed" if len(reviews) >= REVIEWS_PER_NIGHT else "in_review"


def night_review_state(factory: sessionmaker[Session], *, study_id: str, participant_id: str, night_id: str,
                       principal: Principal) -> dict[str, Any]:
    """The night's reviews as ``principal`` may see them (the blind rule), and the discrepancy once both are in."""
    with db.session_scope(factory) as session:
        row = registry.night_row(session, study_id, participant_id, night_id)
        epoch_seconds = row.epoch_seconds
        reviews = night_reviews(session, row.pk)
        correction = night_correction(session, row.pk)
        protocol = study_protocol(session, study_id)
    complete = len(reviews) >= REVIEWS_PER_NIGHT
    shown = [s for r in reviews if (s := _shown_review(r, principal=principal, complete=complete,
                                                       epoch_seconds=epoch_seconds, protocol=protocol)) is not None]
    discrepancy = None
    if complete:
        discrepancy = review_discrepancy(reviews[0].labels, reviews[1].labels, epoch_seconds=epoch_seconds,
                                         protocol=protocol)
        discrepancy = json_safe({**discrepancy, "review_a": reviews[0].review_id, "review_b": reviews[1].review_id})
    return {"night_id": night_id, "status": _status(reviews, correction),
            "reviews_needed": max(0, REVIEWS_PER_NIGHT - len(reviews)), "data": shown, "discrepancy": discrepancy,
            "correction": None if correction is None else correction.provenance()}


def adjudicate(factory: sessionmaker[Session], *, study_id: str, participant_id: str, night_id: str,
               adjudicator: str, token_id: str, submission: Submission, accept: str | None,
               note: str | None) -> dict[str, Any]:
    """Store the night's correction: the accepted review's labels, or the adjudicator's own submission.

    Raises
    ------
    Conflict
        ``reviews_incomplete`` before both reviews are in; ``has_reference`` for a night with PSG.
    Unprocessable
        ``unknown_review`` if ``accept`` is not a review of this night.
    """
    night, night_pk, protocol = _load(factory, study_id, participant_id, night_id)
    shown = shown_scoring(factory, study_id=study_id, participant_id=participant_id, night_id=night_id)
    with db.session_scope(factory) as session:
        reviews = night_reviews(session, night_pk)
    if len(reviews) < REVIEWS_PER_NIGHT:
        raise Conflict(f"night {night_id!r} has {len(reviews)} of its {REVIEWS_PER_NIGHT} reviews; adjudicate once "
                       "both are in", code="reviews_incomplete")
    if accept is not None:
        found = [r for r in reviews if r.review_id == accept]
        if not found:
            raise Unprocessable(f"accept: {accept!r} is not a review of night {night_id!r}; its reviews are "
                                f"{', '.join(r.review_id for r in reviews)}", code="unknown_review")
        labels = found[0].labels
    else:
        labels = _labels(night, shown, submission)
    with db.session_scope(factory, write=True) as session:
        correction = save_correction(session, study_id=study_id, night_pk=night_pk, night_id=night_id,
                                     labels=labels, reviews=reviews, adjudicator=adjudicator, token_id=token_id,
                                     note=note, model_version_shown=model_version_shown(shown),
                                     accepted_review_id=accept)
    return {"night_id": night_id, "status": "adjudicated",
            "parameters": json_safe(review_parameters(labels, epoch_seconds=night.epoch_seconds, protocol=protocol)),
            "correction": correction.provenance()}


def _counts(night: Night) -> list[float | None]:
    return [None if math.isnan(c) else float(c) for c in np.asarray(night.counts, dtype=np.float64).tolist()]


def review_context(factory: sessionmaker[Session], *, study_id: str, participant_id: str,
                   night_id: str) -> dict[str, Any]:
    """What the review page shows for a night: its counts, the calls shown and the queue's neighbours."""
    night, night_pk, _ = _load(factory, study_id, participant_id, night_id)
    shown = shown_scoring(factory, study_id=study_id, participant_id=participant_id, night_id=night_id)
    queue = review_queue(factory, study_id=study_id)
    keys = [(q.participant_id, q.night_id) for q in queue]
    at = keys.index((participant_id, night_id)) if (participant_id, night_id) in keys else None

    def ref(i: int) -> dict[str, str] | None:
        return None if at is None or not 0 <= i < len(keys) else {"participant_id": keys[i][0],
                                                                   "night_id": keys[i][1]}

    with db.session_scope(factory) as session:
        status = review_statuses(session, [night_pk])[night_pk]
    uncertainty = shown.get("uncertainty_min")
    return {"night_id": night_id, "participant_id": participant_id, "epoch_seconds": int(shown["epoch_seconds"]),
            "start": shown["start"], "counts": _counts(night), "calls": shown["sleep"], "p_sleep": shown["p_sleep"],
            "intervals": shown.get("intervals"), "uncertainty_min": None if uncertainty is None else float(uncertainty),
            "method": shown["method"], "model_version": shown.get("model_version"),
            "model_version_shown": model_version_shown(shown), "parameters": shown["parameters"],
            "in_bed": list(shown["in_bed"]), "status": status,
            "queue_neighbours": {"previous": None if at is None else ref(at - 1),
                                 "next": None if at is None else ref(at + 1)}}
