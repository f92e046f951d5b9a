"""Continuous recordings: whole wear periods, diaries, non-wear, sleep periods and day summaries."""

from __future__ import annotations

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
    "InvalidRecordingError",
    "RECORDING_MAX_DAYS",
    "RECORDING_MIN_HOURS",
    "Recording",
    "read_recording",
    "recording_from_json",
    "recording_to_epoch",
    "recording_to_json",
]
