"""A study's review queue and its reviews' inter-rater agreement.

Roles: reviewer for the queue; analyst for the agreement figures.
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from fastapi import APIRouter, Depends, Query
from fastapi.concurrency import run_in_threadpool

from ...results.review_agreement import study_agreement
from ...results.review_queue import review_queue
from ...store.tokens import Role
from ..deps import FactoryDep, StudyAccess, study_access
from ..review_schemas import AgreementOut, QueuePage
from .studies import Limit, Offset

__all__ = ["router"]

router = APIRouter(prefix="/v1/studies/{study}", tags=["review-queue"])
StatusQuery = Annotated[Literal["open", "in_review", "reviewed", "adjudicated"] | None, Query(
    description="only nights of this review status")]


@router.get("/review-queue", response_model=QueuePage)
async def get_review_queue(access: Annotated[StudyAccess, Depends(study_access(Role.reviewer))],
                           factory: FactoryDep, limit: Limit = 50, offset: Offset = 0,
                           status: StatusQuery = None) -> Any:
    """Nights without PSG, highest review priority first, with the reasons and each night's review status.

    Nights with a PSG reference are never queued. `count` is the number of nights of the status
    asked for (all statuses without `status`).
    """
    entries = await run_in_threadpool(review_queue, factory, study_id=access.study_id)
    if status is not None:
        entries = [e for e in entries if e.status == status]
    return {"data": [e.to_dict() for e in entries[offset:offset + limit]], "count": len(entries), "limit": limit,
            "offset": offset}


@router.get("/reviews/agreement", response_model=AgreementOut)
async def get_review_agreement(access: Annotated[StudyAccess, Depends(study_access(Role.analyst))],
                               factory: FactoryDep) -> Any:
    """Inter-rater figures: reviewer vs reviewer on nights with both reviews, and reviews and corrections vs
    the scoring shown (kappa per night and mean, parameter differences)."""
    return await run_in_threadpool(study_agreement, factory, study_id=access.study_id)
