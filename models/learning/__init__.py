"""Sleep/wake models: training, evaluation, the classifier and its artifacts, offsets and the method choice.

Settings and training rows, splits, tuning and the threshold, personal and pooled training, held-out
figures, participant offsets, the method choice and the study comparison.
"""

from __future__ import annotations

from .activation import (
    ActivationEvidence,
    activation_evidence,
)
from .artifacts import (
    FORMAT,
    FORMAT_VERSION,
    InvalidModelArtifactError,
    library_versions,
    load_model,
    model_from_bytes,
    model_to_bytes,
    save_model,
)
from .classifier import (
    ModelKind,
    Projection,
    SleepModel,
)
from .config import (
    CHOICE_POLICIES,
    DEFAULT_SHRINKAGE_GRID,
    POOLED_PARAMS,
    InvalidTrainingConfigError,
    TrainingConfig,
    TrainingDataError,
)
from .descriptors import (
    DESCRIPTOR_NAMES,
    participant_descriptors,
)
from .held_out import (
    HeldOutNight,
    night_metrics_table,
    summary_table,
)
from .method_choice import (
    AUTO,
    MODEL_METHODS,
    MethodChoice,
    choose_method,
    nested_choice,
)
from .offset import (
    ShrinkageChoice,
    choose_shrinkage,
    estimate_offset,
    offset_log_likelihood,
    participant_offset,
)
from .personal import (
    PersonalResult,
    personal_studies,
    train_personal,
)
from .pooled import (
    OFFSET_RULE,
    PooledResult,
    train_pooled,
)
from .pooled_start import (
    ADDED_ROUNDS,
    ADDED_TREE_PARAMS,
    SCRATCH_MARGIN_AUC,
    START_GRID,
    PooledBase,
    StartChoice,
    continue_boosting,
    prefer_scratch,
    start_design,
    tune_start,
)
from .rows import (
    NightRows,
    corrected_rows,
    iter_prepared,
    labelled_nights,
    prepare_nights,
    study_seed,
)
from .splits import (
    SPLITTERS,
    ForwardChainedSplit,
    TooFewNightsError,
    fold_groups,
    participant_groups,
)
from .study_comparison import (
    COMPARED_RULES,
    COVERAGE_COLUMNS,
    StudyComparison,
    compare_study,
    held_out_comparison,
)
from .tasks import (
    Progress,
    Reporter,
    TrainingCancelled,
    run_tasks,
)
from .threshold import (
    binary_auc,
    youden_threshold,
)
from .tuning import (
    PCA_CHOICES,
    WARM_START,
    SplitMatrices,
    TunedPipeline,
    booster_params,
    suggest_hyperparameters,
    tune_and_fit,
)

__all__ = [
    "ADDED_ROUNDS",
    "ADDED_TREE_PARAMS",
    "AUTO",
    "ActivationEvidence",
    "CHOICE_POLICIES",
    "COMPARED_RULES",
    "COVERAGE_COLUMNS",
    "DEFAULT_SHRINKAGE_GRID",
    "DESCRIPTOR_NAMES",
    "FORMAT",
    "FORMAT_VERSION",
    "ForwardChainedSplit",
    "HeldOutNight",
    "InvalidModelArtifactError",
    "InvalidTrainingConfigError",
    "MODEL_METHODS",
    "MethodChoice",
    "ModelKind",
    "NightRows",
    "OFFSET_RULE",
    "PCA_CHOICES",
    "POOLED_PARAMS",
    "PersonalResult",
    "PooledBase",
    "PooledResult",
    "Progress",
    "Projection",
    "Reporter",
    "SCRATCH_MARGIN_AUC",
    "SPLITTERS",
    "START_GRID",
    "ShrinkageChoice",
    "SleepModel",
    "SplitMatrices",
    "StartChoice",
    "StudyComparison",
    "TooFewNightsError",
    "TrainingCancelled",
    "TrainingConfig",
    "TrainingDataError",
    "TunedPipeline",
    "WARM_START",
    "activation_evidence",
    "binary_auc",
    "booster_params",
    "choose_method",
    "choose_shrinkage",
    "compare_study",
    "continue_boosting",
    "corrected_rows",
    "estimate_offset",
    "fold_groups",
    "held_out_comparison",
    "iter_prepared",
    "labelled_nights",
    "library_versions",
    "load_model",
    "model_from_bytes",
    "model_to_bytes",
    "nested_choice",
    "night_metrics_table",
    "offset_log_likelihood",
    "participant_descriptors",
    "participant_groups",
    "participant_offset",
    "personal_studies",
    "prefer_scratch",
    "prepare_nights",
    "run_tasks",
    "save_model",
    "start_design",
    "study_seed",
    "suggest_hyperparameters",
    "summary_table",
    "train_personal",
    "train_pooled",
    "tune_and_fit",
    "tune_start",
    "youden_threshold",
]
