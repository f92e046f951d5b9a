"""Nights: the data model, validation and quality flags, epoch aggregation, and the JSON/CSV/Parquet formats."""

from __future__ import annotations

from .checks import (
    CodedLabels,
    NightOptions,
    QCConfig,
    QCFlag,
    quality_flags,
    validate_night_fields,
)
from .formats import (
    FORMATS,
    detect_format,
    read_night,
)
from .json_io import (
    night_from_json,
    night_to_json,
)
from .night import (
    STAGE_CODES,
    SUPPORTED_EPOCH_SECONDS,
    UNSCORED_CODES,
    MovementTimePolicy,
    Night,
    canonical_stage,
    stages_to_sleep,
)
from .profiles import (
    PROFILE_COLUMN_ROLES,
    PROFILE_STAGE_TARGETS,
    ImportProfile,
    InvalidProfileError,
)
from .resample import (
    aggregate_epochs,
    majority_stage,
)
from .tabular import (
    COLUMN_ALIASES,
    night_from_csv,
    night_from_parquet,
    night_to_csv,
    night_to_parquet,
)

__all__ = [
    "COLUMN_ALIASES",
    "CodedLabels",
    "FORMATS",
    "ImportProfile",
    "InvalidProfileError",
    "MovementTimePolicy",
    "Night",
    "NightOptions",
    "PROFILE_COLUMN_ROLES",
    "PROFILE_STAGE_TARGETS",
    "QCConfig",
    "QCFlag",
    "STAGE_CODES",
    "SUPPORTED_EPOCH_SECONDS",
    "UNSCORED_CODES",
    "aggregate_epochs",
    "canonical_stage",
    "detect_format",
    "majority_stage",
    "night_from_csv",
    "night_from_json",
    "night_from_parquet",
    "night_to_csv",
    "night_to_json",
    "night_to_parquet",
    "quality_flags",
    "read_night",
    "stages_to_sleep",
    "validate_night_fields",
]
