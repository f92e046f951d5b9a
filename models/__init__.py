"""nightbank's science: nights, validation, classical rules, sleep parameters, agreement,
features and models. Plain Python (numpy, pandas, scikit-learn, XGBoost, Optuna); no web or
database code. ``__all__`` is the only surface the service may import.
"""

from .checks import NightOptions, QCConfig, QCFlag, quality_flags, validate_night_fields
from .demo_study import DEMO_STUDY_ID, demo_nights, write_demo_study
from .errors import InvalidNightError, NightbankError, NotFittedError, Problem
from .io import COLUMN_ALIASES, detect_format, night_from_json, night_to_json, read_night
from .night import SUPPORTED_EPOCH_SECONDS, Night, canonical_stage, stages_to_sleep
from .resample import aggregate_epochs
from .simulation import CohortSpec, SimulatedNight, simulate_cohort
from .tabular import night_from_csv, night_from_parquet, night_to_csv, night_to_parquet

__all__ = [
    "COLUMN_ALIASES",
    "CohortSpec",
    "DEMO_STUDY_ID",
    "InvalidNightError",
    "Night",
    "NightOptions",
    "NightbankError",
    "NotFittedError",
    "Problem",
    "QCConfig",
    "QCFlag",
    "SUPPORTED_EPOCH_SECONDS",
    "SimulatedNight",
    "aggregate_epochs",
    "canonical_stage",
    "demo_nights",
    "detect_format",
    "night_from_csv",
    "night_from_json",
    "night_from_parquet",
    "night_to_csv",
    "night_to_json",
    "night_to_parquet",
    "quality_flags",
    "read_night",
    "simulate_cohort",
    "stages_to_sleep",
    "validate_night_fields",
    "write_demo_study",
]
