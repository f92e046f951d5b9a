"""Review pages: the study's ranked queue of nights to check, and one night's review page.

The review page draws the night in the browser (``static/review.js``) from the service's
review context, lets the reviewer mark wake, sleep and rest intervals with the mouse, and asks
the service for the resulting sleep parameters (the study's own definitions, computed on the
server) while the marks change. The page's JSON routes below pass the requests on to the API
(:mod:`service.ui.review_bridge`) after the checks every page action has: a signed-in session,
the session's form token (header :data:`FORM_TOKEN_HEADER`) and a same-site origin.
"""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import HTMLResponse, JSONResponse, Response
from sqlalchemy.orm import Session, sessionmaker

from ..api.deps import FactoryDep
from ..errors import UnsupportedMediaType
from ..store import registry
from ..store.db import session_scope
from ..store.snapshots import NightInfo
from ..store.tokens import list_tokens
from .access import UI_PREFIX, PageAccess, StudyPage, check_form
from .pages import NightIdPath, ParticipantPath, study_info
from .review_bridge import api_error, call_api
from .templating import is_simulated, page

__all__ = ["FORM_TOKEN_HEADER", "QUEUE_PAGE_SIZE", "QUEUE_STATUSES", "REVIEWER_NAME_MAX", "REVIEW_PARAMETERS", "router"]

router = APIRouter()
#: Header in which the review page's script sends the session's form token with each POST.
FORM_TOKEN_HEADER = "X-Form-Token"
QUEUE_STATUSES: tuple[str, ...] = ("open", "in_review", "reviewed", "adjudicated")
QUEUE_PAGE_SIZE = 50
#: Longest reviewer name the service accepts.
REVIEWER_NAME_MAX = 64
#: The parameters the review page shows, in order.
REVIEW_PARAMETERS: tuple[str, ...] = ("sol_min", "tst_min", "waso_min", "awakenings", "sleep_efficiency_pct")
StatusQuery = Annotated[str | None, Query(pattern=f"^({'|'.join(QUEUE_STATUSES)})$",
                                          description="only nights in this review state")]
OffsetQuery = Annotated[int, Query(ge=0, le=1_000_000, description="rows skipped")]
_NIGHT = "/studies/{study}/participants/{pid}/nights/{night_id}"


def _api_night(access: PageAccess, pid: str, night_id: str) -> str:
    return f"/v1/studies/{access.study_id}/participants/{pid}/nights/{night_id}"


def _page_night(access: PageAccess, pid: str, night_id: str) -> str:
    return f"{UI_PREFIX}/studies/{access.study_id}/participants/{pid}/nights/{night_id}"


def _study_context(factory: sessionmaker[Session], access: PageAccess) -> dict[str, Any]:
    study = study_info(factory, access.study_id)
    return {"study": study, "simulated": is_simulated(study.study_id, study.name), "analyse": access.can_analyse}


def _night_and_name(factory: sessionmaker[Session], access: PageAccess, pid: str,
                    night_id: str) -> tuple[NightInfo, str]:
    """The night's metadata and the reviewer name the page suggests (the token's label, else its id)."""
    with session_scope(factory) as session:
        info = registry.get_night(session, study_id=access.study_id, participant_id=pid, night_id=night_id)
        labels = [t.label for t in list_tokens(session, study_id=access.principal.study_id)
                  if t.token_id == access.principal.token_id]
    return info, (labels[0] if labels and labels[0] else access.principal.token_id).strip()[:REVIEWER_NAME_MAX]


def _queue_query(status: str | None, offset: int) -> str:
    parts = [f"status={status}"] if status else []
    return "?" + "&".join([*parts, f"offset={offset}"]) if parts or offset else ""


@router.get("/studies/{study}/review", response_class=HTMLResponse)
async def review_queue_page(request: Request, access: StudyPage, factory: FactoryDep, status: StatusQuery = None,
                            offset: OffsetQuery = 0) -> Response:
    """The nights waiting for review, highest priority first, with the reasons and each night's state."""
    context = await run_in_threadpool(_study_context, factory, access)
    answer = await call_api(request, "GET", f"/v1/studies/{access.study_id}/review-queue",
                            params={"limit": QUEUE_PAGE_SIZE, "offset": offset, "status": status})
    if not answer.ok:
        raise api_error(answer)
    rows: list[dict[str, Any]] = list(answer.body.get("data") or [])
    count = int(answer.body.get("count") or 0)
    base = f"{UI_PREFIX}/studies/{access.study_id}"
    pages = {"previous": base + "/review" + _queue_query(status, max(offset - QUEUE_PAGE_SIZE, 0))
             if offset > 0 else None,
             "next": base + "/review" + _queue_query(status, offset + QUEUE_PAGE_SIZE)
             if offset + len(rows) < count else None}
    return page(request, "review_queue.html", principal=access.principal, rows=rows, count=count, offset=offset,
                status=status, statuses=QUEUE_STATUSES, pages=pages, base=base, **context)


@router.get(_NIGHT + "/review", response_class=HTMLResponse)
async def review_night_page(request: Request, access: StudyPage, pid: ParticipantPath, night_id: NightIdPath,
                            factory: FactoryDep) -> Response:
    """The night drawn for marking, the parameters under the marks, and (analysts) the two reviews compared."""
    context = await run_in_threadpool(_study_context, factory, access)
    info, reviewer = await run_in_threadpool(_night_and_name, factory, access, pid, night_id)
    answer = await call_api(request, "GET", _api_night(access, pid, night_id) + "/review-context")
    if not answer.ok:
        raise api_error(answer)
    review = answer.body
    here = _page_night(access, pid, night_id)
    neighbours = {side: (None if ref is None else
                         _page_night(access, ref["participant_id"], ref["night_id"]) + "/review")
                  for side, ref in (review.get("queue_neighbours") or {}).items()
                  if side in ("previous", "next")}
    return page(request, "review_night.html", principal=access.principal, pid=pid, info=info,
                night_name=info.label or info.night_id, review=review, reviewer=reviewer, here=here,
                neighbours=neighbours, parameters=REVIEW_PARAMETERS, form_token_header=FORM_TOKEN_HEADER,
                name_max=REVIEWER_NAME_MAX,
                queue_url=f"{UI_PREFIX}/studies/{access.study_id}/review", **context)


@router.get(_NIGHT + "/review/reviews.json")
async def night_reviews(request: Request, access: StudyPage, pid: ParticipantPath,
                        night_id: NightIdPath) -> JSONResponse:
    """The night's reviews as the API shows them to this viewer (blind until both are in)."""
    answer = await call_api(request, "GET", _api_night(access, pid, night_id) + "/reviews")
    return answer.json_response()


async def _post(request: Request, path: str) -> JSONResponse:
    check_form(request, request.headers.get(FORM_TOKEN_HEADER))
    if request.headers.get("content-type", "").split(";")[0].strip().lower() != "application/json":
        raise UnsupportedMediaType("send the review as application/json")
    answer = await call_api(request, "POST", path, body=await request.body())
    return answer.json_response()


@router.post(_NIGHT + "/review/preview.json")
async def preview_review(request: Request, access: StudyPage, pid: ParticipantPath,
                         night_id: NightIdPath) -> JSONResponse:
    """The sleep parameters the marks would give (nothing is stored)."""
    return await _post(request, _api_night(access, pid, night_id) + "/reviews/preview")


@router.post(_NIGHT + "/review/reviews.json")
async def submit_review(request: Request, access: StudyPage, pid: ParticipantPath,
                        night_id: NightIdPath) -> JSONResponse:
    """Store the viewer's review of the night."""
    return await _post(request, _api_night(access, pid, night_id) + "/reviews")


@router.post(_NIGHT + "/review/adjudication.json")
async def adjudicate_review(request: Request, access: StudyPage, pid: ParticipantPath,
                            night_id: NightIdPath) -> JSONResponse:
    """Store the final correction: one review accepted, or the analyst's own marks (analyst)."""
    return await _post(request, _api_night(access, pid, night_id) + "/reviews/adjudication")
