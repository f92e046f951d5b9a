"""Night ingest (JSON, CSV, Parquet), listings, metadata and arrays, corrections and deletion.

Roles: ingest for posting, reading and correcting nights (``PATCH``: label, exclusion from
training); admin for deleting one.
"""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Annotated, Any

from fastapi import APIRouter, Body, Depends, Path, Query, Request, Response
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import JSONResponse
from sqlalchemy.exc import IntegrityError

from models import (
    ImportProfile,
    InvalidNightError,
    Night,
    NightOptions,
    check_reference,
    night_from_csv,
    night_from_json,
    night_from_parquet,
)

from ...errors import Conflict, Unprocessable, UnsupportedMediaType
from ...results.reviews import labels_list
from ...results.scoring import SCORING_METHODS
from ...results.scoring_cache import serve_scoring
from ...store import manage, profiles, registry
from ...store.db import session_scope
from ...store.reviews import night_correction
from ...store.tokens import Role
from ..deps import FactoryDep, ReadSession, SettingsDep, StudyAccess, read_body, study_access
from ..problems import problem_responses
from ..schemas import NightAccepted, NightDeleted, NightDetailOut, NightIn, NightOut, NightPatch, Page, ScoringOut
from .studies import Limit, Offset, ParticipantPath

__all__ = ["NIGHT_MEDIA_TYPES", "parse_night", "router"]

router = APIRouter(prefix="/v1/studies/{study}/participants/{pid}/nights", tags=["nights"])
NightIdPath = Annotated[str, Path(pattern=r"^[0-9a-f]{1,64}$", description="night id")]

#: content type -> reader format
NIGHT_MEDIA_TYPES: dict[str, str] = {
    "application/json": "json",
    "text/csv": "csv",
    "application/vnd.apache.parquet": "parquet",
    "application/x-parquet": "parquet",
}
_INGEST_BODY = {
    "required": True,
    "content": {
        "application/json": {"schema": NightIn.model_json_schema()},
        "text/csv": {"schema": {"type": "string"},
                     "example": "time,counts,reference\n2031-03-02T22:41:00+01:00,0,W\n"},
        "application/vnd.apache.parquet": {"schema": {"type": "string", "format": "binary"}},
    },
}


def parse_night(body: bytes, *, media_type: str, participant_id: str, tz: str | None = None,
                fill_gaps: bool = False, profile: ImportProfile | None = None,
                source_name: str | None = None) -> tuple[Night, str]:
    """Read a night from a request body of ``media_type``; returns the night and its format.

    ``profile`` is the study's saved import profile named at ingest; ``source_name`` the file the
    body came from (the night's label when it has none of its own).

    Raises
    ------
    UnsupportedMediaType
        If the media type is not JSON, CSV or Parquet.
    InvalidNightError
        Listing every problem of the night.
    """
    fmt = NIGHT_MEDIA_TYPES.get(media_type)
    if fmt is None:
        raise UnsupportedMediaType(f"send the night as one of {', '.join(NIGHT_MEDIA_TYPES)}; got "
                                   f"{media_type or 'no content type'!r}")
    options = NightOptions(tz=tz, fill_gaps=fill_gaps)
    if fmt == "json":
        night = night_from_json(body, participant_id=participant_id, options=options, profile=profile)
    else:
        reader = night_from_csv if fmt == "csv" else night_from_parquet
        night = reader(body, participant_id=participant_id, options=options, source=source_name,  # type: ignore[operator]
                       profile=profile)
    if source_name and night.label is None:
        night = replace(night, label=source_name, source_name=source_name)
    return night, fmt


def checked_reference(night: Night, *, accept: bool) -> list[dict[str, Any]]:
    """QC flags of the reference's plausibility check (:func:`models.check_reference`), as stored.

    Raises
    ------
    Unprocessable
        Code ``reference_implausible`` naming the figures, unless ``accept``.
    """
    try:
        flag = check_reference(night, accept=accept)
    except InvalidNightError as exc:
        raise Unprocessable(exc.problems[0].message + "; post it with accept_implausible=true to store it with a "
                            "quality flag", code="reference_implausible", problems=exc.problems) from None
    return [] if flag is None else [flag.to_dict()]


_INGEST_DOC = """Store a night (JSON, CSV or Parquet); the participant is created with its first night.

The night is stored at the study's epoch length: a night of a shorter length that divides it is
aggregated (counts summed, reference by majority; `source_epoch_seconds` keeps the posted
length); any other length is refused (422 `epoch_length_mismatch`). Posting the same content
again to the same participant answers 200 with the stored night's id; the stored label stays
(`stored_label`), and `label_ignored` is true when the post carried another label (change a
label with `PATCH`). Refused with 409:

- `duplicate_night`: another participant of the study has the same content (the message names
  them); `allow_duplicate=true` stores it anyway;
- `overlapping_night`: the night overlaps in time, [start, end), a stored night of the
  participant (the message names its id and label); `allow_overlap=true` stores it anyway;
- `participant_id_case_clash`: a new participant id differs from a stored one only by case
  (`p01` when `P01` exists; the message names the stored id). Ids are compared exactly
  everywhere else, so use the stored spelling.
"""


@router.post("", status_code=201, response_model=NightAccepted, openapi_extra={"requestBody": _INGEST_BODY},
             description=_INGEST_DOC,
             responses={200: {"model": NightAccepted, "description": "Same content stored before: its night id"},
                        **problem_responses(409, 413, 415)})
async def post_night(request: Request, access: Annotated[StudyAccess, Depends(study_access(Role.ingest))],
                     pid: ParticipantPath, factory: FactoryDep, settings: SettingsDep,
                     tz: Annotated[str | None, Query(max_length=64, description="IANA zone for naive times")] = None,
                     fill_gaps: Annotated[bool, Query(description="accept whole-epoch gaps as missing")] = False,
                     allow_duplicate: Annotated[bool, Query(
                         description="store even if another participant has the same content")] = False,
                     allow_overlap: Annotated[bool, Query(
                         description="store even if it overlaps a stored night of the participant")] = False,
                     profile: Annotated[str | None, Query(
                         max_length=64, description="a saved import profile of the study")] = None,
                     accept_implausible: Annotated[bool, Query(
                         description="store a reference that fails the plausibility checks, with a QC flag")] = False,
                     source_name: Annotated[str | None, Query(
                         max_length=200, description="the file the night came from (its label when it has none)")]
                     = None,
                     ) -> Any:
    body = await read_body(request, int(settings.max_body_mb * 2**20))
    media_type = request.headers.get("content-type", "").split(";")[0].strip().lower()

    unused: list[str] = []
    posted_label: list[str | None] = [None]

    def work() -> tuple[registry.NightInfo, bool]:
        with session_scope(factory) as session:
            epoch_seconds = registry.find_study(session, access.study_id).epoch_seconds
            layout = None if profile is None else profiles.get_profile(session, access.study_id, profile)
        night, fmt = parse_night(body, media_type=media_type, participant_id=pid, tz=tz, fill_gaps=fill_gaps,
                                 profile=layout, source_name=source_name)
        night, source = registry.conform_epochs(night, epoch_seconds=epoch_seconds, study_id=access.study_id)
        flags = checked_reference(night, accept=accept_implausible)
        values = registry.night_values(night, source_format=fmt, source_epoch_seconds=source)
        values["qc"] = [*values["qc"], *flags]
        unused[:] = night.unused_columns
        posted_label[0] = night.label
        for _ in range(3):  # a concurrent first night of the same participant may win the insert
            try:
                with session_scope(factory, write=True) as session:
                    return registry.ingest_night(session, study_id=access.study_id, night=night, source_format=fmt,
                                                 actor=access.actor, values=values, allow_duplicate=allow_duplicate,
                                                 allow_overlap=allow_overlap)
            except IntegrityError:
                continue
        raise Conflict("the night could not be stored: concurrent changes to the participant won three times; "
                       "post it again", code="concurrent_change")

    info, created = await run_in_threadpool(work)
    out = NightAccepted(night_id=info.night_id, created=created, qc=info.qc,  # type: ignore[arg-type]
                        epoch_seconds=info.epoch_seconds, source_epoch_seconds=info.source_epoch_seconds,
                        unused_columns=unused, stored_label=info.label,
                        label_ignored=not created and posted_label[0] is not None and posted_label[0] != info.label)
    return JSONResponse(out.model_dump(mode="json"), status_code=201 if created else 200)


@router.get("", response_model=Page[NightOut])
def list_nights(access: Annotated[StudyAccess, Depends(study_access(Role.ingest))], pid: ParticipantPath,
                session: ReadSession, limit: Limit = 100, offset: Offset = 0) -> Any:
    """A participant's nights in start order (metadata only)."""
    items, total = registry.list_nights(session, study_id=access.study_id, participant_id=pid, limit=limit,
                                       offset=offset)
    return Page[NightOut](data=[NightOut(**vars(n)) for n in items], count=total, limit=limit, offset=offset)


def _json_counts(counts: Any) -> list[float | None]:
    return [None if math.isnan(c) else float(c) for c in counts.tolist()]


@router.get("/{night_id}", response_model=NightDetailOut, response_model_exclude_unset=True)
def get_night(access: Annotated[StudyAccess, Depends(study_access(Role.ingest))], pid: ParticipantPath,
              night_id: NightIdPath, session: ReadSession,
              epochs: Annotated[bool, Query(description="also the arrays: counts and reference per epoch")] = False,
              ) -> Any:
    """One night's metadata, QC flags and whether it is labelled; with `epochs=true` also its arrays.

    The arrays are the stored night's, at the study's epoch length (`epoch_seconds`): `counts`
    (null where an epoch is missing), `reference` (stage codes, null for an unlabelled night) and
    `corrected` (an adjudicated review's labels: 1 sleep, 0 wake, null not judged; null without
    one). `correction` says who adjudicated it, from which reviewers and when.
    """
    row = registry.night_row(session, access.study_id, pid, night_id)
    correction = night_correction(session, row.pk)
    provenance = None if correction is None else correction.provenance()
    if not epochs:
        return NightDetailOut(**vars(registry.get_night(session, study_id=access.study_id, participant_id=pid,
                                                        night_id=night_id)), **_correction(provenance))
    info, night = registry.load_night(session, study_id=access.study_id, participant_id=pid, night_id=night_id)
    return NightDetailOut(**vars(info), counts=_json_counts(night.counts),
                          reference=None if night.reference is None else night.reference.tolist(),
                          corrected=None if correction is None else labels_list(correction.labels),
                          **_correction(provenance))


def _correction(provenance: Any) -> dict[str, Any]:
    """``correction`` only for a corrected night, so an uncorrected night reads as the PATCH answer does."""
    return {} if provenance is None else {"correction": provenance}


@router.patch("/{night_id}", response_model=NightOut)
def patch_night(access: Annotated[StudyAccess, Depends(study_access(Role.ingest))], pid: ParticipantPath,
                night_id: NightIdPath, factory: FactoryDep, body: Annotated[NightPatch, Body()]) -> Any:
    """Correct a night's label and/or exclude it from training (ingest role; audited).

    `label` (null clears it) and `excluded` are each optional; a field left out is kept. An
    excluded night stays stored, listed and scorable but is left out of personal and pooled
    training (retrain to drop it from the models).
    """
    with session_scope(factory, write=True) as session:
        info = manage.update_night(session, study_id=access.study_id, participant_id=pid, night_id=night_id,
                                   actor=access.actor, set_label="label" in body.model_fields_set, label=body.label,
                                   excluded=body.excluded)
    return NightOut(**vars(info))


@router.delete("/{night_id}", response_model=NightDeleted)
def delete_night(access: Annotated[StudyAccess, Depends(study_access(Role.admin))], pid: ParticipantPath,
                 night_id: NightIdPath, factory: FactoryDep) -> Any:
    """Delete one night with its cached scorings and stored features (admin; audited).

    Model versions trained on it are kept, readable and usable, and list the night's id in
    `trained_on_deleted_nights`.
    """
    with session_scope(factory, write=True) as session:
        return manage.delete_night(session, study_id=access.study_id, participant_id=pid, night_id=night_id,
                                   actor=access.actor)


@router.get("/{night_id}/scoring", response_model=ScoringOut,
            responses={200: {"content": {"application/json": {"schema": {"$ref": "#/components/schemas/ScoringOut"}}}}})
async def get_scoring(request: Request, access: Annotated[StudyAccess, Depends(study_access(Role.analyst))],
                      pid: ParticipantPath,
                      night_id: NightIdPath, factory: FactoryDep,
                      method: Annotated[str, Query(description="auto, personal, pooled, pooled+offset or a rule id",
                                                   json_schema_extra={"enum": list(SCORING_METHODS)})] = "auto",
                      version: Annotated[int | None, Query(ge=1, le=10**9, description="model version")] = None,
                      ) -> Response:
    """Sleep/wake per epoch, sleep parameters and (for labelled nights) agreement with the reference."""
    cache = request.app.state.scoring_cache
    body = cache.kept(study_id=access.study_id, participant_id=pid, night_id=night_id, method=method,
                      version=version) if cache.inline else None
    if body is None:
        body = await run_in_threadpool(serve_scoring, cache, factory, study_id=access.study_id, participant_id=pid,
                                       night_id=night_id, method=method, version=version,
                                       writer=request.app.state.cache_writer)
    return Response(content=body, media_type="application/json")
