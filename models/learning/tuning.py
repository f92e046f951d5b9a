"""Hyperparameter search for one training set of nights: Optuna over forward-chained inner splits.

Search space (``suggest_hyperparameters``)
------------------------------------------
=====================  =====================================  ==========================================
name                   range                                  meaning
=====================  =====================================  ==========================================
``max_depth``          2 .. 7 (int)                           tree depth
``learning_rate``      0.05 .. 0.3 (log)                      shrinkage per round
``min_child_weight``   0.5 .. 50 (log)                        minimum hessian sum in a leaf
``subsample``          0.5 .. 1                               rows sampled per tree
``colsample_bytree``   0.3 .. 1                               features sampled per tree
``reg_lambda``         1e-3 .. 10 (log)                       L2 penalty on leaf weights
``reg_alpha``          1e-3 .. 10 (log)                       L1 penalty on leaf weights
``class_balance``      0 .. 1                                 ``scale_pos_weight = (n_wake / n_sleep) **
                                                              class_balance`` on the training rows: 0 =
                                                              unweighted, 1 = classes weighted equally
                                                              (sleep is the positive, majority class)
``pca_variance``       off, 0.90, 0.95, 0.99                  standardise + PCA keeping that share of
                                                              variance (fitted on each training split)
=====================  =====================================  ==========================================

The number of trees is not searched: each fit runs up to ``max_rounds`` with early stopping on
the split's validation night (``early_stopping_rounds`` without improvement of the training
objective there: log-loss with the same class weights as the training rows). The first trial is a
fixed, data-independent configuration (:data:`WARM_START`), so every study starts from a sensible
point; the sampler is seeded TPE. A trial reports its running mean validation AUC after every
inner split and Optuna's median pruner stops trials that fall below the median of earlier
trials at the same split (never before ``pruning_warmup_splits`` splits are done).

Inner splits are :class:`~models.learning.splits.ForwardChainedSplit` over the nights in chronological
order: train on the earliest nights, validate on the next. The unit is a night group
(:func:`~models.learning.splits.fold_groups`): nights overlapping in clock time are validated
together and never train a model validated on one of them. With two nights there is a single
split (train on the first, validate on the second): the trial score is that one AUC, pruning saves
nothing (a trial below the median is only marked pruned), and the threshold comes from that one
validation night.

After the search, the best trial's configuration is refitted on all the nights with
``n_rounds`` = mean best iteration over its inner splits, and the threshold maximises Youden's J
(= balanced accuracy) on its pooled inner validation predictions (scikit-learn ``roc_curve``)
among the thresholds whose validation sensitivity reaches ``min_sensitivity``.

The same inner validation predictions of the best trial, kept night by night (each night's in-bed
epochs, NaN where a row was not predicted), fit the model's decoding
(:func:`models.decoding.fitting.fit_night_decoding`: calibration ``config.calibration``, decoder
``config.decoder``, interval settings), with the sleep/wake chain counted from the labels of the
study's nights (the training nights of the model; never a held-out night).
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Hashable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import optuna
import xgboost as xgb
from numpy.typing import NDArray

from ..decoding.fitting import NightDecoding, fit_night_decoding
from ._boosting import boost_early_stopped
from .classifier import Projection
from .config import TrainingConfig
from .rows import NightRows
from .splits import ForwardChainedSplit, fold_groups
from .tasks import Reporter
from .threshold import binary_auc, youden_threshold

__all__ = ["PCA_CHOICES", "SplitMatrices", "TunedPipeline", "WARM_START", "booster_params",
           "suggest_hyperparameters", "tune_and_fit"]

#: PCA settings searched: 0.0 = off, else the share of variance kept.
PCA_CHOICES: tuple[float, ...] = (0.0, 0.90, 0.95, 0.99)
#: The first trial of every study (fixed, independent of any data).
WARM_START: Mapping[str, float] = {
    "max_depth": 4, "learning_rate": 0.1, "min_child_weight": 5.0, "subsample": 0.8, "colsample_bytree": 0.7,
    "reg_lambda": 1.0, "reg_alpha": 0.001, "class_balance": 0.5, "pca_variance": 0.0,
}


def suggest_hyperparameters(trial: optuna.Trial) -> dict[str, float]:
    """Draw one configuration from the search space (module docstring)."""
    return {
        "max_depth": trial.suggest_int("max_depth", 2, 7),
        "learning_rate": trial.suggest_float("learning_rate", 0.05, 0.3, log=True),
        "min_child_weight": trial.suggest_float("min_child_weight", 0.5, 50.0, log=True),
        "subsample": trial.suggest_float("subsample", 0.5, 1.0),
        "colsample_bytree": trial.suggest_float("colsample_bytree", 0.3, 1.0),
        "reg_lambda": trial.suggest_float("reg_lambda", 1e-3, 10.0, log=True),
        "reg_alpha": trial.suggest_float("reg_alpha", 1e-3, 10.0, log=True),
        "class_balance": trial.suggest_float("class_balance", 0.0, 1.0),
        "pca_variance": trial.suggest_categorical("pca_variance", PCA_CHOICES),
    }


def booster_params(hyperparameters: Mapping[str, float], *, y: NDArray[np.float64], config: TrainingConfig,
                   seed: int) -> dict[str, Any]:
    """XGBoost ``train`` parameters (single-threaded) for a configuration and training labels ``y``."""
    n_sleep = float(np.sum(y == 1))
    n_wake = float(np.sum(y == 0))
    ratio = n_wake / n_sleep if n_sleep > 0 and n_wake > 0 else 1.0
    hp = hyperparameters
    return {
        "objective": "binary:logistic", "tree_method": "hist", "max_bin": config.max_bin, "nthread": 1,
        "seed": seed, "eval_metric": "logloss", "max_depth": int(hp["max_depth"]), "eta": float(hp["learning_rate"]),
        "min_child_weight": float(hp["min_child_weight"]), "subsample": float(hp["subsample"]),
        "colsample_bytree": float(hp["colsample_bytree"]), "lambda": float(hp["reg_lambda"]),
        "alpha": float(hp["reg_alpha"]), "scale_pos_weight": ratio ** float(hp["class_balance"]),
    }


@dataclass(frozen=True, eq=False)
class TunedPipeline:
    """Result of :func:`tune_and_fit`: the fitted parts of one model and its search record.

    Attributes
    ----------
    booster : xgboost.Booster
    projection : Projection or None
    hyperparameters : dict
        The best configuration plus ``n_rounds`` and ``scale_pos_weight``.
    threshold : float
    n_rounds : int
    best_value : float
        Mean inner validation AUC of the best trial.
    trials : dict
        ``n_trials``, ``n_complete``, ``n_pruned``, ``best_trial``, ``best_value``.
    decoding : NightDecoding or None
        Fitted on the best trial's inner validation nights.
    """

    booster: xgb.Booster
    projection: Projection | None
    hyperparameters: dict[str, Any]
    threshold: float
    n_rounds: int
    best_value: float
    trials: dict[str, Any] = field(default_factory=dict)
    decoding: NightDecoding | None = None


class SplitMatrices:
    """XGBoost matrices of inner splits, shared by the studies of one training call.

    Studies over overlapping sets of nights meet the same inner splits: the final study's split
    "train on the first ``j`` nights" is also the split of every outer study holding out a later
    night. Such a split's matrices (and its PCA fit) are built once per worker thread and reused:
    the same rows give the same matrices, so results do not change. Each thread keeps its own
    (a validation matrix's weights are set before every fit, and XGBoost matrices are not shared
    between threads). Keys name the :class:`~models.learning.rows.NightRows` objects of the
    split, so a store is only valid while those objects live: make one per training call.
    """

    def __init__(self) -> None:
        self._local = threading.local()

    def get(self, key: Hashable, build: Callable[[], tuple[xgb.QuantileDMatrix, xgb.DMatrix]]
            ) -> tuple[xgb.QuantileDMatrix, xgb.DMatrix]:
        """The matrices stored under ``key`` in this thread, built by ``build()`` on first use."""
        store: dict[Hashable, tuple[xgb.QuantileDMatrix, xgb.DMatrix]] | None = getattr(self._local, "store", None)
        if store is None:
            store = self._local.store = {}
        if key not in store:
            store[key] = build()
        return store[key]


class _InnerData:
    """Stacked rows of a study's nights, its inner splits and cached XGBoost matrices."""

    def __init__(self, nights: Sequence[NightRows], config: TrainingConfig,
                 shared: SplitMatrices | None = None) -> None:
        order = sorted(range(len(nights)), key=lambda i: nights[i].night.start)
        self.X = np.vstack([nights[i].features.values[nights[i].rows] for i in order])
        self.y = np.concatenate([nights[i].reference[nights[i].rows] for i in order])  # type: ignore[index]
        # group numbers follow each group's first night in start order, so they sort chronologically
        rank = fold_groups([nights[i].night for i in order])
        groups = np.concatenate([np.full(nights[i].rows.size, rank[k]) for k, i in enumerate(order)])
        weights = np.concatenate([np.full(nights[i].rows.size, nights[i].weight) for i in order])
        self.w = None if np.all(weights == 1.0) else weights  # per-row sample weights (None: all 1)
        self.splits = list(ForwardChainedSplit().split(self.X, self.y, groups))
        self.nights = [nights[i] for i in order]
        self.night_of = np.concatenate([np.full(nights[i].rows.size, k) for k, i in enumerate(order)])
        self.epoch_of = np.concatenate([nights[i].rows for i in order])
        self.config = config
        self.shared = shared if shared is not None else SplitMatrices()

    def matrices(self, k: int, pca_variance: float) -> tuple[xgb.QuantileDMatrix, xgb.DMatrix]:
        """Training and validation matrices of split ``k`` (projected when PCA is on), built once."""
        train, val = self.splits[k]

        def build() -> tuple[xgb.QuantileDMatrix, xgb.DMatrix]:
            Xt, Xv = self.X[train], self.X[val]
            if pca_variance:
                projection = Projection.fit(Xt, variance=pca_variance)
                Xt, Xv = projection.transform(Xt), projection.transform(Xv)
            dtrain = xgb.QuantileDMatrix(Xt, self.y[train], max_bin=self.config.max_bin, nthread=1,
                                         weight=None if self.w is None else self.w[train])
            return dtrain, xgb.DMatrix(Xv, self.y[val], nthread=1)

        # the split's rows are its nights' rows in start order: the nights (and the weights' presence) name them
        key = (tuple(id(self.nights[i]) for i in np.unique(self.night_of[train])),
               tuple(id(self.nights[i]) for i in np.unique(self.night_of[val])), self.w is None,
               float(pca_variance), self.config.max_bin)
        return self.shared.get(key, build)


def _in_bed(r: NightRows, idx: NDArray[np.intp], values: NDArray[np.float64]) -> NDArray[np.float64]:
    """A night's in-bed epochs with ``values`` at epochs ``idx`` and NaN elsewhere."""
    first, stop = r.night.in_bed
    out = np.full(stop - first, np.nan)
    out[idx - first] = values
    return out


def _decoding(data: _InnerData, val_rows: list[NDArray[np.intp]], val_p: list[NDArray[np.float64]],
              config: TrainingConfig, seed: int) -> NightDecoding:
    """The decoding fitted on the inner validation nights, night by night (in-bed epochs)."""
    idx, p = np.concatenate(val_rows), np.concatenate(val_p)
    ps, ys = [], []
    for k in np.unique(data.night_of[idx]):
        mine = data.night_of[idx] == k
        r = data.nights[int(k)]
        ps.append(_in_bed(r, data.epoch_of[idx][mine], p[mine]))
        ys.append(_in_bed(r, data.epoch_of[idx][mine], data.y[idx][mine]))
    train = [_in_bed(r, r.rows, r.reference[r.rows]) for r in data.nights]  # type: ignore[index]
    return fit_night_decoding(ps, ys, train, epoch_seconds=data.nights[0].night.epoch_seconds,
                              decoder=config.decoder, calibration=config.calibration, seed=seed,
                              min_sensitivity=config.min_sensitivity)


def tune_and_fit(nights: Sequence[NightRows], *, config: TrainingConfig, seed: int, reporter: Reporter,
                 stage: str, matrices: SplitMatrices | None = None) -> TunedPipeline:
    """Search hyperparameters on forward-chained splits of ``nights``, then refit on all of them.

    Parameters
    ----------
    nights : sequence of NightRows
        Labelled nights (at least two); their order does not matter (sorted by start time).
    config : TrainingConfig
    seed : int
        Seed of the TPE sampler and of XGBoost's sampling.
    reporter : Reporter
        Receives one tick per finished trial and one for the refit.
    stage : str
        Label of the ticks (shown by progress bars).
    matrices : SplitMatrices, default=None
        Inner-split matrices shared with other studies of the same training call (the same
        ``NightRows`` objects); None = this study's own.

    Returns
    -------
    TunedPipeline
    """
    data = _InnerData(nights, config, matrices)
    inner: dict[int, tuple[list[NDArray[np.intp]], list[NDArray[np.float64]], list[int]]] = {}

    def objective(trial: optuna.Trial) -> float:
        reporter.check()
        hp = suggest_hyperparameters(trial)
        aucs: list[float] = []
        vals, ps, rounds = [], [], []
        for k, (train, val) in enumerate(data.splits):
            dtrain, dval = data.matrices(k, hp["pca_variance"])
            params = booster_params(hp, y=data.y[train], config=config, seed=seed)
            y_val = data.y[val]
            dval.set_weight(np.where(y_val == 1, params["scale_pos_weight"], 1.0) * (1.0 if data.w is None
                                                                                    else data.w[val]))
            booster, best = boost_early_stopped(params, dtrain, dval, max_rounds=config.max_rounds,
                                                early_stopping_rounds=config.early_stopping_rounds)
            n = best + 1
            p = booster.predict(dval, iteration_range=(0, n))
            aucs.append(binary_auc(y_val, p))
            vals.append(val)
            ps.append(p.astype(np.float64))
            rounds.append(n)
            running = float(np.nanmean(aucs)) if np.isfinite(aucs).any() else 0.5
            trial.report(running, k)
            if trial.should_prune():
                raise optuna.TrialPruned()
        inner[trial.number] = (vals, ps, rounds)
        return float(np.nanmean(aucs)) if np.isfinite(aucs).any() else 0.5

    optuna.logging.set_verbosity(optuna.logging.ERROR)  # errors propagate; trial logs are noise
    study = optuna.create_study(
        direction="maximize", sampler=optuna.samplers.TPESampler(seed=seed),
        pruner=optuna.pruners.MedianPruner(n_startup_trials=config.pruning_startup_trials,
                                           n_warmup_steps=config.pruning_warmup_splits))
    study.enqueue_trial(dict(WARM_START))
    study.optimize(objective, n_trials=config.n_trials, callbacks=[lambda s, t: reporter.tick(stage)])
    best = study.best_trial
    val_rows, val_p, rounds = inner[best.number]
    y_inner, p_inner = data.y[np.concatenate(val_rows)], np.concatenate(val_p)
    n_rounds = max(1, int(round(float(np.mean(rounds)))))
    hp = dict(best.params)
    projection = Projection.fit(data.X, variance=hp["pca_variance"]) if hp["pca_variance"] else None
    X_all = data.X if projection is None else projection.transform(data.X)
    params = booster_params(hp, y=data.y, config=config, seed=seed)
    booster = xgb.train(params, xgb.QuantileDMatrix(X_all, data.y, max_bin=config.max_bin, nthread=1,
                                                    weight=data.w), n_rounds)
    reporter.tick(stage)
    best_value = float("nan") if best.value is None else float(best.value)
    states = [t.state for t in study.trials]
    trials = {"n_trials": len(states), "n_complete": states.count(optuna.trial.TrialState.COMPLETE),
              "n_pruned": states.count(optuna.trial.TrialState.PRUNED), "best_trial": best.number,
              "best_value": best_value, "n_inner_splits": len(data.splits)}
    hyperparameters = hp | {"n_rounds": n_rounds, "scale_pos_weight": params["scale_pos_weight"]}
    return TunedPipeline(booster=booster, projection=projection, hyperparameters=hyperparameters,
                         threshold=youden_threshold(y_inner, p_inner, min_sensitivity=config.min_sensitivity),
                         n_rounds=n_rounds, best_value=best_value, trials=trials,
                         decoding=_decoding(data, val_rows, val_p, config, seed))
