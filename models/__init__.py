"""nightbank's science: nights, validation, classical rules, sleep parameters, agreement,
features and models. Plain Python (numpy, pandas, scikit-learn, XGBoost, Optuna); no web or
database code. ``__all__`` is the only surface the service may import.
"""

from .agreement.bland_altman import (
    BLAND_ALTMAN_PARAMETERS,
    REFERENCE,
    BlandAltman,
    NightRecord,
    RuleComparison,
    bland_altman,
    bland_altman_table,
    compare_rules_with_reference,
)
from .nights.checks import NightOptions, QCConfig, QCFlag, quality_flags, validate_night_fields
from .learning.artifacts import InvalidModelArtifactError, load_model, model_from_bytes, model_to_bytes, save_model
from .learning.classifier import SleepModel
from .learning.study_comparison import COMPARED_RULES, MODEL_METHODS, StudyComparison, choose_method, compare_study
from .simulation.demo_study import DEMO_STUDY_ID, demo_nights, write_demo_study
from .errors import InvalidNightError, NightbankError, NotFittedError, Problem
from .features.cache import FeatureCache
from .features.matrix import (
    FAMILIES,
    FeatureConfig,
    FeatureInputError,
    FeatureMatrix,
    FeatureSetMismatchError,
    check_feature_set,
    compute_features,
)
from .nights.json_io import COLUMN_ALIASES, detect_format, night_from_json, night_to_json, read_night
from .agreement.epoch_metrics import ALWAYS_SLEEP, EPOCH_METRIC_NAMES, ScoredNight, agreement_table, always_sleep, epoch_agreement
from .nights.night import SUPPORTED_EPOCH_SECONDS, Night, canonical_stage, stages_to_sleep
from .learning.offset import ShrinkageChoice, choose_shrinkage, estimate_offset
from .scoring.parameters import PARAMETER_NAMES, SleepParameters, sleep_parameters
from .learning.personal import PersonalResult, train_personal
from .learning.pooled import PooledResult, participant_offset, train_pooled
from .nights.resample import aggregate_epochs
from .scoring.rescoring import webster_rescore
from .scoring.rules import METHOD_IDS, RULES, RuleScoring, UnknownMethodError, continuous_scores, score_with_rule
from .simulation.simulator import CohortSpec, SimulatedNight, simulate_cohort
from .learning.splits import SPLITTERS, ForwardChainedSplit, TooFewNightsError
from .nights.tabular import night_from_csv, night_from_parquet, night_to_csv, night_to_parquet
from .learning.tasks import Progress, TrainingCancelled
from .learning.training import (
    CHOICE_POLICIES,
    DESCRIPTOR_NAMES,
    HeldOutNight,
    InvalidTrainingConfigError,
    TrainingConfig,
    TrainingDataError,
    participant_descriptors,
)

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
    "CHOICE_POLICIES",
    "choose_method",
    "choose_shrinkage",
    "CohortSpec",
    "COLUMN_ALIASES",
    "compare_rules_with_reference",
    "compare_study",
    "COMPARED_RULES",
    "compute_features",
    "continuous_scores",
    "demo_nights",
    "DEMO_STUDY_ID",
    "DESCRIPTOR_NAMES",
    "detect_format",
    "epoch_agreement",
    "EPOCH_METRIC_NAMES",
    "estimate_offset",
    "FAMILIES",
    "FeatureCache",
    "FeatureConfig",
    "FeatureInputError",
    "FeatureMatrix",
    "FeatureSetMismatchError",
    "ForwardChainedSplit",
    "HeldOutNight",
    "InvalidModelArtifactError",
    "InvalidNightError",
    "InvalidTrainingConfigError",
    "load_model",
    "METHOD_IDS",
    "model_from_bytes",
    "MODEL_METHODS",
    "model_to_bytes",
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
    "participant_descriptors",
    "participant_offset",
    "PersonalResult",
    "PooledResult",
    "Problem",
    "Progress",
    "QCConfig",
    "QCFlag",
    "quality_flags",
    "read_night",
    "REFERENCE",
    "RuleComparison",
    "RULES",
    "RuleScoring",
    "save_model",
    "score_with_rule",
    "ScoredNight",
    "ShrinkageChoice",
    "simulate_cohort",
    "SimulatedNight",
    "sleep_parameters",
    "SleepModel",
    "SleepParameters",
    "SPLITTERS",
    "stages_to_sleep",
    "StudyComparison",
    "SUPPORTED_EPOCH_SECONDS",
    "TooFewNightsError",
    "train_personal",
    "train_pooled",
    "TrainingCancelled",
    "TrainingConfig",
    "TrainingDataError",
    "UnknownMethodError",
    "validate_night_fields",
    "webster_rescore",
    "write_demo_study",
]
