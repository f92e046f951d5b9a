"""Shared pieces of model training: the configuration, labelled rows, held-out predictions and
participant descriptors.

The estimators themselves live in :mod:`models.learning.personal` (one participant's nights),
:mod:`models.learning.pooled` (every participant, with offsets from :mod:`models.learning.offset`) and
:mod:`models.learning.study_comparison` (models side by side with the classical rules). Hyperparameter search
is in :mod:`models.learning.tuning`; the fitted model in :mod:`models.learning.classifier`; threads and progress
in :mod:`models.learning.tasks`.

Training rows are the in-bed epochs (``night.in_bed``) whose reference is scored; features are
always computed on the whole night first and then sliced, so a window near lights-off still sees
the epochs before it.

Errors::

    NightbankError
    ├── InvalidTrainingConfigError   a TrainingConfig field is out of range
    └── TrainingDataError            nights unusable for training (too few, mixed epoch lengths)
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

import numpy as np
import pandas as pd
from joblib import Parallel, delayed
from numpy.typing import NDArray

from ..errors import NightbankError
from ..features.cache import FeatureCache
from ..features.matrix import FeatureConfig, FeatureMatrix, compute_features
from ..agreement.epoch_metrics import EPOCH_METRIC_NAMES, epoch_agreement
from ..nights.night import MovementTimePolicy, Night
from .offset import DEFAULT_SHRINKAGE_GRID

__all__ = [
    "CHOICE_POLICIES",
    "DESCRIPTOR_NAMES",
    "HeldOutNight",
    "InvalidTrainingConfigError",
    "POOLED_PARAMS",
    "TrainingConfig",
    "TrainingDataError",
    "participant_descriptors",
]

#: Metrics a participant's method choice can be based on (all "higher is better").
CHOICE_POLICIES: tuple[str, ...] = ("balanced_accuracy", "kappa", "auc")
#: Names of :func:`participant_descriptors`, in column order.
DESCRIPTOR_NAMES: tuple[str, ...] = ("participant_moving_counts_median", "participant_counts_q90",
                                     "participant_moving_share")
#: Fixed hyperparameters of the pooled model (documented in :mod:`models.learning.pooled`).
POOLED_PARAMS: Mapping[str, float] = MappingProxyType({
    "max_depth": 6, "learning_rate": 0.1, "min_child_weight": 5.0, "subsample": 0.8,
    "colsample_bytree": 0.7, "reg_lambda": 1.0, "reg_alpha": 0.0, "class_balance": 0.5,
})

#: In-memory feature cache shared by training and prediction in this process (256 MB LRU).
DEFAULT_FEATURE_CACHE = FeatureCache()


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
        Held-out metric that decides between a participant's personal and pooled model; ties
        go to pooled (the simpler model).
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


@dataclass(frozen=True, eq=False)
class HeldOutNight:
    """Predictions for one night from a model that never saw it (or its participant).

    Attributes
    ----------
    participant_id : str
    night_hash : str
        ``Night.content_hash``.
    label : str or None
        The lab's id for the night.
    method : str
        ``"personal"``, ``"pooled"`` or ``"pooled+offset"``.
    p_sleep : ndarray of float64, shape (n_epochs,)
        Probability of sleep for every epoch of the night.
    sleep : ndarray of int8, shape (n_epochs,)
        Calls (1 = sleep) at the model's threshold.
    reference : ndarray of float64, shape (n_epochs,) or None
        1 = sleep, 0 = wake, NaN = unscored; None for an unlabelled night.
    in_bed : tuple of int
        ``(first, stop)`` in-bed epoch indices.
    threshold : float
        Probability threshold used for the calls.
    offset : float, default=0.0
        Log-odds offset applied (pooled+offset only).
    margin : ndarray of float64, shape (n_epochs,) or None
        Log-odds of sleep before the offset (pooled models; used to estimate offsets).
    """

    participant_id: str
    night_hash: str
    label: str | None
    method: str
    p_sleep: NDArray[np.float64] = field(repr=False)
    sleep: NDArray[np.int8] = field(repr=False)
    reference: NDArray[np.float64] | None = field(repr=False)
    in_bed: tuple[int, int]
    threshold: float
    offset: float = 0.0
    margin: NDArray[np.float64] | None = field(default=None, repr=False)

    @property
    def night_id(self) -> str:
        """``label`` if set, else the first 12 hex digits of the content hash."""
        return self.label or self.night_hash[:12]

    def agreement(self) -> dict[str, float]:
        """Epoch-by-epoch metrics over the in-bed epochs (:func:`models.agreement.epoch_metrics.epoch_agreement`)."""
        if self.reference is None:
            raise TrainingDataError(f"night {self.night_id} has no reference", code="no_reference")
        bed = slice(*self.in_bed)
        return epoch_agreement(self.reference[bed], self.sleep[bed], score=self.p_sleep[bed])


def night_metrics_table(held_out: Sequence[HeldOutNight]) -> pd.DataFrame:
    """One row per labelled held-out night: ids, ``n_epochs`` and :data:`EPOCH_METRIC_NAMES`."""
    rows = [{"participant_id": h.participant_id, "night_id": h.night_id, "night_hash": h.night_hash,
             "method": h.method, "threshold": h.threshold, "offset": h.offset} | h.agreement()
            for h in held_out if h.reference is not None]
    return pd.DataFrame(rows, columns=["participant_id", "night_id", "night_hash", "method", "threshold", "offset",
                                       "n_epochs", "excluded_epochs", *EPOCH_METRIC_NAMES])


def summary_table(night_metrics: pd.DataFrame) -> pd.DataFrame:
    """Mean and SD (ddof=1) across nights of every epoch metric; index = metric name."""
    values = night_metrics[list(EPOCH_METRIC_NAMES)].astype(np.float64)
    return pd.DataFrame({"mean": values.mean(), "sd": values.std(ddof=1), "n_nights": values.count()})


def participant_descriptors(nights: Sequence[Night]) -> dict[str, float]:
    """Label-free movement descriptors of a participant, over the in-bed epochs of all nights.

    Parameters
    ----------
    nights : sequence of Night
        All of the participant's nights, labelled or not (labels are never read).

    Returns
    -------
    descriptors : dict of str to float
        ``participant_moving_counts_median``: median counts of in-bed epochs with counts > 0
        (device gain and movement size; 0 without any); ``participant_counts_q90``: 90th
        percentile of in-bed counts; ``participant_moving_share``: share of in-bed epochs with
        counts > 0. Missing (NaN) epochs are left out; all NaN without any observed epoch.

    Examples
    --------
    >>> import pandas as pd
    >>> n = Night("p", pd.Timestamp("2031-01-01 22:00", tz="UTC"), 30, [0, 0, 4, 10, 0])
    >>> participant_descriptors([n])["participant_moving_share"]
    0.4
    """
    parts = [n.counts[slice(*n.in_bed)] for n in nights]
    counts = np.concatenate(parts) if parts else np.zeros(0)
    counts = counts[~np.isnan(counts)]
    if counts.size == 0:
        return dict.fromkeys(DESCRIPTOR_NAMES, float("nan"))
    moving = counts[counts > 0]
    return {
        "participant_moving_counts_median": float(np.median(moving)) if moving.size else 0.0,
        "participant_counts_q90": float(np.percentile(counts, 90)),
        "participant_moving_share": float(moving.size / counts.size),
    }


def _compute(night: Night, config: FeatureConfig) -> FeatureMatrix:
    first, stop = night.in_bed
    return compute_features(night.counts, night.epoch_seconds, config=config, lights_off_epoch=first,
                            lights_on_epoch=stop)


def night_features(night: Night, config: FeatureConfig, *, cache: FeatureCache | None = None) -> FeatureMatrix:
    """Features of the whole night (lights indices from ``night.in_bed``), through a cache.

    Parameters
    ----------
    night : Night
    config : FeatureConfig
    cache : FeatureCache, default=None
        None uses :data:`DEFAULT_FEATURE_CACHE`, shared by every training call in the process.

    Returns
    -------
    FeatureMatrix
        Shape (n_epochs, n_features).
    """
    store = DEFAULT_FEATURE_CACHE if cache is None else cache
    return store.get_or_compute(night.content_hash, config.version_for(night.epoch_seconds), lambda: _compute(night, config))


def iter_night_features(nights: Sequence[Night], config: FeatureConfig, *, cache: FeatureCache | None = None,
                        n_jobs: int = 1) -> Iterator[FeatureMatrix]:
    """Features of each night, in order; cache misses computed on ``n_jobs`` processes.

    Feature code is numpy on short arrays and holds the GIL most of the time, so threads do not
    speed it up; with ``n_jobs > 1`` and several misses, joblib worker processes compute them.
    Every computed matrix is stored in the cache.
    """
    store = DEFAULT_FEATURE_CACHE if cache is None else cache
    found = [store.get(n.content_hash, config.version_for(n.epoch_seconds)) for n in nights]
    missing = [n for n, f in zip(nights, found, strict=True) if f is None]
    if n_jobs > 1 and len(missing) > 1:
        computed: Iterator[FeatureMatrix] = iter(Parallel(n_jobs=n_jobs, return_as="generator")(
            delayed(_compute)(n, config) for n in missing))
    else:
        computed = (_compute(n, config) for n in missing)
    for night, features in zip(nights, found, strict=True):
        if features is None:
            features = next(computed)
            store.put(night.content_hash, features.version, features)
        yield features


@dataclass(frozen=True, eq=False)
class NightRows:
    """A night ready for training: features, reference and the rows that may be trained on.

    Attributes
    ----------
    night : Night
    features : FeatureMatrix
        Whole-night features, shape (n_epochs, n_features).
    reference : ndarray of float64, shape (n_epochs,) or None
        1 sleep, 0 wake, NaN unscored.
    rows : ndarray of int
        In-bed epochs with a scored reference (empty for an unlabelled night).
    """

    night: Night
    features: FeatureMatrix
    reference: NDArray[np.float64] | None
    rows: NDArray[np.intp]

    @property
    def labelled(self) -> bool:
        return self.rows.size > 0


def labelled_nights(nights: Sequence[Night], config: TrainingConfig) -> list[Night]:
    """Nights with at least one scored in-bed reference epoch, in chronological order."""
    out = []
    for night in nights:
        ref = night.reference_sleep(movement_time=config.movement_time)
        if ref is not None and not np.isnan(ref[slice(*night.in_bed)]).all():
            out.append(night)
    return sorted(out, key=lambda n: n.start)


def iter_prepared(nights: Sequence[Night], config: TrainingConfig, *, cache: FeatureCache | None = None,
                  n_jobs: int = 1) -> Iterator[NightRows]:
    """Features (through ``cache``) and training rows of each night, in the given order.

    Raises
    ------
    TrainingDataError
        If the nights mix epoch lengths (the feature set depends on the epoch length).
    """
    lengths = sorted({n.epoch_seconds for n in nights})
    if len(lengths) > 1:
        raise TrainingDataError(f"nights mix epoch lengths {lengths} s; aggregate them to one length first",
                                code="mixed_epoch_lengths")
    features_of = iter_night_features(nights, config.features, cache=cache, n_jobs=n_jobs)
    for night, features in zip(nights, features_of, strict=True):
        ref = night.reference_sleep(movement_time=config.movement_time)
        first, stop = night.in_bed
        rows = np.zeros(0, dtype=np.intp) if ref is None else first + np.flatnonzero(~np.isnan(ref[first:stop]))
        yield NightRows(night=night, features=features, reference=ref, rows=rows)


def prepare_nights(nights: Sequence[Night], config: TrainingConfig, *,
                   cache: FeatureCache | None = None) -> list[NightRows]:
    """:func:`iter_prepared` as a list, features computed in this process."""
    return list(iter_prepared(nights, config, cache=cache))


def study_seed(seed: int, *keys: int) -> int:
    """A 32-bit seed derived from ``seed`` and integer keys (numpy SeedSequence)."""
    return int(np.random.SeedSequence([int(seed), *keys]).generate_state(1)[0])
