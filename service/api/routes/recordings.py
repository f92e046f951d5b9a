"""Continuous recordings: upload, listing, deletion, diary, non-wear, sleep periods, PSG references and days.

Roles: ingest for posting and reading recordings, diaries and references; analyst for the day
table; admin for deleting a recording (its nights go with it).
"""

from __future__ import annotations

from collections.abc import Set as AbstractSet
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Path, Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import JSONResponse

from ...errors import UnsupportedMediaType
from ...results import recordings as work
from ...store import recordings as store
from ...store.db import session_scope
from ...store.tokens import Role
from ..deps import FactoryDep, ReadSession, SettingsDep, StudyAccess, read_body, study_access
from ..problems import problem_responses
from ..recording_schemas import (
    DiaryAccepted,
    NonwearOut,
    PeriodsOut,
    RecordingAccepted,
    RecordingDeleted,
    RecordingOut,
    ReferenceAccepted,
)
from ..schemas import Page
from .nights import NIGHT_MEDIA_TYPES
from .studies import Limit, Offset, ParticipantPath

__all__ = ["RecordingIdPath", "recording_out", "router"]

router = APIRouter(prefix="/v1/studies/{study}/participants/{pid}/recordings", tags=["recordings"])
RecordingIdPath = Annotated[str, Path(pattern=r"^[0-9a-f]{1,64}$", description="recording id")]
IngestAccess = Annotated[StudyAccess, Depends(study_access(Role.ingest))]
Tz = Annotated[str | None, Query(max_length=64, description="IANA zone of times without a UTC offset")]
ProfileName = Annotated[str | None, Query(max_length=64, description="a saved import profile of the study")]

_BODY = {"required": True, "content": {
    "text/csv": {"schema": {"type": "string"}},
    "application/json": {"schema": {"type": "object"}},
    "application/vnd.apache.parquet": {"schema": {"type": "string", "format": "binary"}}}}
_TEXT_BODY = {"required": True, "content": {"text/csv": {"schema": {"type": "string"}},
                                            "application/json": {"schema": {"type": "object"}}}}


async def _body(request: Request, settings: Any, *, text_only: bool = False) -> tuple[bytes, str]:
    body = await read_body(request, int(settings.max_body_mb * 2**20))
    media_type = request.headers.get("content-type", "").split(";")[0].strip().lower()
    fmt = NIGHT_MEDIA_TYPES.get(media_type)
    if fmt is None or (text_only and fmt == "parquet"):
        allowed = ["text/csv", "application/json"] if text_only else list(NIGHT_MEDIA_TYPES)
        raise UnsupportedMediaType(f"send it as one of {', '.join(allowed)}; got {media_type or 'no content type'!r}")
    return body, fmt


def recording_out(info: store.RecordingInfo, labelled: AbstractSet[str] = frozenset()) -> RecordingOut:
    mains = [p for p in info.periods if p["kind"] == "main"]
    night_ids = [p["night_id"] for p in mains if p.get("night_id")]
    return RecordingOut(
        recording_id=info.recording_id, participant_id=info.participant_id, start=info.start, end=info.end,
        epoch_seconds=info.epoch_seconds, source_epoch_seconds=info.source_epoch_seconds, n_epochs=info.n_epochs,
        days=info.n_epochs * info.epoch_seconds / 86400.0, source_format=info.source_format,
        source_name=info.source_name, tz=info.tz, has_diary=info.diary is not None,
        nonwear_min=sum(i["end_epoch"] - i["start_epoch"] for i in info.nonwear) * info.epoch_seconds / 60.0,
        n_main_periods=len(mains), n_naps=len(info.periods) - len(mains), night_ids=night_ids,
        labelled_night_ids=[n for n in night_ids if n in labelled], created_at=info.created_at)


_POST_DOC = """Store a continuous recording (CSV, JSON or Parquet, days to weeks of epochs) in one upload.

The participant is created with it. It is stored at the study's epoch length (shorter epochs
that divide it are summed; others refused, 422 `epoch_length_mismatch`); its non-wear intervals
and sleep periods are found, and each main sleep period becomes a night of the participant that
reads its epochs from the recording (non-wear epochs unscored). Posting the same content again
answers 200 with the stored id. 409 `overlapping_recording` when it overlaps a stored recording
of the participant (`allow_overlap=true` stores it anyway), `duplicate_recording` when another
participant of the study has the same recording (`allow_duplicate=true` stores it anyway).
"""


@router.post("", status_code=201, response_model=RecordingAccepted, openapi_extra={"requestBody": _BODY},
             description=_POST_DOC,
             responses={200: {"model": RecordingAccepted, "description": "Same content stored before"},
                        **problem_responses(409, 413, 415)})
async def post_recording(request: Request, access: IngestAccess, pid: ParticipantPath, factory: FactoryDep,
                         settings: SettingsDep, tz: Tz = None,
                         fill_gaps: Annotated[bool, Query(description="accept whole-epoch gaps as missing")] = False,
                         profile: ProfileName = None,
                         source_name: Annotated[str | None, Query(max_length=200,
                                                                  description="the file it came from")] = None,
                         allow_overlap: Annotated[bool, Query(
                             description="store even if it overlaps a stored recording of the participant")] = False,
                         allow_duplicate: Annotated[bool, Query(
                             description="store even if another participant has the same recording")] = False,
                         ) -> Any:
    body, fmt = await _body(request, settings)
    info, created, recording = await run_in_threadpool(
        work.post_recording, factory, study_id=access.study_id, participant_id=pid, body=body, fmt=fmt,
        actor=access.actor, tz=tz, fill_gaps=fill_gaps, profile=profile, source_name=source_name,
        allow_overlap=allow_overlap, allow_duplicate=allow_duplicate)
    out = RecordingAccepted(recording_id=info.recording_id, created=created, start=info.start, end=info.end,
                            epoch_seconds=info.epoch_seconds, source_epoch_seconds=info.source_epoch_seconds,
                            n_epochs=info.n_epochs, unused_columns=list(recording.unused_columns),
                            periods=work.period_items(info))  # type: ignore[arg-type]
    return JSONResponse(out.model_dump(mode="json"), status_code=201 if created else 200)


@router.get("", response_model=Page[RecordingOut])
def list_recordings(access: IngestAccess, pid: ParticipantPath, session: ReadSession, limit: Limit = 100,
                    offset: Offset = 0) -> Any:
    """A participant's recordings in start order (metadata only)."""
    items, total = store.list_recordings(session, study_id=access.study_id, participant_id=pid, limit=limit,
                                         offset=offset)
    return Page[RecordingOut](data=[recording_out(i, store.labelled_nights(session, i)) for i in items],
                              count=total, limit=limit, offset=offset)


@router.get("/{recording_id}", response_model=RecordingOut)
def get_recording(access: IngestAccess, pid: ParticipantPath, recording_id: RecordingIdPath,
                  session: ReadSession) -> Any:
    """One recording's metadata: span, epochs, diary, non-wear total and the nights of its main periods."""
    row, _, _ = store.recording_row(session, study_id=access.study_id, participant_id=pid, recording_id=recording_id)
    info = store.recording_snapshot(row, pid)
    return recording_out(info, store.labelled_nights(session, info))


@router.delete("/{recording_id}", response_model=RecordingDeleted)
def delete_recording(access: Annotated[StudyAccess, Depends(study_access(Role.admin))], pid: ParticipantPath,
                     recording_id: RecordingIdPath, factory: FactoryDep) -> Any:
    """Delete a recording with its nights, their scorings and features (admin; audited).

    Model versions trained on its nights stay readable and list them in `trained_on_deleted_nights`.
    """
    with session_scope(factory, write=True) as session:
        return store.delete_recording(session, study_id=access.study_id, participant_id=pid,
                                      recording_id=recording_id, actor=access.actor)


@router.post("/{recording_id}/diary", response_model=DiaryAccepted, openapi_extra={"requestBody": _TEXT_BODY},
             responses=problem_responses(413, 415))
async def post_diary(request: Request, access: IngestAccess, pid: ParticipantPath, recording_id: RecordingIdPath,
                     factory: FactoryDep, settings: SettingsDep, tz: Tz = None) -> Any:
    """Store the recording's sleep diary (CSV `date,bed_time,rise_time[,nap1_start,nap1_end,...]` or JSON).

    Posting a diary again replaces it. The sleep periods and the nights of the main periods are
    recomputed with it; a night whose period did not change keeps its id, labels and scorings.
    Times without a UTC offset are on the recording's clock (`tz`, default the recording's zone).
    """
    body, fmt = await _body(request, settings, text_only=True)
    info, changed, n_days = await run_in_threadpool(
        work.post_diary, factory, study_id=access.study_id, participant_id=pid, recording_id=recording_id,
        body=body, fmt=fmt, actor=access.actor, tz=tz)
    return DiaryAccepted(recording_id=recording_id, diary_days=n_days, nights_removed=changed["nights_removed"],
                         nights_added=changed["nights_added"], periods=work.period_items(info))  # type: ignore[arg-type]


@router.get("/{recording_id}/nonwear", response_model=NonwearOut)
def get_nonwear(access: IngestAccess, pid: ParticipantPath, recording_id: RecordingIdPath,
                session: ReadSession) -> Any:
    """Intervals the device was off the wrist, with the reason each was found."""
    row, _, _ = store.recording_row(session, study_id=access.study_id, participant_id=pid, recording_id=recording_id)
    return {"items": work.nonwear_items(store.recording_snapshot(row, pid))}


@router.get("/{recording_id}/periods", response_model=PeriodsOut)
def get_periods(access: IngestAccess, pid: ParticipantPath, recording_id: RecordingIdPath,
                session: ReadSession) -> Any:
    """Main sleep periods (each a night, `night_id`) and naps, with what set them and any conflicts."""
    row, _, _ = store.recording_row(session, study_id=access.study_id, participant_id=pid, recording_id=recording_id)
    return {"items": work.period_items(store.recording_snapshot(row, pid))}


_REFERENCE_DOC = """Label the main sleep period a PSG hypnogram covers (CSV `time,stage` or JSON).

The hypnogram is on the PSG system's clock. Its offset to the recording's clock is estimated
within ±10 min from movement against PSG wake and applied; 422 `alignment_weak` (movement and
wake agree too little) or `alignment_at_edge` (the best offset is at the edge of the search)
unless `clock_offset_s` is given, which is then applied as it is. The labelled night then counts
for training like any posted labelled night; the reference's plausibility checks of night ingest
apply (422 `reference_implausible`, or a QC flag with `accept_implausible=true`). A new reference
for the same night replaces the earlier one, and references are kept when the periods are
recomputed.
"""


@router.post("/{recording_id}/reference", response_model=ReferenceAccepted, description=_REFERENCE_DOC,
             openapi_extra={"requestBody": _TEXT_BODY}, responses=problem_responses(413, 415))
async def post_reference(request: Request, access: IngestAccess, pid: ParticipantPath,
                         recording_id: RecordingIdPath, factory: FactoryDep, settings: SettingsDep, tz: Tz = None,
                         profile: ProfileName = None,
                         clock_offset_s: Annotated[float | None, Query(
                             ge=-86400, le=86400, description="seconds to add to the PSG clock (skips the estimate)")]
                         = None,
                         accept_implausible: Annotated[bool, Query(
                             description="store a reference that fails the plausibility checks, with a QC flag")]
                         = False) -> Any:
    body, fmt = await _body(request, settings, text_only=True)
    result = await run_in_threadpool(
        work.post_reference, factory, study_id=access.study_id, participant_id=pid, recording_id=recording_id,
        body=body, fmt=fmt, actor=access.actor, tz=tz, profile=profile, clock_offset_s=clock_offset_s,
        accept_implausible=accept_implausible)
    return ReferenceAccepted(**vars(result))

