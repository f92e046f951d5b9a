"""HTTP request and response shapes (Pydantic). Requests are strict and refuse unknown fields."""

from __future__ import annotations

from datetime import datetime
from typing import Any, Generic, Literal, TypeVar

from pydantic import BaseModel, ConfigDict, Field, model_validator

from ..store.registry import ID_PATTERN

__all__ = [
    "ActivationOut", "FlaggedTrainingNightOut", "ImportProfileOut", "JobAccepted", "JobOut", "MarkedVersion",
    "ModelVersionOut",
    "NightAccepted", "NightDeleted", "NightDetailOut", "NightIn", "NightOut", "NightPatch", "Page", "ParticipantOut",
    "Problem", "ProblemItem", "ProfileGuessOut", "Progress", "QCFlagOut", "RenameIn", "RenameOut", "RenumberedVersion",
    "ScoringOut",
    "StudyIn", "StudyOut", "TokenCreated", "TokenIn", "TokenOut", "TrainingIn",
]

T = TypeVar("T")


def _nul_path(value: Any, path: str) -> str | None:
    """The path of the first text (or key) in ``value`` holding a NUL character, else None."""
    if isinstance(value, str):
        return path if "\x00" in value else None
    items = value.items() if isinstance(value, dict) else enumerate(value) if isinstance(value, list) else ()
    for key, item in items:
        where = f"{path}.{key}" if path else str(key)
        if isinstance(key, str) and "\x00" in key:
            return where
        found = _nul_path(item, where)
        if found is not None:
            return found
    return None


class _Strict(BaseModel):
    model_config = ConfigDict(strict=True, extra="forbid", allow_inf_nan=False)

    @model_validator(mode="before")
    @classmethod
    def _no_nul(cls, data: Any) -> Any:
        """Text with a NUL character is refused in every field (no database stores it alike)."""
        found = _nul_path(data, "")
        if found is not None:
            raise ValueError(f"{found or 'the body'} contains a NUL character (\\u0000), which is not stored")
        return data


# ---- problems -------------------------------------------------------------------------------
class ProblemItem(BaseModel):
    """One defect of the input: stable code, sentence, and where it is."""

    code: str
    message: str
    location: dict[str, Any] = Field(default_factory=dict)


class Problem(BaseModel):
    """RFC 9457 problem details, plus a stable ``code`` and, for invalid input, every problem."""

    type: str
    title: str
    status: int
    detail: str
    code: str
    instance: str | None = None
    problems: list[ProblemItem] | None = None
    request_id: str | None = None


class Page(BaseModel, Generic[T]):
    """One page of a listing and the total number of items."""

    data: list[T]
    count: int
    limit: int
    offset: int


# ---- studies and participants ---------------------------------------------------------------
class StudyIn(_Strict):
    study_id: str = Field(pattern=ID_PATTERN, examples=["gullwing"])
    name: str = Field(min_length=1, max_length=200)
    epoch_seconds: Literal[30, 60] = Field(
        default=30, description="epoch length of the study's stored nights, fixed for the study; nights of a "
                                "shorter length that divides it are summed into it at ingest, others refused")


class StudyOut(BaseModel):
    study_id: str
    name: str
    epoch_seconds: int = Field(description="epoch length of every stored night of the study, seconds")
    created_at: datetime


class RenameIn(_Strict):
    to: str = Field(pattern=ID_PATTERN, description="the new participant id; an existing participant is merged into",
                    examples=["P01"])


class RenumberedVersion(BaseModel):
    previous_version: int
    version: int


class RenameOut(BaseModel):
    participant_id: str = Field(description="the id the participant has now")
    previous_id: str
    merged: bool = Field(description="true when a participant of the new id existed and was merged into")
    nights_moved: int
    duplicates_dropped: int = Field(description="nights dropped because the target already had the same content")
    personal_versions: list[RenumberedVersion] = Field(
        description="personal model versions, renumbered after the target's numbers")


class ParticipantOut(BaseModel):
    participant_id: str
    created_at: datetime
    n_nights: int
    n_labelled_nights: int
    chosen_method: str | None = Field(
        description="personal, pooled or pooled+offset once a personal model was compared")
    active_personal_version: int | None
    untrained_labelled_nights: int = Field(
        description="labelled nights the active personal model was not trained on: a retrain would use them")
    retrain_would_add_nights: bool


# ---- nights ---------------------------------------------------------------------------------
class NightIn(_Strict):
    """A night in nightbank JSON (also accepted as text/csv or Parquet with the same columns)."""

    epoch_seconds: Literal[15, 30, 60]
    start: str = Field(description="ISO 8601 start of the first epoch with UTC offset",
                       examples=["2031-03-02T22:41:00+01:00"])
    counts: list[float | None] = Field(min_length=1, description="activity counts, one per epoch")
    reference: list[str | int | None] | None = Field(default=None, description="PSG stage per epoch")
    lights_off: str | None = None
    lights_on: str | None = None
    label: str | None = None


class QCFlagOut(BaseModel):
    code: str
    message: str
    ranges: list[list[int]]
    n_epochs: int
    threshold: dict[str, Any]


class NightAccepted(BaseModel):
    night_id: str
    created: bool = Field(description="false when the same content was already stored")
    qc: list[QCFlagOut]
    epoch_seconds: int | None = Field(default=None, description="epoch length as stored (the study's)")
    source_epoch_seconds: int | None = Field(
        default=None, description="posted epoch length when the night was aggregated to the study's; else null")
    unused_columns: list[str] = Field(default_factory=list, description="columns of the file that were not read")
    label_ignored: bool = Field(default=False, description="true when the same content was stored before under "
                                "another label: the posted label was not stored (change it with PATCH)")
    stored_label: str | None = Field(default=None, description="the stored night's label")


class NightOut(BaseModel):
    night_id: str
    participant_id: str
    content_hash: str
    label: str | None
    start: str
    epoch_seconds: int
    n_epochs: int
    lights_off: str | None
    lights_on: str | None
    labelled: bool
    qc: list[QCFlagOut]
    source_format: str
    created_at: datetime
    source_epoch_seconds: int | None = Field(
        description="posted epoch length when the night was aggregated to the study's at ingest; null: as posted")
    excluded: bool = Field(description="left out of personal and pooled training")


class NightDetailOut(NightOut):
    """A night's metadata; with ``epochs=true`` also its arrays (``counts``, ``reference``, ``corrected``)."""

    counts: list[float | None] | None = Field(
        default=None, description="with epochs=true: counts per epoch of epoch_seconds; null for missing epochs")
    reference: list[str] | None = Field(
        default=None, description="with epochs=true: reference stage code per epoch; null for an unlabelled night")
    corrected: list[int | None] | None = Field(
        default=None, description="with epochs=true: the adjudicated review's corrected labels per epoch (1 sleep, "
        "0 wake, null not judged), null without a correction; never a PSG reference")
    correction: dict[str, Any] | None = Field(
        default=None, description="who adjudicated the correction, from which reviewers, when, and the scoring "
        "shown (adjudicated_by, reviewers, adjudicated_at, model_version_shown); absent without one")


class NightPatch(_Strict):
    """Changes to a stored night; a field left out is kept."""

    label: str | None = Field(default=None, max_length=200, description="the lab's label; null clears it")
    excluded: bool | None = Field(default=None, description="leave the night out of training; null: unchanged")


class MarkedVersion(BaseModel):
    kind: str
    participant_id: str | None = Field(description="owner of a personal version; null for pooled")
    version: int


class NightDeleted(BaseModel):
    night_id: str
    scorings: int = Field(description="cached scorings removed")
    features: int = Field(description="stored feature matrices removed")
    marked_versions: list[MarkedVersion] = Field(
        description="model versions trained on the night: kept, with the night in trained_on_deleted_nights")


# ---- training, jobs and versions ------------------------------------------------------------
class TrainingIn(_Strict):
    n_trials: int | None = Field(default=None, ge=1, le=1000, description="hyper-parameter trials")
    seed: int | None = Field(default=None, ge=0, le=2**31 - 1)


class JobAccepted(BaseModel):
    job_id: str
    state: str
    created: bool = Field(description="false when a training of the same target was already queued or running")


class Progress(BaseModel):
    done: int
    total: int
    stage: str


class JobOut(BaseModel):
    job_id: str
    kind: str
    study_id: str
    participant_id: str | None
    state: Literal["queued", "running", "succeeded", "failed", "cancelled"]
    progress: Progress
    error: str | None
    result: dict[str, Any] | None
    attempts: int
    created_at: datetime
    started_at: datetime | None
    finished_at: datetime | None
    lease: Literal["held", "expired"] | None = Field(
        None, description="while running: 'expired' when its worker stopped and no other worker took it yet")
    worker: str | None = Field(None, description="the worker holding the job while running")
    taken_over_by: str | None = Field(None, description="the worker that took the job after an expired lease")
    reason: str | None = Field(None, description="why a job was cancelled: 'cancel_requested' or "
                                                 "'participant_withdrawn'")


class FlaggedTrainingNightOut(BaseModel):
    participant_id: str
    night_id: str
    codes: list[str] = Field(description="the night's QC codes a model trained on it warns about, e.g. "
                                         "reference_implausible (its PSG reference was stored although implausible)")
    label: str | None = None


class ActivationOut(BaseModel):
    metric: str
    method: str
    activate: bool = Field(description="whether the version became active when it was stored")
    against_version: int | None = Field(description="the version active then (null: none was)")
    compared_nights: list[str] = Field(description="content hashes of the nights both versions held out; "
                                                   "the comparison used them")
    candidate_value: float | None = Field(description="this version's mean over compared_nights")
    active_value: float | None = Field(description="the then active version's mean over compared_nights")
    fresh_nights: list[str] = Field(description="this version's other held-out nights")
    fresh_value: float | None = Field(description="this version's mean over fresh_nights (not used to decide)")
    selection_free: bool = Field(description="false: every held-out figure of this version was used to decide "
                                             "its activation, so its metrics are selection figures (optimistic)")
    note: str


class ModelVersionOut(BaseModel):
    version: int
    kind: str
    active: bool
    status: Literal["active", "candidate"]
    created_at: datetime
    job_id: str | None
    n_training_nights: int
    metrics: dict[str, Any] = Field(description="held-out validation figures")
    threshold: float | None
    offset: float | None
    offset_rule: str | None = Field(
        default=None, description="pooled models: how the offsets of participants it trained on were estimated")
    feature_set_version: str | None
    hyperparameters: dict[str, Any]
    library_versions: dict[str, str]
    training_nights: list[dict[str, Any]]
    trained_on_deleted_nights: list[str] = Field(
        default_factory=list, description="ids of training nights deleted since; the version stays usable")
    removed_held_out_nights: list[str] = Field(
        default_factory=list, description="ids of nights deleted since whose held-out predictions were removed; "
                                          "metrics were computed again over the held-out nights left")
    flagged_training_nights: list[FlaggedTrainingNightOut] = Field(
        default_factory=list, description="training nights that carried a warning QC code when the model was "
                                          "trained (reference_implausible: a reference stored with "
                                          "accept_implausible); empty for versions stored before this was recorded")
    activation: ActivationOut | None = Field(
        default=None, description="the held-out comparison that decided activation when the version was stored; "
                                  "null for versions stored before this was recorded")


# ---- import profiles ------------------------------------------------------------------------
class ProfileGuessOut(BaseModel):
    profile: dict[str, Any] = Field(description="the proposed import profile (its JSON form)")
    preview: list[dict[str, Any]] = Field(description="the first rows read with it: time, counts, reference")
    notes: list[str] = Field(description="what was guessed and what to confirm before saving")
    stage_codes_found: list[str] = Field(description="the reference codes written in the sample")


class ImportProfileOut(BaseModel):
    name: str
    profile: dict[str, Any] = Field(description="the profile's JSON form (fields that differ from their defaults)")
    created_at: datetime
    created_by: str = Field(description="token id that saved it")


# ---- scoring --------------------------------------------------------------------------------
class ScoringOut(BaseModel):
    method: str = Field(description="the method that produced the scoring (auto resolved)")
    model_version: int | None
    epoch_seconds: int
    start: str
    n_epochs: int
    in_bed: list[int] = Field(description="[first, stop) epoch indices of the in-bed interval")
    p_sleep: list[float | None] | None = Field(description="probability of sleep per epoch; null for rules")
    sleep: list[int | None] = Field(description="1 = sleep, 0 = wake, null = unscored (no counts)")
    parameters: dict[str, float | int | None]
    agreement: dict[str, Any] | None
    offset: float | None = Field(default=None, description="log-odds offset applied (model methods)")
    intervals: dict[str, list[float | None]] | None = Field(
        default=None, description="per-night [low, high] of sol_min, tst_min, waso_min, awakenings and "
        "sleep_efficiency_pct at interval_level (model methods with decoding; null otherwise)")
    interval_level: float | None = Field(default=None, description="level of the intervals (the study protocol's)")
    uncertainty_min: float | None = Field(
        default=None, description="review score: expected absolute error of the posterior median TST plus WASO, "
        "minutes (model methods with decoding)")
    p_sleep_posterior: list[float | None] | None = Field(
        default=None, description="posterior probability of sleep per epoch under the HMM decoder; null otherwise")


# ---- tokens ---------------------------------------------------------------------------------
class TokenIn(_Strict):
    role: Literal["ingest", "reviewer", "analyst", "admin"]
    study_id: str | None = Field(default=None, pattern=ID_PATTERN)
    label: str | None = Field(default=None, max_length=200)


class TokenOut(BaseModel):
    token_id: str
    role: str
    study_id: str | None
    label: str | None
    created_at: datetime
    revoked_at: datetime | None


class TokenCreated(TokenOut):
    token: str = Field(description="the bearer token; shown once, only its salted hash is stored")
