"""Comparisons (per participant and study-wide) and parameter exports."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from fastapi import APIRouter, Depends, Query, Response
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import HTMLResponse, StreamingResponse

from ...results import export_stream, reports
from ...store.tokens import Role
from ...ui.report_page import build_report
from ...ui.report_pdf import build_report_pdf
from ..deps import FactoryDep, StudyAccess, study_access
from .studies import ParticipantPath

__all__ = ["EXPORT_NIGHTS_HEADER", "EXPORT_ROWS_HEADER", "router"]

#: response headers of a streamed export: how many rows (CSV lines after the header) and nights will come
EXPORT_ROWS_HEADER = "X-Export-Rows"
EXPORT_NIGHTS_HEADER = "X-Export-Nights"

router = APIRouter(prefix="/v1/studies/{study}", tags=["reports"])
AnalystAccess = Annotated[StudyAccess, Depends(study_access(Role.analyst))]


@router.get("/participants/{pid}/comparison", response_model=dict[str, Any])
async def participant_comparison(access: AnalystAccess, pid: ParticipantPath, factory: FactoryDep) -> Any:
    """Held-out agreement of the personal, pooled and pooled+offset models and the rules for one participant."""
    return await run_in_threadpool(reports.participant_comparison, factory, study_id=access.study_id,
                                   participant_id=pid)


@router.get("/comparison", response_model=dict[str, Any])
async def study_comparison(access: AnalystAccess, factory: FactoryDep) -> Any:
    """Study-wide held-out agreement per method and Bland-Altman per method and parameter."""
    return await run_in_threadpool(reports.study_comparison, factory, study_id=access.study_id)


@router.get("/exports/parameters", response_class=Response,
            responses={200: {"content": {"text/csv": {"schema": {"type": "string"}},
                                         "application/vnd.apache.parquet": {"schema": {"type": "string",
                                                                                       "format": "binary"}}}}})
async def export_parameters(access: AnalystAccess, factory: FactoryDep,
                            format: Annotated[Literal["csv", "parquet"], Query()] = "csv",  # noqa: A002
                            interval_level: Annotated[float | None, Query(
                                gt=0, lt=1, description="level of the per-night intervals (default: the study "
                                                        "protocol's); held-out intervals are kept only where they "
                                                        "were computed at this level")] = None) -> Response:
    """Sleep parameters, one row per night and method (CSV or Parquet), intervals with their level.

    Streamed: CSV rows are sent as their nights are computed (`X-Export-Rows` and `X-Export-Nights`
    say how many rows and nights there will be); Parquet comes a row group at a time (one file).
    """
    stream = await run_in_threadpool(export_stream.export_stream, factory, study_id=access.study_id, fmt=format,
                                     interval_level=interval_level)
    media = "text/csv" if format == "csv" else "application/vnd.apache.parquet"
    filename = f"{access.study_id}-parameters.{format}"
    return StreamingResponse(stream.chunks, media_type=media,
                             headers={"Content-Disposition": f'attachment; filename="{filename}"',
                                      EXPORT_ROWS_HEADER: str(stream.n_rows),
                                      EXPORT_NIGHTS_HEADER: str(stream.n_nights)})


@router.get("/report", response_class=HTMLResponse,
            responses={200: {"content": {"text/html": {"schema": {"type": "string"}}}}})
async def study_report(access: AnalystAccess, factory: FactoryDep) -> HTMLResponse:
    """The study's validation report: one self-contained HTML page (inline figures, no external assets) with
    the participant/night flow, protocol, agreement tables with CIs, Bland-Altman plots, epoch figures, paired
    comparisons, equivalence results, model cards and software versions."""
    body = await run_in_threadpool(build_report, factory, study_id=access.study_id)
    return HTMLResponse(body, headers={"Content-Disposition": f'inline; filename="{access.study_id}-report.html"'})


@router.get("/report.pdf", response_class=Response,
            responses={200: {"content": {"application/pdf": {"schema": {"type": "string", "format": "binary"}}}}})
async def study_report_pdf(access: AnalystAccess, factory: FactoryDep) -> Response:
    """The validation report's tables and figures as a PDF (drawn on the server, no browser)."""
    body = await run_in_threadpool(build_report_pdf, factory, study_id=access.study_id)
    return Response(body, media_type="application/pdf",
                    headers={"Content-Disposition": f'attachment; filename="{access.study_id}-report.pdf"'})
