"""Continuous recordings: PSG hypnograms, clock alignment and sleep regularity across days."""

from __future__ import annotations

from .alignment import (
    AlignmentConfig,
    AlignmentError,
    ClockAlignment,
    estimate_clock_offset,
)
from .hypnogram import (
    HYPNOGRAM_EPOCH_SECONDS,
    HYPNOGRAM_MAX_EPOCHS,
    Hypnogram,
    InvalidHypnogramError,
    hypnogram_on_epochs,
    read_hypnogram,
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
    "HYPNOGRAM_EPOCH_SECONDS",
    "HYPNOGRAM_MAX_EPOCHS",
    "Hypnogram",
    "InvalidHypnogramError",
    "clock_mean_h",
    "clock_sd_h",
    "estimate_clock_offset",
    "hypnogram_on_epochs",
    "mid_sleep",
    "read_hypnogram",
    "sleep_regularity_index",
    "social_jetlag_h",
]
