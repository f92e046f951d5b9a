"""A study's protocol: the parameter definitions and agreement settings of every figure it reports.

Reading needs any role of the study; setting it needs the analyst role (or higher) and is
audited. Setting a protocol retrains nothing: every later scoring, comparison, export and page
is computed under it and states it, and results cached under the previous protocol are not used.
"""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Body, Depends
from sqlalchemy.exc import IntegrityError

from ...errors import Conflict
from ...store import protocols
from ...store.db import session_scope
from ...store.tokens import Role
from ..deps import FactoryDep, ReadSession, StudyAccess, study_access
from ..problems import problem_responses

__all__ = ["router"]

router = APIRouter(prefix="/v1/studies/{study}/protocol", tags=["protocol"])
ReadAccess = Annotated[StudyAccess, Depends(study_access(Role.ingest))]
AnalystAccess = Annotated[StudyAccess, Depends(study_access(Role.analyst))]
_EXAMPLE = {"waso_end": "final_awakening", "min_awakening_epochs": 2, "sol": "first_sleep",
            "equivalence_margins": {"tst_min": 20.0}, "ci_level": 0.95, "bootstrap_resamples": 2000, "seed": 0}
ProtocolBody = Annotated[dict[str, Any], Body(
    description="the protocol's JSON form; fields left out take their defaults: waso_end, min_awakening_epochs, "
                "persistent_sleep_min, sol, unscored_breaks_bouts, equivalence_margins, ci_level, "
                "bootstrap_resamples, seed, interval_level", examples=[_EXAMPLE])]


@router.get("", response_model=dict[str, Any])
def get_protocol(access: ReadAccess, session: ReadSession) -> Any:
    """The study's protocol (`protocol`), its `fingerprint`, whether it is the default, and when and by whom
    it was set."""
    return protocols.protocol_info(session, access.study_id).to_dict()


@router.put("", response_model=dict[str, Any], responses=problem_responses(409))
def set_protocol(access: AnalystAccess, body: ProtocolBody, factory: FactoryDep) -> Any:
    """Set the study's protocol (validated: every bad field is named in a 422 `invalid_protocol`).

    Models are kept; scorings, comparisons and exports are computed again under the new protocol.
    """
    for _ in range(2):  # a concurrent first save may win the insert; the retry replaces it
        try:
            with session_scope(factory, write=True) as session:
                return protocols.save_protocol(session, study_id=access.study_id, body=body,
                                               actor=access.actor).to_dict()
        except IntegrityError:
            continue
    raise Conflict("the protocol could not be saved: a concurrent change conflicted; try again",
                   code="concurrent_change")
