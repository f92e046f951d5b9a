"""Continuous recordings: whole wear periods, diaries, non-wear, sleep periods and day summaries."""

from __future__ import annotations

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
    "DiaryDay",
    "InvalidDiaryError",
    "InvalidRecordingError",
    "NonwearConfig",
    "NonwearInterval",
    "RECORDING_MAX_DAYS",
    "RECORDING_MIN_HOURS",
    "Recording",
    "choi_candidates",
    "detect_nonwear",
    "nonwear_mask",
    "read_diary",
    "read_recording",
    "recording_from_json",
    "recording_to_epoch",
    "recording_to_json",
]
