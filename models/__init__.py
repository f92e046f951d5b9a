"""nightbank's science: nights, validation, classical rules, sleep parameters, agreement,
features and models. Plain Python (numpy, pandas, scikit-learn, XGBoost, Optuna); no web or
database code. ``__all__`` is the only surface the service may import.
"""

from .agreement import (
    BLAND_ALTMAN_PARAMETERS,
    REFERENCE,
    BlandAltman,
    NightRecord,
    RuleComparison,
    bland_altman,
    bland_altman_table,
    compare_rules_with_reference,
)
from .checks import NightOptions, QCConfig, QCFlag, quality_flags, validate_night_fields
from .demo_study import DEMO_STUDY_ID, demo_nights, write_demo_study
from .errors import InvalidNightError, NightbankError, NotFittedError, Problem
from .feature_cache import FeatureCache
from .features import (
    FAMILIES,
    FeatureConfig,
    FeatureInputError,
    FeatureMatrix,
    FeatureSetMismatchError,
    check_feature_set,
    compute_features,
)
from .io import COLUMN_ALIASES, detect_format, night_from_json, night_to_json, read_night
from .metrics import ALWAYS_SLEEP, EPOCH_METRIC_NAMES, ScoredNight, agreement_table, always_sleep, epoch_agreement
from .night import SUPPORTED_EPOCH_SECONDS, Night, canonical_stage, stages_to_sleep
from .parameters import PARAMETER_NAMES, SleepParameters, sleep_parameters
from .resample import aggregate_epochs
from .rescoring import webster_rescore
from .rules import METHOD_IDS, RULES, RuleScoring, UnknownMethodError, continuous_scores, score_with_rule
from .simulation import CohortSpec, SimulatedNight, simulate_cohort
from .tabular import night_from_csv, night_from_parquet, night_to_csv, night_to_parquet

__all__ = [
    "aggregate_epochs",
    "agreement_table",
    "always_sleep",
    "ALWAYS_SLEEP",
    "bland_altman",
    "BLAND_ALTMAN_PARAMETERS",
    "bland_altman_table",
    "BlandAltman",
    "canonical_stage",
    "check_feature_set",
    "CohortSpec",
    "COLUMN_ALIASES",
    "compare_rules_with_reference",
    "compute_features",
    "continuous_scores",
    "demo_nights",
    "DEMO_STUDY_ID",
    "detect_format",
    "epoch_agreement",
    "EPOCH_METRIC_NAMES",
    "FAMILIES",
    "FeatureCache",
    "FeatureConfig",
    "FeatureInputError",
    "FeatureMatrix",
    "FeatureSetMismatchError",
    "InvalidNightError",
    "METHOD_IDS",
    "Night",
    "night_from_csv",
    "night_from_json",
    "night_from_parquet",
    "night_to_csv",
    "night_to_json",
    "night_to_parquet",
    "NightbankError",
    "NightOptions",
    "NightRecord",
    "NotFittedError",
    "PARAMETER_NAMES",
    "Problem",
    "QCConfig",
    "QCFlag",
    "quality_flags",
    "read_night",
    "REFERENCE",
    "RuleComparison",
    "RULES",
    "RuleScoring",
    "score_with_rule",
    "ScoredNight",
    "simulate_cohort",
    "SimulatedNight",
    "sleep_parameters",
    "SleepParameters",
    "stages_to_sleep",
    "SUPPORTED_EPOCH_SECONDS",
    "UnknownMethodError",
    "validate_night_fields",
    "webster_rescore",
    "write_demo_study",
]
