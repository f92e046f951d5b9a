"""Reviews of a night without PSG: blind double entry, preview, adjudication and the review context.

Roles: reviewer for posting a review, previewing one, reading the night's reviews (as the blind
rule allows: see :mod:`service.results.reviews`) and the review context; analyst for adjudicating.
"""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Body, Depends, Path
from fastapi.concurrency import run_in_threadpool

from ...results import reviews
from ...store.tokens import Role
from ..deps import FactoryDep, StudyAccess, study_access
from ..problems import problem_responses
from ..review_schemas import (
    AdjudicationIn,
    AdjudicationOut,
    PreviewIn,
    PreviewOut,
    ReviewAccepted,
    ReviewContextOut,
    ReviewIn,
    ReviewsOut,
)
from .studies import ParticipantPath

__all__ = ["router"]

router = APIRouter(prefix="/v1/studies/{study}/participants/{pid}/nights/{night_id}", tags=["reviews"])
NightIdPath = Annotated[str, Path(pattern=r"^[0-9a-f]{1,64}$", description="night id")]
ReviewerAccess = Annotated[StudyAccess, Depends(study_access(Role.reviewer))]
AnalystAccess = Annotated[StudyAccess, Depends(study_access(Role.analyst))]


def _submission(body: ReviewIn) -> reviews.Submission:
    return reviews.Submission(wake_intervals=[i.model_dump() for i in body.wake_intervals],
                              sleep_intervals=[i.model_dump() for i in body.sleep_intervals],
                              rest_interval=None if body.rest_interval is None else body.rest_interval.model_dump(),
                              labels=body.labels)


@router.post("/reviews", status_code=201, response_model=ReviewAccepted, responses=problem_responses(409))
async def post_review(access: ReviewerAccess, pid: ParticipantPath, night_id: NightIdPath, factory: FactoryDep,
                      body: Annotated[ReviewIn, Body()]) -> Any:
    """Submit one review of a night without PSG (two per night, each from its own reviewer and token).

    Intervals are epochs `[start_epoch, end_epoch)` (end exclusive) marked on the calls shown by the
    review context: wake intervals, then sleep intervals, are set on those calls; epochs outside
    `rest_interval` are not judged. Or send `labels` (1 sleep, 0 wake, null not judged) per epoch.
    A bad interval is refused with 422 naming it and its index; a third review, a second one from
    the same token or reviewer, or one of a night with PSG with 409.
    """
    return await run_in_threadpool(
        reviews.submit_review, factory, study_id=access.study_id, participant_id=pid, night_id=night_id,
        reviewer=body.reviewer, token_id=access.actor, submission=_submission(body), submitted=body.submitted(),
        note=body.note)


@router.get("/reviews", response_model=ReviewsOut)
async def get_reviews(access: ReviewerAccess, pid: ParticipantPath, night_id: NightIdPath,
                      factory: FactoryDep) -> Any:
    """The night's reviews the caller may see: their own until both are in, then both with their discrepancy.

    Analysts and admins also see that another review exists (id, reviewer, time) before both are in.
    """
    return await run_in_threadpool(reviews.night_review_state, factory, study_id=access.study_id,
                                   participant_id=pid, night_id=night_id, principal=access.principal)


@router.post("/reviews/adjudication", status_code=201, response_model=AdjudicationOut,
             responses=problem_responses(409))
async def post_adjudication(access: AnalystAccess, pid: ParticipantPath, night_id: NightIdPath,
                            factory: FactoryDep, body: Annotated[AdjudicationIn, Body()]) -> Any:
    """Store the night's correction once both reviews are in (analyst): `accept` a review, or judge it anew.

    The correction is the night's corrected labels, kept apart from any PSG reference; a later
    adjudication replaces it.
    """
    return await run_in_threadpool(
        reviews.adjudicate, factory, study_id=access.study_id, participant_id=pid, night_id=night_id,
        adjudicator=body.reviewer, token_id=access.actor, submission=_submission(body), accept=body.accept,
        note=body.note)


@router.post("/reviews/preview", response_model=PreviewOut, responses=problem_responses(409))
async def post_preview(access: ReviewerAccess, pid: ParticipantPath, night_id: NightIdPath, factory: FactoryDep,
                       body: Annotated[PreviewIn, Body()]) -> Any:
    """The parameters a review would give, and how many epochs it calls sleep or wake (nothing is stored)."""
    return await run_in_threadpool(reviews.preview, factory, study_id=access.study_id, participant_id=pid,
                                   night_id=night_id, submission=_submission(body))


@router.get("/review-context", response_model=ReviewContextOut, responses=problem_responses(409))
async def get_review_context(access: ReviewerAccess, pid: ParticipantPath, night_id: NightIdPath,
                             factory: FactoryDep) -> Any:
    """What a reviewer is shown: counts, the deployed scoring's calls, P(sleep) and intervals, and the queue's
    neighbours."""
    return await run_in_threadpool(reviews.review_context, factory, study_id=access.study_id, participant_id=pid,
                                   night_id=night_id)
