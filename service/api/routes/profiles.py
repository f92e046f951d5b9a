"""Import profiles of a study: save (validated), list, read and delete, by name.

Role: ingest (and above) for every operation: the people who post a lab's nights set up how its
exports are read. Saving and deleting are audited.
"""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Body, Depends, Path, Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import JSONResponse
from sqlalchemy.exc import IntegrityError

from models import InvalidNightError, ProfileGuess, guess_profile, night_from_csv

from ...errors import Conflict, Unprocessable
from ...store import profiles
from ...store.db import session_scope
from ...store.registry import ID_PATTERN
from ...store.tokens import Role
from ..deps import FactoryDep, ReadSession, SettingsDep, StudyAccess, read_body, refuse_nul, study_access
from ..problems import problem_responses
from ..schemas import ImportProfileOut, ProfileGuessOut

__all__ = ["router"]

router = APIRouter(prefix="/v1/studies/{study}/import-profiles", tags=["profiles"])
IngestAccess = Annotated[StudyAccess, Depends(study_access(Role.ingest))]
ProfileName = Annotated[str, Path(pattern=ID_PATTERN, description="profile name")]
_EXAMPLE = {"name": "lab-export", "delimiter": ";", "skip_rows": 2, "decimal": ",",
            "columns": {"date": "Date", "time": "Time", "counts": "Activity", "reference": "Stage"},
            "datetime_format": "%d.%m.%Y %H:%M:%S", "tz": "Europe/Berlin", "stage_codes": {"0": "W", "5": "R"}}
ProfileBody = Annotated[dict[str, Any], Body(
    description="the profile's JSON form: `name` and any of delimiter, skip_rows, decimal, columns, "
                "datetime_format, tz, stage_codes, ignore_columns, encoding", examples=[_EXAMPLE])]


def _out(info: profiles.ProfileInfo) -> ImportProfileOut:
    return ImportProfileOut(name=info.name, profile=info.profile.to_dict(), created_at=info.created_at,
                            created_by=info.created_by)


@router.post("", status_code=201, response_model=ImportProfileOut,
             responses={200: {"model": ImportProfileOut, "description": "A profile of the same name was replaced"},
                        **problem_responses(409)})
def save_profile(access: IngestAccess, body: ProfileBody, factory: FactoryDep,
                 replace: Annotated[bool, Query(description="replace a profile of the same name")] = False) -> Any:
    """Save an import profile under its name (validated; every bad field is named in a 422).

    A name already saved in the study is refused (409 `profile_exists`) unless `replace=true`.
    """
    refuse_nul(body, "body")
    for _ in range(2):  # a concurrent save of the same name may win the insert; the retry sees it
        try:
            with session_scope(factory, write=True) as session:
                info, created = profiles.save_profile(session, study_id=access.study_id, body=body,
                                                      actor=access.actor, replace=replace)
            return JSONResponse(_out(info).model_dump(mode="json"), status_code=201 if created else 200)
        except IntegrityError:
            continue
    raise Conflict("the profile could not be saved: a concurrent save of the same name conflicted; try again",
                   code="concurrent_change")


_GUESS_BODY = {"required": True, "content": {"text/csv": {"schema": {"type": "string"},
                                                           "example": "Date;Time;Activity\n02.03.2031;22:41:00;0\n"}}}


@router.post("/guess", response_model=ProfileGuessOut, openapi_extra={"requestBody": _GUESS_BODY},
             responses=problem_responses(413, 422))
async def guess(access: IngestAccess, request: Request, settings: SettingsDep) -> Any:
    """Propose an import profile for a sample export sent as the body (nothing is saved).

    A guess that cannot read its own sample back as a night is refused (422 `profile_not_guessed`,
    with the reader's problems and the guess's notes).

    Answers the proposed `profile`, the first rows read with it (`preview`), `notes` on what was
    guessed and what to confirm (e.g. the polarity of a 0/1 reference), and `stage_codes_found`.
    """
    data = await read_body(request, int(settings.max_body_mb * 2**20))
    return (await run_in_threadpool(_checked_guess, data)).to_dict()


def _checked_guess(data: bytes) -> ProfileGuess:
    """The guess, if it reads the sample back as a night; else 422 ``profile_not_guessed`` with the reasons."""
    found = guess_profile(data)
    try:
        night_from_csv(data, profile=found.profile)
    except InvalidNightError as exc:
        notes = "; ".join(found.notes)
        raise Unprocessable(f"no import profile that reads this sample could be guessed ({notes or 'no notes'}); "
                            "write the profile by hand", code="profile_not_guessed", problems=exc.problems) from None
    return found


@router.get("", response_model=list[ImportProfileOut])
def list_profiles(access: IngestAccess, session: ReadSession) -> Any:
    """The study's import profiles, by name."""
    return [_out(p) for p in profiles.list_profiles(session, study_id=access.study_id)]


@router.get("/{name}", response_model=ImportProfileOut)
def get_profile(access: IngestAccess, name: ProfileName, session: ReadSession) -> Any:
    """One import profile."""
    return _out(profiles.profile_info(session, access.study_id, name))


@router.delete("/{name}", response_model=ImportProfileOut)
def delete_profile(access: IngestAccess, name: ProfileName, factory: FactoryDep) -> Any:
    """Delete an import profile (audited); answers the profile as it was."""
    with session_scope(factory, write=True) as session:
        return _out(profiles.delete_profile(session, study_id=access.study_id, name=name, actor=access.actor))
