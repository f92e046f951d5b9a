"""Simulated nights: the cohort simulator and the demo study (all data invented)."""

from __future__ import annotations

from .demo_study import (
    DEMO_RECORDING_SPEC,
    DEMO_SEED,
    DEMO_STUDY_ID,
    demo_nights,
    demo_recordings,
    write_demo_study,
)
from .recordings import (
    RecordingSpec,
    SimulatedDay,
    SimulatedPsg,
    SimulatedRecording,
    simulate_recordings,
)
from .simulator import (
    CohortSpec,
    PersonTraits,
    SimulatedNight,
    simulate_cohort,
    simulate_night,
)

__all__ = [
    "CohortSpec",
    "DEMO_RECORDING_SPEC",
    "DEMO_SEED",
    "DEMO_STUDY_ID",
    "PersonTraits",
    "RecordingSpec",
    "SimulatedDay",
    "SimulatedNight",
    "SimulatedPsg",
    "SimulatedRecording",
    "demo_nights",
    "demo_recordings",
    "simulate_cohort",
    "simulate_night",
    "simulate_recordings",
    "write_demo_study",
]
