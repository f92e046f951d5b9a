"""HTML pages: sign-in, studies, a study, a participant and a night."""

from __future__ import annotations

from typing import Annotated, Any
from urllib.parse import urlencode

from fastapi import APIRouter, Depends, Form, Path, Query, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from sqlalchemy.orm import Session, sessionmaker

from ..api.deps import FactoryDep
from ..errors import NotFound, Unauthorized
from ..jobs import queue as jobs
from ..jobs.queue import JobInfo
from ..store import recordings, registry
from ..store.db import session_scope
from ..store.registry import StudyInfo
from ..store.tokens import Principal
from .access import (
    CSRF_FIELD,
    UI_PREFIX,
    PageAccess,
    StudyPage,
    check_form,
    clear_cookie,
    page_principal,
    safe_next,
    set_cookie,
    sign_in,
)
from .captions import bland_altman_alt, bland_altman_caption, held_out_alt, roc_alt
from .curves import held_out_roc
from .night_view import AGREEMENT_METRICS, AUTO, NIGHT_METHODS, load_night_view
from .participant_view import (
    COMPARISON_METRICS,
    VERSION_METRICS,
    held_out_table,
    load_participant_view,
    method_summary_table,
    parameter_agreement_rows,
    participant_parameter_rows,
)
from .study_view import (
    TABLE_METHODS,
    bland_altman_rows,
    bland_altman_stats,
    load_study_view,
    methods_with_pairs,
    participants_table,
)
from .templating import is_simulated, method_label, page, records

__all__ = ["NightIdPath", "ParticipantPath", "router", "study_info"]

router = APIRouter()
ParticipantPath = Annotated[str, Path(pattern=registry.ID_PATTERN, description="participant id")]
NightIdPath = Annotated[str, Path(pattern=r"^[0-9a-f]{1,64}$", description="night id")]
MethodQuery = Annotated[str, Query(max_length=40, description="method shown")]
JobQuery = Annotated[str | None, Query(pattern=r"^[0-9a-f]{32}$", description="job to follow")]


def study_info(factory: sessionmaker[Session], study_id: str) -> StudyInfo:
    """The study's id, name and creation time.

    Raises
    ------
    NotFound
        If there is no such study.
    """
    with session_scope(factory) as session:
        found = registry.list_studies(session, study_id=study_id)
    if not found:
        raise NotFound(f"no study {study_id!r}")
    return found[0]


def _study_context(factory: sessionmaker[Session], access: PageAccess) -> dict[str, Any]:
    study = study_info(factory, access.study_id)
    return {"study": study, "simulated": is_simulated(study.study_id, study.name), "analyse": access.can_analyse}


def _followed(factory: sessionmaker[Session], job_id: str | None, view_job: JobInfo | None, *, study_id: str,
              participant_id: str | None) -> str | None:
    """The job whose progress the page follows: the requested one if it belongs to this page's target,
    else the target's newest job while it is still queued or running."""
    if job_id is not None:
        with session_scope(factory) as session:
            try:
                job = jobs.get_job(session, job_id)
            except NotFound:
                return None
        return job_id if (job.study_id, job.participant_id) == (study_id, participant_id) else None
    return view_job.job_id if view_job is not None and not view_job.state.is_finished() else None


def _default_trials(request: Request) -> int:
    return int(request.app.state.settings.n_trials)


@router.get("/", include_in_schema=False)
def home() -> RedirectResponse:
    """The studies list."""
    return RedirectResponse(f"{UI_PREFIX}/studies", status_code=303)


@router.get("/signin", response_class=HTMLResponse)
def signin_form(request: Request, next: Annotated[str | None, Query(max_length=500)] = None) -> Response:  # noqa: A002
    """The sign-in form."""
    return page(request, "signin.html", principal=None, next_url=safe_next(next, f"{UI_PREFIX}/studies"))


@router.post("/signin", response_class=HTMLResponse)
def signin(request: Request, token: Annotated[str, Form(max_length=200)],
           next: Annotated[str, Form(max_length=500)] = "") -> Response:  # noqa: A002
    """Check the token and keep it in the session cookie."""
    check_form(request, None, signin=True)
    try:
        principal = sign_in(request, token)
    except Unauthorized:
        return page(request, "signin.html", principal=None, status_code=401, next_url=safe_next(next, ""),
                    error="That token is not valid (unknown, mistyped or revoked).")
    default = f"{UI_PREFIX}/studies/{principal.study_id}" if principal.study_id else f"{UI_PREFIX}/studies"
    response = RedirectResponse(safe_next(next, default), status_code=303)
    set_cookie(response, request, token)
    return response


@router.post("/signout")
def signout(request: Request,
            csrf: Annotated[str | None, Form(alias=CSRF_FIELD, max_length=200)] = None) -> RedirectResponse:
    """Forget the session cookie."""
    check_form(request, csrf)
    response = RedirectResponse(f"{UI_PREFIX}/signin", status_code=303)
    clear_cookie(response, request)
    return response


@router.get("/studies", response_class=HTMLResponse)
def studies(request: Request, factory: FactoryDep,
            principal: Annotated[Principal, Depends(page_principal)]) -> Response:
    """Studies the signed-in token can see."""
    with session_scope(factory) as session:
        found = registry.list_studies(session, study_id=principal.study_id)
    return page(request, "studies.html", principal=principal, studies=found,
                simulated=any(is_simulated(s.study_id, s.name) for s in found))


@router.get("/studies/{study}", response_class=HTMLResponse)
def study_page(request: Request, access: StudyPage, factory: FactoryDep, job: JobQuery = None) -> Response:
    """One row per participant, held-out figures per method and Bland-Altman plots."""
    context = _study_context(factory, access)
    view = load_study_view(factory, study_id=access.study_id, analyse=access.can_analyse)
    base = f"{UI_PREFIX}/studies/{access.study_id}"
    comparison: dict[str, Any] = {}
    if view.comparison is not None:
        comparison = {"summary_rows": records(method_summary_table(view.comparison)),
                      "bland_altman_rows": bland_altman_rows(view.comparison),
                      "repeated_rows": parameter_agreement_rows(view.comparison),
                      "bland_altman": [{"method": m, "alt": bland_altman_alt(m, bland_altman_stats(view.comparison, m)),
                                        "caption": bland_altman_caption(m, bland_altman_stats(view.comparison, m))}
                                       for m in methods_with_pairs(view.comparison)]}
    follow = _followed(factory, job, view.job, study_id=access.study_id, participant_id=None)
    return page(request, "study.html", principal=access.principal, view=view, follow_job=follow,
                default_trials=_default_trials(request), participant_rows=records(participants_table(view)),
                table_methods=TABLE_METHODS, comparison_metrics=COMPARISON_METRICS, base=base,
                **comparison, **context)


@router.get("/studies/{study}/participants/{pid}", response_class=HTMLResponse)
def participant_page(request: Request, access: StudyPage, pid: ParticipantPath, factory: FactoryDep,
                     job: JobQuery = None) -> Response:
    """Nights, model versions, the method choice, held-out comparisons and training."""
    context = _study_context(factory, access)
    view = load_participant_view(factory, study_id=access.study_id, participant_id=pid,
                                 analyse=access.can_analyse)
    comparison: dict[str, Any] = {}
    if view.comparison is not None:
        summary = method_summary_table(view.comparison)
        held = held_out_table(view.comparison, view.nights)
        curves = held_out_roc(factory, study_id=access.study_id, participant_id=pid)
        comparison = {"summary_rows": records(summary), "held_rows": records(held),
                      "parameter_rows": participant_parameter_rows(view.comparison),
                      "held_alt": held_out_alt(summary, held["night_id"].nunique()), "roc_curves": curves,
                      "roc_alt": roc_alt(curves),
                      "roc_caption": "; ".join(f"{method_label(c.method)} AUC {c.auc:.3f}" for c in curves)}
    follow = _followed(factory, job, view.job, study_id=access.study_id, participant_id=pid)
    with session_scope(factory) as session:
        found = recordings.list_recordings(session, study_id=access.study_id, participant_id=pid, limit=500)[0]
    return page(request, "participant.html", principal=access.principal, view=view, pid=pid, follow_job=follow,
                recordings=found,
                default_trials=_default_trials(request), version_metrics=VERSION_METRICS,
                comparison_metrics=COMPARISON_METRICS,
                base=f"{UI_PREFIX}/studies/{access.study_id}/participants/{pid}", **comparison, **context)


@router.get("/studies/{study}/participants/{pid}/nights/{night_id}", response_class=HTMLResponse)
def night_page(request: Request, access: StudyPage, pid: ParticipantPath, night_id: NightIdPath,
               factory: FactoryDep, method: MethodQuery = AUTO) -> Response:
    """Counts, hypnogram, one method's output with disagreements, and the parameter table."""
    context = _study_context(factory, access)
    view = load_night_view(factory, study_id=access.study_id, participant_id=pid, night_id=night_id, method=method,
                           analyse=access.can_analyse)
    table = view.parameter_table()
    agreement = view.agreement_table()
    with session_scope(factory) as session:
        recording_id = recordings.recording_of_night(session, study_id=access.study_id, participant_id=pid,
                                                     night_id=night_id)
    return page(request, "night.html", principal=access.principal, pid=pid, info=view.info, recording_id=recording_id,
                night_name=view.info.label or view.info.night_id, requested=view.requested, shown=view.shown,
                shown_body=view.shown_body, outcomes=view.outcomes, methods=NIGHT_METHODS, notice=view.notice,
                summary=view.summary(), alt=view.alt_text(), caption=view.caption(),
                figure_query="?" + urlencode({"method": view.requested}), agreement_keys=AGREEMENT_METRICS,
                agreement_rows=list(agreement.iterrows()), any_in_sample=bool(agreement["trained_on_night"].any()),
                table_columns=list(table.columns), table_rows=list(table.iterrows()),
                intervals=view.interval_cells(), interval_rows=view.interval_rows(),
                base=f"{UI_PREFIX}/studies/{access.study_id}/participants/{pid}/nights/{night_id}", **context)
