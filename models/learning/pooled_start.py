"""Personal models that start from the pooled model: more boosting rounds on the participant's own nights.

A pooled-start model is the pooled booster (:mod:`models.learning.pooled`) boosted further on one
participant's labelled nights (``xgboost.train(..., xgb_model=pooled_booster)``). Its inputs are
the pooled model's: the night features plus the participant's label-free descriptors
(:func:`~models.learning.descriptors.participant_descriptors`), through the pooled model's
projection when it has one. With 0 added rounds it *is* the pooled model (same trees, same
margins, same threshold).

Settings searched (a small grid, :data:`START_GRID` x :data:`ADDED_ROUNDS`)
----------------------------------------------------------------------------
=====================  ============================  =========================================
name                   values                        meaning
=====================  ============================  =========================================
``added_rounds``       0, 5, 10, 20, 40, 80          trees added to the pooled ones (0 = pooled)
``learning_rate``      0.05, 0.15                    shrinkage of the added trees
``reg_lambda``         1, 20                         L2 penalty on their leaf weights
=====================  ============================  =========================================

The added trees are shallow (``max_depth`` 3, :data:`ADDED_TREE_PARAMS`) corrections; the other
settings (row/column sampling, ``class_balance``) are the pooled model's, with
``scale_pos_weight`` from the participant's training rows. One fit per grid cell and inner split
gives every round count at once (predictions over ``iteration_range``).

Inner loop: :class:`~models.learning.splits.ForwardChainedSplit` over the participant's night
groups in chronological order, as the from-scratch search (:mod:`models.learning.tuning`). A cell's
score is its mean inner validation balanced accuracy at the pooled model's threshold (the added
trees are fitted with the pooled class weighting, so its threshold keeps its meaning); the best
cell wins, ties going to fewer added rounds, so 0 (the pooled model) wins unless added rounds do
better on the participant's own later nights. Its mean inner AUC is also recorded.

Scratch or pooled start (:func:`prefer_scratch`): the from-scratch model
(:func:`~models.learning.tuning.tune_and_fit`) is run on the same inner splits and wins only if
its mean inner AUC beats the chosen pooled-start cell's by more than :data:`SCRATCH_MARGIN_AUC`
(its AUC is the best of an Optuna search, so a small lead is not trusted). The outer
leave-one-night-out evaluation of :func:`models.learning.personal.train_personal` runs this whole
procedure, the choice included, without the held-out night.

Which pooled model: the inner loop always boosts a pooled model that never saw the participant
(``PooledBase.held_out``), so its validation nights are new to the base as a held-out night is.
The model refitted on the training nights then continues ``PooledBase.held_out`` when it predicts
a held-out night of the participant, and ``PooledBase.final`` (the deployed pooled model) for the
final personal model.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import xgboost as xgb
from numpy.typing import NDArray
from sklearn.metrics import balanced_accuracy_score

from .classifier import SleepModel
from .config import TrainingConfig
from .rows import NightRows
from .splits import ForwardChainedSplit, fold_groups
from .tasks import Reporter
from .threshold import binary_auc

__all__ = ["ADDED_ROUNDS", "ADDED_TREE_PARAMS", "SCRATCH_MARGIN_AUC", "START_GRID", "PooledBase", "StartChoice",
           "continue_boosting", "prefer_scratch", "start_design", "tune_start"]

#: Added-round counts tried (0 = the pooled model itself).
ADDED_ROUNDS: tuple[int, ...] = (0, 5, 10, 20, 40, 80)
#: (learning_rate, reg_lambda) cells tried for the added trees.
START_GRID: tuple[tuple[float, float], ...] = ((0.05, 1.0), (0.05, 20.0), (0.15, 1.0), (0.15, 20.0))
#: Fixed settings of the added trees (common practice for small corrective trees).
ADDED_TREE_PARAMS: Mapping[str, float] = {"max_depth": 3, "min_child_weight": 5.0, "reg_alpha": 0.0}
#: Lead in mean inner AUC the from-scratch model needs over the chosen pooled start (common practice).
SCRATCH_MARGIN_AUC = 0.01


@dataclass(frozen=True, eq=False)
class PooledBase:
    """The pooled models a participant's personal model starts from.

    Attributes
    ----------
    final : SleepModel
        The deployed pooled model (the final personal model continues it).
    held_out : SleepModel
        A pooled model that never saw the participant (its fold model, or ``final`` when the final
        model never saw them either): the inner loop and the held-out nights continue it.
    descriptors : dict of str to float
        The participant's descriptors, the pooled models' extra inputs.
    """

    final: SleepModel
    held_out: SleepModel
    descriptors: dict[str, float] = field(repr=False)


@dataclass(frozen=True, eq=False)
class StartChoice:
    """The pooled-start setting chosen in an inner loop (:func:`tune_start`).

    Attributes
    ----------
    added_rounds : int
    learning_rate, reg_lambda : float
    balanced_accuracy : float
        Mean inner validation balanced accuracy of the chosen cell.
    auc : float
        Its mean inner validation AUC (NaN where a validation night holds one class only).
    base_balanced_accuracy : float
        The same figure of the pooled model itself (0 added rounds).
    n_inner_splits : int
    validation : tuple of (ndarray, ndarray), default=()
        Per inner split, the chosen cell's P(sleep) on the validation rows and their reference
        (each of shape (n_rows,)): what a calibration or decoder of this model may be fitted on.
    """

    added_rounds: int
    learning_rate: float
    reg_lambda: float
    balanced_accuracy: float
    auc: float
    base_balanced_accuracy: float
    n_inner_splits: int
    validation: tuple[tuple[NDArray[np.float64], NDArray[np.float64]], ...] = field(default=(), repr=False)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able form."""
        return {"added_rounds": self.added_rounds, "learning_rate": self.learning_rate,
                "reg_lambda": self.reg_lambda, "balanced_accuracy": self.balanced_accuracy, "auc": self.auc,
                "base_balanced_accuracy": self.base_balanced_accuracy, "n_inner_splits": self.n_inner_splits}


def start_design(base: SleepModel, nights: Sequence[NightRows],
                 descriptors: Mapping[str, float]) -> tuple[NDArray[np.float32], NDArray[np.float64], NDArray[np.intp]]:
    """Trainable rows of ``nights`` as the pooled model sees them, in chronological order.

    Parameters
    ----------
    base : SleepModel
        The pooled model (its feature set, descriptor columns and projection).
    nights : sequence of NightRows
        One participant's labelled nights.
    descriptors : mapping of str to float
        The participant's descriptors.

    Returns
    -------
    Z : ndarray of float32, shape (n_rows, n_inputs)
        Design-matrix rows after the pooled model's projection (if any).
    y : ndarray of float64, shape (n_rows,)
        Reference, 1 = sleep.
    groups : ndarray of int, shape (n_rows,)
        Night group of each row (:func:`~models.learning.splits.fold_groups`), numbered chronologically.
    """
    order = sorted(range(len(nights)), key=lambda i: nights[i].night.start)
    rank = fold_groups([nights[i].night for i in order])
    X = np.vstack([base.design_matrix(nights[i].features, descriptors)[nights[i].rows] for i in order])
    y = np.concatenate([nights[i].reference[nights[i].rows] for i in order])  # type: ignore[index]
    groups = np.concatenate([np.full(nights[i].rows.size, rank[k]) for k, i in enumerate(order)])
    Z = X if base.projection_ is None else base.projection_.transform(X)
    return np.ascontiguousarray(Z, dtype=np.float32), y.astype(np.float64), groups


def _params(base: SleepModel, y: NDArray[np.float64], *, learning_rate: float, reg_lambda: float,
            config: TrainingConfig, seed: int) -> dict[str, Any]:
    n_sleep, n_wake = float(np.sum(y == 1)), float(np.sum(y == 0))
    ratio = n_wake / n_sleep if n_sleep > 0 and n_wake > 0 else 1.0
    return {"objective": "binary:logistic", "tree_method": "hist", "max_bin": config.max_bin, "nthread": 1,
            "seed": seed, "eta": float(learning_rate), "lambda": float(reg_lambda),
            "max_depth": int(ADDED_TREE_PARAMS["max_depth"]),
            "min_child_weight": float(ADDED_TREE_PARAMS["min_child_weight"]),
            "alpha": float(ADDED_TREE_PARAMS["reg_alpha"]),
            "subsample": float(base.params_.get("subsample", 0.8)),
            "colsample_bytree": float(base.params_.get("colsample_bytree", 0.7)),
            "scale_pos_weight": ratio ** float(base.params_.get("class_balance", 0.5))}


def continue_boosting(base: SleepModel, Z: NDArray[np.float32], y: NDArray[np.float64], *, added_rounds: int,
                      learning_rate: float, reg_lambda: float, config: TrainingConfig, seed: int,
                      sample_weight: NDArray[np.float64] | None = None) -> xgb.Booster:
    """The pooled booster with ``added_rounds`` more trees fitted on rows ``Z``, ``y``.

    Parameters
    ----------
    base : SleepModel
        The pooled model; its booster is not changed (XGBoost trains a copy).
    Z : ndarray of float32, shape (n_rows, n_inputs)
        From :func:`start_design`.
    y : ndarray of float64, shape (n_rows,)
    added_rounds : int
        0 returns a copy of the pooled booster (identical margins).
    learning_rate, reg_lambda : float
    config : TrainingConfig
        ``max_bin``.
    seed : int
    sample_weight : ndarray of float64, shape (n_rows,), default=None
        Per-row weights (a PSG night's rows weigh 1, a reviewed correction's less); None = all 1.

    Returns
    -------
    xgboost.Booster
        ``base.n_rounds_ + added_rounds`` trees.
    """
    start = base.booster_[:base.n_rounds_]
    if added_rounds == 0:
        return start
    params = _params(base, y, learning_rate=learning_rate, reg_lambda=reg_lambda, config=config, seed=seed)
    return xgb.train(params, xgb.DMatrix(Z, y, weight=sample_weight, nthread=1), added_rounds, xgb_model=start)


def _mean(values: Sequence[float]) -> float:
    finite = [v for v in values if np.isfinite(v)]
    return float(np.mean(finite)) if finite else float("nan")


def tune_start(nights: Sequence[NightRows], base: SleepModel, descriptors: Mapping[str, float], *,
               config: TrainingConfig, seed: int, reporter: Reporter | None = None) -> StartChoice:
    """Choose added rounds, learning rate and L2 penalty on forward-chained inner splits of ``nights``.

    Parameters
    ----------
    nights : sequence of NightRows
        The participant's training nights (at least two night groups).
    base : SleepModel
        A pooled model that never saw the participant.
    descriptors : mapping of str to float
    config : TrainingConfig
    seed : int
    reporter : Reporter, default=None
        Checked between fits (cancellation).

    Returns
    -------
    StartChoice
        See the module docstring for the rule.
    """
    Z, y, groups = start_design(base, nights, descriptors)
    splits = list(ForwardChainedSplit().split(Z, y, groups))
    n_base = base.n_rounds_
    top = max(ADDED_ROUNDS)
    ba: dict[tuple[float, float, int], list[float]] = {}
    auc: dict[tuple[float, float, int], list[float]] = {}
    kept: dict[tuple[float, float, int], list[tuple[NDArray[np.float64], NDArray[np.float64]]]] = {}
    for train, val in splits:
        y_val = y[val]
        for lr, lam in START_GRID:
            if reporter is not None:
                reporter.check()
            booster = continue_boosting(base, Z[train], y[train], added_rounds=top, learning_rate=lr,
                                        reg_lambda=lam, config=config, seed=seed)
            for r in ADDED_ROUNDS:
                p = booster.inplace_predict(Z[val], iteration_range=(0, n_base + r))
                p = np.asarray(p, dtype=np.float64)
                ba.setdefault((lr, lam, r), []).append(
                    float(balanced_accuracy_score(y_val, p >= base.threshold_)) if np.unique(y_val).size == 2
                    else float(np.mean((p >= base.threshold_) == y_val)))
                auc.setdefault((lr, lam, r), []).append(binary_auc(y_val, p))
                kept.setdefault((lr, lam, r), []).append((p, y_val))
    scores = {key: _mean(v) for key, v in ba.items()}
    # best mean balanced accuracy; ties to fewer added rounds, then the grid's order
    order = {cell: i for i, cell in enumerate(START_GRID)}
    best = max(scores, key=lambda k: (scores[k], -k[2], -order[(k[0], k[1])]))
    lr, lam, r = best
    base_key = (START_GRID[0][0], START_GRID[0][1], 0)
    return StartChoice(added_rounds=r, learning_rate=lr, reg_lambda=lam, balanced_accuracy=scores[best],
                       auc=_mean(auc[best]), base_balanced_accuracy=scores[base_key], n_inner_splits=len(splits),
                       validation=tuple(kept[best]))


def prefer_scratch(scratch_auc: float, start: StartChoice) -> bool:
    """Whether the from-scratch model wins: its mean inner AUC leads by more than :data:`SCRATCH_MARGIN_AUC`.

    Examples
    --------
    >>> s = StartChoice(0, 0.05, 1.0, 0.9, 0.95, 0.9, 2)
    >>> prefer_scratch(0.955, s), prefer_scratch(0.97, s)
    (False, True)
    """
    if not np.isfinite(scratch_auc):
        return False
    return not np.isfinite(start.auc) or scratch_auc > start.auc + SCRATCH_MARGIN_AUC
