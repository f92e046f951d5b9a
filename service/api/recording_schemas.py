"""HTTP response shapes of continuous recordings (Pydantic): periods, non-wear, diary, PSG reference, days."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from pydantic import BaseModel, Field

__all__ = ["DayRowOut", "DaysOut", "DiaryAccepted", "NonwearItemOut", "NonwearOut", "PeriodOut", "PeriodsOut",
           "RecordingAccepted", "RecordingDeleted", "RecordingOut", "ReferenceAccepted"]


class PeriodOut(BaseModel):
    """A sleep period: the rest interval [start, end) and its first and last sleep epoch."""

    kind: str = Field(description="main (the day's main sleep, a night) or nap")
    day: str = Field(description="the noon-to-noon day it belongs to, as the evening's date")
    start: datetime = Field(description="start of the rest interval (in bed)")
    end: datetime = Field(description="end of the rest interval")
    sleep_onset: datetime | None = Field(description="start of the first sleep epoch")
    sleep_offset: datetime | None = Field(description="end of the last sleep epoch")
    source: str = Field(description="what set the rest interval: diary, marker or detected")
    night_id: str | None = Field(description="the night of a main period (scored and listed like any night)")
    conflicts: list[str] = Field(description="disagreements between diary, markers and the counts")


class PeriodsOut(BaseModel):
    items: list[PeriodOut]


class NonwearItemOut(BaseModel):
    start: datetime
    end: datetime
    minutes: float
    reason: str


class NonwearOut(BaseModel):
    items: list[NonwearItemOut]


class RecordingAccepted(BaseModel):
    recording_id: str
    created: bool
    start: datetime
    end: datetime
    epoch_seconds: int = Field(description="the study's epoch length, as stored")
    source_epoch_seconds: int | None = Field(description="the posted epoch length when it was aggregated")
    n_epochs: int
    unused_columns: list[str] = Field(default_factory=list)
    periods: list[PeriodOut]


class RecordingOut(BaseModel):
    recording_id: str
    participant_id: str
    start: datetime
    end: datetime
    epoch_seconds: int
    source_epoch_seconds: int | None
    n_epochs: int
    days: float = Field(description="length of the recording, days")
    source_format: str
    source_name: str | None
    tz: str | None = Field(description="IANA zone of its local days, or None: the start's UTC offset")
    has_diary: bool
    nonwear_min: float
    n_main_periods: int
    n_naps: int
    night_ids: list[str] = Field(description="nights of its main periods, in time order")
    labelled_night_ids: list[str] = Field(description="those of them labelled with a PSG reference")
    created_at: datetime


class RecordingDeleted(BaseModel):
    recording_id: str
    nights_removed: list[str]


class DiaryAccepted(BaseModel):
    recording_id: str
    diary_days: int
    nights_removed: list[str]
    nights_added: list[str]
    periods: list[PeriodOut]


class ReferenceAccepted(BaseModel):
    night_id: str = Field(description="the labelled night (its id changes with its labels)")
    clock_offset_s: float = Field(description="seconds added to the PSG clock to land on the recording's clock")
    alignment_quality: float | None = Field(description="agreement of movement and PSG wake at that offset "
                                                        "(None: the offset was given)")
    offset_given: bool
    qc: list[dict[str, Any]]


class DayRowOut(BaseModel):
    model_config = {"extra": "allow"}

    date: str
    bed_time: datetime | None
    sleep_onset: datetime | None
    sleep_offset: datetime | None
    rise_time: datetime | None
    tst_min: float | None
    sol_min: float | None
    waso_min: float | None
    awakenings: int | None
    sleep_efficiency_pct: float | None
    naps: int
    nap_min: float
    nonwear_min: float
    source: str | None
    method: str
    model_version: int | None
    night_id: str | None


class DaysOut(BaseModel):
    recording_id: str
    method: str = Field(description="the method asked for, or the rule auto fell back to")
    methods_used: list[str] = Field(description="the concrete methods that scored the nights (auto: per participant)")
    rows: list[DayRowOut]
    summary: dict[str, Any]
    definitions: dict[str, Any]
