"""Sleep/wake models: splits, tuning, thresholds, the classifier and its artifacts, personal and pooled training, offsets, the method choice and the study comparison."""

from __future__ import annotations

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
from .method_choice import (
    MODEL_METHODS,
    choose_method,
)
from .offset import (
    DEFAULT_SHRINKAGE_GRID,
    ShrinkageChoice,
    choose_shrinkage,
    estimate_offset,
    offset_log_likelihood,
)
from .personal import (
    PersonalResult,
    train_personal,
)
from .pooled import (
    PooledResult,
    participant_offset,
    train_pooled,
)
from .splits import (
    ForwardChainedSplit,
    SPLITTERS,
    TooFewNightsError,
)
from .study_comparison import (
    COMPARED_RULES,
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
from .training import (
    CHOICE_POLICIES,
    DESCRIPTOR_NAMES,
    HeldOutNight,
    InvalidTrainingConfigError,
    POOLED_PARAMS,
    TrainingConfig,
    TrainingDataError,
    participant_descriptors,
)
from .tuning import (
    PCA_CHOICES,
    TunedPipeline,
    WARM_START,
    booster_params,
    suggest_hyperparameters,
    tune_and_fit,
    youden_threshold,
)

__all__ = [
    "CHOICE_POLICIES",
    "COMPARED_RULES",
    "DEFAULT_SHRINKAGE_GRID",
    "DESCRIPTOR_NAMES",
    "FORMAT",
    "FORMAT_VERSION",
    "ForwardChainedSplit",
    "HeldOutNight",
    "InvalidModelArtifactError",
    "InvalidTrainingConfigError",
    "MODEL_METHODS",
    "ModelKind",
    "PCA_CHOICES",
    "POOLED_PARAMS",
    "PersonalResult",
    "PooledResult",
    "Progress",
    "Projection",
    "Reporter",
    "SPLITTERS",
    "ShrinkageChoice",
    "SleepModel",
    "StudyComparison",
    "TooFewNightsError",
    "TrainingCancelled",
    "TrainingConfig",
    "TrainingDataError",
    "TunedPipeline",
    "WARM_START",
    "booster_params",
    "choose_method",
    "choose_shrinkage",
    "compare_study",
    "estimate_offset",
    "held_out_comparison",
    "library_versions",
    "load_model",
    "model_from_bytes",
    "model_to_bytes",
    "offset_log_likelihood",
    "participant_descriptors",
    "participant_offset",
    "run_tasks",
    "save_model",
    "suggest_hyperparameters",
    "train_personal",
    "train_pooled",
    "tune_and_fit",
    "youden_threshold",
]
