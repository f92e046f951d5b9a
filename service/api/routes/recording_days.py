"""Day tables of continuous recordings (analyst): one recording's days with a summary, and the study's export."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from fastapi import APIRouter, Depends, Query, Response
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import StreamingResponse

from ...results import days
from ...results.scoring import SCORING_METHODS
from ...store.tokens import Role
from ..deps import FactoryDep, StudyAccess, study_access
from ..recording_schemas import DaysOut
from .recordings import RecordingIdPath
from .studies import ParticipantPath

__all__ = ["router"]

router = APIRouter(prefix="/v1/studies/{study}", tags=["recordings"])
AnalystAccess = Annotated[StudyAccess, Depends(study_access(Role.analyst))]
MethodQuery = Annotated[str, Query(max_length=40, json_schema_extra={"enum": list(SCORING_METHODS)},
                                   description="auto, personal, pooled, pooled+offset or a rule id")]


@router.get("/participants/{pid}/recordings/{recording_id}/days", response_model=DaysOut)
async def recording_days(access: AnalystAccess, pid: ParticipantPath, recording_id: RecordingIdPath,
                         factory: FactoryDep, method: MethodQuery = "auto") -> Any:
    """One row per day (noon to noon) of the recording, a summary and the definitions behind the figures.

    Each day's night is scored with `method` like any stored night (`auto`: the participant's
    chosen method; while the study has no trained model, the Cole-Kripke rule, said in
    `definitions.scoring` and each row's `method`).
    """
    return await run_in_threadpool(days.recording_days, factory, study_id=access.study_id, participant_id=pid,
                                   recording_id=recording_id, method=method)


@router.get("/exports/days", response_class=Response,
            responses={200: {"content": {"text/csv": {"schema": {"type": "string"}},
                                         "application/vnd.apache.parquet": {"schema": {"type": "string",
                                                                                       "format": "binary"}}}}})
async def export_days(access: AnalystAccess, factory: FactoryDep,
                      format: Annotated[Literal["csv", "parquet"], Query()] = "csv",  # noqa: A002
                      method: MethodQuery = "auto",
                      participant: Annotated[str | None, Query(max_length=64, description="only this participant")]
                      = None) -> Response:
    """Day rows of every recording of the study, with participant and recording ids (CSV or Parquet).

    Streamed: CSV rows are sent a few recordings at a time as they are computed
    (`X-Export-Recordings` says how many recordings will come); Parquet comes a row group at a time (one file).
    """
    n_recordings, chunks = await run_in_threadpool(days.export_days_stream, factory, study_id=access.study_id,
                                                   fmt=format, method=method, participant_id=participant)
    media = "text/csv" if format == "csv" else "application/vnd.apache.parquet"
    filename = f"{access.study_id}-days.{format}"
    return StreamingResponse(chunks, media_type=media,
                             headers={"Content-Disposition": f'attachment; filename="{filename}"',
                                      "X-Export-Recordings": str(n_recordings)})
