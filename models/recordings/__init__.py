"""Continuous recordings: whole wear periods, diaries, non-wear, sleep periods and day summaries."""

from __future__ import annotations

from .alignment import (
    AlignmentConfig,
    AlignmentError,
    ClockAlignment,
    estimate_clock_offset,
)
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
from .hypnogram import (
    HYPNOGRAM_EPOCH_SECONDS,
    HYPNOGRAM_MAX_EPOCHS,
    Hypnogram,
    InvalidHypnogramError,
    hypnogram_on_epochs,
    read_hypnogram,
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
from .regularity import (
    clock_mean_h,
    clock_sd_h,
    mid_sleep,
    sleep_regularity_index,
    social_jetlag_h,
)

__all__ = [
    "AlignmentConfig",
    "AlignmentError",
    "ClockAlignment",
    "DayRow",
    "DetectionConfig",
    "DiaryDay",
    "HYPNOGRAM_EPOCH_SECONDS",
    "HYPNOGRAM_MAX_EPOCHS",
    "Hypnogram",
    "InvalidDiaryError",
    "InvalidHypnogramError",
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
    "clock_mean_h",
    "clock_sd_h",
    "day_rows",
    "detect_nonwear",
    "estimate_clock_offset",
    "find_periods",
    "hypnogram_on_epochs",
    "mid_sleep",
    "nonwear_mask",
    "period_night",
    "read_diary",
    "read_hypnogram",
    "read_recording",
    "recording_from_json",
    "recording_summary",
    "recording_to_epoch",
    "recording_to_json",
    "sleep_regularity_index",
    "sleep_state",
    "social_jetlag_h",
]
