"""Continuous recordings: whole wear periods, diaries, non-wear, sleep periods and day summaries."""

from __future__ import annotations

from .days import (
    DayRow,
    RecordingSummary,
    day_rows,
    recording_summary,
    sleep_state,
)
from .diary import (
    DiaryDay,
    InvalidDiaryError,
    read_diary,
)
from .nonwear import (
    NonwearConfig,
    NonwearInterval,
    choi_candidates,
    detect_nonwear,
    nonwear_mask,
)
from .periods import (
    DetectionConfig,
    PeriodConfig,
    SleepPeriod,
    find_periods,
    period_night,
)
from .recording import (
    RECORDING_MAX_DAYS,
    RECORDING_MIN_HOURS,
    InvalidRecordingError,
    Recording,
    read_recording,
    recording_from_json,
    recording_to_epoch,
    recording_to_json,
)

__all__ = [
    "DayRow",
    "DetectionConfig",
    "DiaryDay",
    "InvalidDiaryError",
    "InvalidRecordingError",
    "NonwearConfig",
    "NonwearInterval",
    "PeriodConfig",
    "RECORDING_MAX_DAYS",
    "RECORDING_MIN_HOURS",
    "Recording",
    "RecordingSummary",
    "SleepPeriod",
    "choi_candidates",
    "day_rows",
    "detect_nonwear",
    "find_periods",
    "nonwear_mask",
    "period_night",
    "read_diary",
    "read_recording",
    "recording_from_json",
    "recording_summary",
    "recording_to_epoch",
    "recording_to_json",
    "sleep_state",
]
