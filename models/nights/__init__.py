"""Nights: the data model, checks and quality flags, epoch aggregation, import profiles, JSON/CSV/Parquet formats."""

from __future__ import annotations

from .checks import (
    MAX_LABEL_CHARS,
    CodedLabels,
    NightOptions,
    validate_night_fields,
)
from .columns import (
    COLUMN_ALIASES,
    REFERENCE_HINTS,
    looks_like_reference,
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
from .profile_guess import (
    DATE_FORMATS,
    DATETIME_FORMATS,
    TIME_OF_DAY_FORMATS,
    ProfileGuess,
    guess_profile,
)
from .profiles import (
    PROFILE_COLUMN_ROLES,
    PROFILE_STAGE_TARGETS,
    ImportProfile,
    InvalidProfileError,
)
from .quality import (
    QCConfig,
    QCFlag,
    quality_flags,
)
from .resample import (
    aggregate_epochs,
    majority_stage,
    to_study_epoch,
)
from .tabular import (
    night_from_csv,
    night_from_parquet,
    night_to_csv,
    night_to_parquet,
)
from .timestamps import (
    EARLIEST_PLAUSIBLE_DATE,
    ISO_8601_PATTERN,
    LATEST_PLAUSIBLE_DATE,
)

__all__ = [
    "COLUMN_ALIASES",
    "CodedLabels",
    "DATETIME_FORMATS",
    "DATE_FORMATS",
    "EARLIEST_PLAUSIBLE_DATE",
    "FORMATS",
    "ISO_8601_PATTERN",
    "ImportProfile",
    "InvalidProfileError",
    "LATEST_PLAUSIBLE_DATE",
    "MAX_LABEL_CHARS",
    "MovementTimePolicy",
    "Night",
    "NightOptions",
    "PROFILE_COLUMN_ROLES",
    "PROFILE_STAGE_TARGETS",
    "ProfileGuess",
    "QCConfig",
    "QCFlag",
    "REFERENCE_HINTS",
    "STAGE_CODES",
    "SUPPORTED_EPOCH_SECONDS",
    "TIME_OF_DAY_FORMATS",
    "UNSCORED_CODES",
    "aggregate_epochs",
    "canonical_stage",
    "detect_format",
    "guess_profile",
    "looks_like_reference",
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
    "to_study_epoch",
    "validate_night_fields",
]
