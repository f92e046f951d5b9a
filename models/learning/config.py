"""Training settings: the TrainingConfig dataclass, its fixed defaults and the training errors.

Errors::

    NightbankError
    ├── InvalidTrainingConfigError   a TrainingConfig field is out of range
    └── TrainingDataError            nights unusable for training (too few, mixed epoch lengths)
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

import numpy as np

from ..decoding.fitting import CALIBRATION_CHOICES, DECODER_CHOICES
from ..errors import NightbankError
from ..features.matrix import FeatureConfig
from ..nights.night import MovementTimePolicy

__all__ = [
    "CHOICE_POLICIES",
    "DEFAULT_SHRINKAGE_GRID",
    "InvalidTrainingConfigError",
    "POOLED_PARAMS",
    "TrainingConfig",
    "TrainingDataError",
]

#: Metrics a participant's method choice can be based on (all "higher is better").
CHOICE_POLICIES: tuple[str, ...] = ("balanced_accuracy", "kappa", "auc")
#: Fixed hyperparameters of the pooled model (documented in :mod:`models.learning.pooled`).
POOLED_PARAMS: Mapping[str, float] = MappingProxyType({
    "max_depth": 6, "learning_rate": 0.1, "min_child_weight": 5.0, "subsample": 0.8,
    "colsample_bytree": 0.7, "reg_lambda": 1.0, "reg_alpha": 0.0, "class_balance": 0.5,
})
#: Candidate offset penalties (precision of the offset prior, in units of per-epoch log-likelihood;
#: see :mod:`models.learning.offset`).
DEFAULT_SHRINKAGE_GRID: tuple[float, ...] = tuple(float(v) for v in np.geomspace(0.1, 1e5, 19))


class InvalidTrainingConfigError(NightbankError):
    """A :class:`TrainingConfig` value is out of range."""

    code = "invalid_training_config"


class TrainingDataError(NightbankError):
    """The nights cannot be used for training (too few labelled nights, mixed epoch lengths, ...)."""

    code = "training_data"


@dataclass(frozen=True)
class TrainingConfig:
    """Settings of personal and pooled training (every default documented).

    Parameters
    ----------
    n_trials : int, default=30
        Optuna trials per tuning study (one study per outer held-out night, plus one for the
        final model).
    min_personal_nights : int, default=3
        Labelled nights a participant needs for a personal model (at least 3, so that every
        outer fold keeps two nights for its forward-chained inner split).
    seed : int, default=0
        Seed of every random choice (Optuna sampler, XGBoost row/column sampling, validation
        participants of the pooled model).
    n_jobs : int, default=1
        Worker threads: tuning studies, night features and pooled fits run side by side, each
        XGBoost fit single-threaded (on a shared machine, several OpenMP threads per fit wait on
        each other far more than they gain). Results do not depend on it.
    pooled_folds : int, default=5
        k of the leave-participants-out evaluation (GroupKFold over participants; fewer when
        there are fewer participants).
    min_sensitivity : float, default=0.92
        Floor on the validation sensitivity (sleep detection) of the decision threshold, which
        otherwise maximises balanced accuracy (Youden's J). Sleep-parameter work expects sleep
        detection around 0.9 or above (published actigraphy ranges 0.90-0.98); a floor slightly
        above 0.9 keeps the held-out figure there. 0 gives plain Youden's J.
    choice_policy : {"balanced_accuracy", "kappa", "auc"}, default="balanced_accuracy"
        Held-out metric that decides between a participant's personal, pooled and pooled+offset
        models; ties go to the simpler model (pooled, then pooled+offset;
        :mod:`models.learning.method_choice`).
    features : FeatureConfig, default=FeatureConfig()
        Feature set of every model.
    movement_time : {"wake", "sleep", "exclude"}, default="wake"
        How R&K movement-time reference epochs count when training and evaluating.
    max_rounds : int, default=400
        Upper bound on boosting rounds; early stopping picks the number.
    early_stopping_rounds : int, default=10
        Rounds without validation improvement that stop a fit.
    max_bin : int, default=32
        XGBoost histogram bins per feature (``tree_method="hist"``).
    pruning_startup_trials : int, default=5
        Trials completed before Optuna's median pruner may stop a trial.
    pruning_warmup_splits : int, default=0
        Inner splits a trial always completes before it may be pruned.
    pooled_params : mapping, default=POOLED_PARAMS
        Fixed hyperparameters of the pooled model.
    pooled_validation_share : float, default=0.2
        Share of training participants held back for early stopping and the threshold.
    pooled_max_rows : int, default=150_000
        Largest number of epochs one pooled fit trains on; above it, a uniform random sample of
        the fit participants' epochs (neighbouring 30-s epochs are nearly duplicates, so a sample
        loses little). The validation participants' epochs are capped at half of it.
    shrinkage_grid : tuple of float, default=DEFAULT_SHRINKAGE_GRID
        Candidate offset penalties (see :mod:`models.learning.offset`).
    decoder : {"hmm", "threshold"}, default="hmm"
        How a model's calls are made from its calibrated probabilities
        (:func:`models.decoding.fitting.fit_night_decoding`): the sleep/wake chain with settings
        tuned on the validation nights, or Youden's threshold (under ``min_sensitivity``) on
        the calibrated validation predictions, epoch by epoch.
    calibration : {"isotonic", "platt", "none"}, default="isotonic"
        Calibration of the raw probabilities, fitted on validation predictions only.
    interval_level : float, default=0.9
        Level of the per-night parameter intervals of held-out nights, in (0, 1).
    interval_paths : int, default=200
        Posterior paths drawn per night for those intervals (>= 10).
    """

    n_trials: int = 30
    min_personal_nights: int = 3
    seed: int = 0
    n_jobs: int = 1
    pooled_folds: int = 5
    min_sensitivity: float = 0.92
    choice_policy: str = "balanced_accuracy"
    features: FeatureConfig = field(default_factory=FeatureConfig)
    movement_time: MovementTimePolicy = "wake"
    max_rounds: int = 400
    early_stopping_rounds: int = 10
    max_bin: int = 32
    pruning_startup_trials: int = 5
    pruning_warmup_splits: int = 0
    pooled_params: Mapping[str, float] = field(default_factory=lambda: dict(POOLED_PARAMS))
    pooled_validation_share: float = 0.2
    pooled_max_rows: int = 150_000
    shrinkage_grid: tuple[float, ...] = DEFAULT_SHRINKAGE_GRID
    decoder: str = "hmm"
    calibration: str = "isotonic"
    interval_level: float = 0.9
    interval_paths: int = 200

    def __post_init__(self) -> None:
        problems = []
        if self.n_trials < 1 or self.n_jobs < 1 or self.max_rounds < 1 or self.early_stopping_rounds < 1:
            problems.append("n_trials, n_jobs, max_rounds and early_stopping_rounds must be >= 1")
        if self.min_personal_nights < 3:
            problems.append(f"min_personal_nights must be >= 3, got {self.min_personal_nights}")
        if self.pooled_folds < 2:
            problems.append(f"pooled_folds must be >= 2, got {self.pooled_folds}")
        if not 0.0 <= self.min_sensitivity <= 1.0:
            problems.append(f"min_sensitivity must be in [0, 1], got {self.min_sensitivity}")
        if self.choice_policy not in CHOICE_POLICIES:
            problems.append(f"choice_policy must be one of {CHOICE_POLICIES}, got {self.choice_policy!r}")
        if self.movement_time not in ("wake", "sleep", "exclude"):
            problems.append(f"movement_time must be wake, sleep or exclude, got {self.movement_time!r}")
        if not 2 <= self.max_bin <= 1024:
            problems.append(f"max_bin must be in 2..1024, got {self.max_bin}")
        if not 0.0 < self.pooled_validation_share < 1.0:
            problems.append("pooled_validation_share must be in (0, 1)")
        if self.pooled_max_rows < 1000:
            problems.append(f"pooled_max_rows must be >= 1000, got {self.pooled_max_rows}")
        if self.decoder not in DECODER_CHOICES:
            problems.append(f"decoder must be one of {DECODER_CHOICES}, got {self.decoder!r}")
        if self.calibration not in CALIBRATION_CHOICES:
            problems.append(f"calibration must be one of {CALIBRATION_CHOICES}, got {self.calibration!r}")
        if not 0.0 < self.interval_level < 1.0:
            problems.append(f"interval_level must be in (0, 1), got {self.interval_level}")
        if self.interval_paths < 10:
            problems.append(f"interval_paths must be >= 10, got {self.interval_paths}")
        unknown = sorted(set(self.pooled_params) - set(POOLED_PARAMS))
        if unknown:
            problems.append(f"unknown pooled_params {unknown}; known: {sorted(POOLED_PARAMS)}")
        if problems:
            raise InvalidTrainingConfigError("; ".join(problems))

    def to_dict(self) -> dict[str, Any]:
        """JSON-able form (the feature configuration as its own dict)."""
        out = {name: getattr(self, name) for name in self.__dataclass_fields__}
        out["features"] = self.features.to_dict()
        out["pooled_params"] = dict(POOLED_PARAMS) | dict(self.pooled_params)
        out["shrinkage_grid"] = list(self.shrinkage_grid)
        return out
