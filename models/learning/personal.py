"""Personal model: one participant's labelled nights, nested evaluation, final model.

Nested validation, so that nothing about a held-out night reaches its prediction:

- outer loop, leave-one-night-out (``SPLITTERS["leave-one-night-out"]``: scikit-learn's
  ``LeaveOneGroupOut``) over *night groups* (:func:`models.learning.splits.fold_groups`: nights
  overlapping in clock time, such as a shifted copy of a night, are one group): each group of
  labelled nights is held out once, in chronological order; a full search
  (:func:`models.learning.tuning.tune_and_fit`: forward-chained inner splits over whole
  groups, early stopping, threshold) runs on the nights of the *other* groups and its refitted
  model predicts every night of the held-out group;
- final model: the same search on all labelled nights, refitted on all of them.

Given a :class:`~models.learning.pooled_start.PooledBase` (``base``), every study (outer fold
and final) also tunes a *pooled-start* model (:func:`~models.learning.pooled_start.tune_start`:
the pooled booster boosted further on the study's nights, settings chosen on the same
forward-chained inner splits, always starting from ``base.held_out``, a pooled model that never
saw the participant) and keeps the from-scratch model only if it wins by the rule of
:func:`~models.learning.pooled_start.prefer_scratch`. The outer held-out night is then predicted
by the chosen model refitted on the other nights (pooled start: continuing ``base.held_out``);
the final model continues ``base.final``, the deployed pooled model, with the settings chosen
with ``base.held_out``. ``info_["start"]`` says which one (``"pooled"`` or ``"scratch"``) and
``info_["added_rounds"]`` how many trees were fitted on the participant's nights (0 = the pooled
model itself; a from-scratch model's number of trees). Without ``base`` every model starts from
scratch, as before.

With ``n`` groups of labelled nights (``n`` nights when none overlap) that is ``n + 1``
independent studies; they run on ``n_jobs`` threads, each seeded from ``config.seed`` and its
position, so results do not depend on ``n_jobs``. ``config.min_personal_nights`` counts
groups: copies of a night are not independent nights.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ..decoding.fitting import NightDecoding, fit_night_decoding
from ..features.source import FeatureSource
from ..nights.night import Night
from .artifacts import library_versions
from .classifier import SleepModel
from .config import TrainingConfig, TrainingDataError
from .held_out import HeldOutNight, night_metrics_table, summary_table
from .pooled_start import PooledBase, StartChoice, continue_boosting, prefer_scratch, start_design, tune_start
from .rows import NightRows, corrected_rows, labelled_nights, prepare_nights, study_seed
from .splits import SPLITTERS, fold_groups
from .tasks import Progress, Reporter, run_tasks
from .tuning import SplitMatrices, TunedPipeline, tune_and_fit

__all__ = ["PersonalResult", "personal_studies", "train_personal"]


@dataclass(frozen=True, eq=False)
class PersonalResult:
    """Result of :func:`train_personal`.

    Attributes
    ----------
    model : SleepModel
        Final model, trained on every labelled night.
    outer : list of HeldOutNight
        One per labelled night (chronological), predicted by a model tuned and trained without
        it and without every night of its group (its overlapping copies).
    night_metrics : pandas.DataFrame
        Epoch-by-epoch metrics of each held-out night (in-bed epochs).
    summary : pandas.DataFrame
        Mean and SD across held-out nights per metric.
    best_params : dict
        Hyperparameters of the final model.
    trials : pandas.DataFrame
        One row per study (``study`` = held-out night id, the ids of a group joined by ``"+"``,
        or ``"final"``): trial counts, best inner AUC, threshold, number of trees and chosen
        hyperparameters.
    """

    model: SleepModel
    outer: list[HeldOutNight] = field(repr=False)
    night_metrics: pd.DataFrame = field(repr=False)
    summary: pd.DataFrame = field(repr=False)
    best_params: dict[str, Any] = field(repr=False)
    trials: pd.DataFrame = field(repr=False)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able summary (tables as lists of records; no per-epoch arrays)."""
        return {
            "participant_id": self.model.participant_id_,
            "threshold": self.model.threshold_,
            "start": self.model.info_.get("start", "scratch"),
            "added_rounds": self.model.info_.get("added_rounds"),
            "best_params": self.best_params,
            "summary": self.summary.reset_index(names="metric").to_dict(orient="records"),
            "night_metrics": self.night_metrics.to_dict(orient="records"),
            "trials": self.trials.to_dict(orient="records"),
        }


def _model(pipe: TunedPipeline, nights: Sequence[NightRows], config: TrainingConfig, seed: int,
           start: StartChoice | None = None) -> SleepModel:
    features = nights[0].features
    info: dict[str, Any] = {"seed": seed, "inner_auc": pipe.best_value, "tuning": pipe.trials,
                            "libraries": library_versions(), "start": "scratch", "added_rounds": pipe.n_rounds}
    if start is not None:
        info["pooled_start"] = start.to_dict()
    return SleepModel(
        kind="personal", booster=pipe.booster, threshold=pipe.threshold, feature_config=config.features,
        feature_version=features.version, feature_names=features.names, params=pipe.hyperparameters,
        n_rounds=pipe.n_rounds, projection=pipe.projection, participant_id=nights[0].night.participant_id,
        training_nights=tuple(n.night.content_hash for n in nights), decoding=pipe.decoding, info=info)


def _started(base: SleepModel, descriptors: dict[str, float], nights: Sequence[NightRows], choice: StartChoice,
             pipe: TunedPipeline, config: TrainingConfig, seed: int) -> SleepModel:
    """The pooled model ``base`` continued on ``nights`` with the chosen setting (``pipe``: the scratch rival)."""
    Z, y, _ = start_design(base, nights, descriptors)
    order = sorted(range(len(nights)), key=lambda i: nights[i].night.start)  # start_design's row order
    weight = np.concatenate([np.full(nights[i].rows.size, nights[i].weight) for i in order])
    booster = continue_boosting(base, Z, y, added_rounds=choice.added_rounds, learning_rate=choice.learning_rate,
                                reg_lambda=choice.reg_lambda, config=config, seed=seed, sample_weight=weight)
    own = tuple(n.night.content_hash for n in nights)
    params = dict(base.params_) | {"added_rounds": choice.added_rounds, "added_learning_rate": choice.learning_rate,
                                   "added_reg_lambda": choice.reg_lambda,
                                   "n_rounds": base.n_rounds_ + choice.added_rounds}
    return SleepModel(
        kind="personal", booster=booster, threshold=base.threshold_, feature_config=base.feature_config_,
        feature_version=base.feature_version_, feature_names=base.feature_names_, params=params,
        n_rounds=base.n_rounds_ + choice.added_rounds, projection=base.projection_,
        descriptor_names=base.descriptor_names_, participant_id=nights[0].night.participant_id,
        training_nights=own + tuple(h for h in base.training_nights_ if h not in set(own)),
        decoding=_start_decoding(base, nights, choice, config, seed),
        info={"seed": seed, "start": "pooled", "added_rounds": choice.added_rounds, "inner_auc": choice.auc,
              "pooled_start": choice.to_dict(), "tuning": pipe.trials, "scratch_inner_auc": pipe.best_value,
              "base_n_rounds": base.n_rounds_, "base_threshold": base.threshold_,
              "base_training_nights": len(base.training_nights_), "descriptors": dict(descriptors),
              "libraries": library_versions()})


def _start_decoding(base: SleepModel, nights: Sequence[NightRows], choice: StartChoice, config: TrainingConfig,
                    seed: int) -> NightDecoding | None:
    """Decoding of a pooled-start model, fitted on the chosen setting's inner validation predictions.

    Each inner split's validation rows (the scored in-bed epochs of its validation nights, in epoch
    order) are one sequence; the chain is counted from the participant's training rows. Without
    inner predictions, and with no added rounds (the model is then the pooled model itself), the
    pooled model's own decoding is kept.
    """
    if choice.added_rounds == 0 or not choice.validation:
        return base.decoding_
    train = [r.reference[r.rows] for r in nights]  # type: ignore[index]
    return fit_night_decoding([p for p, _ in choice.validation], [y for _, y in choice.validation], train,
                              epoch_seconds=nights[0].night.epoch_seconds, decoder=config.decoder,
                              calibration=config.calibration, seed=seed, min_sensitivity=config.min_sensitivity)


def _fit_study(rows: Sequence[NightRows], *, config: TrainingConfig, seed: int, reporter: Reporter, stage: str,
               base: PooledBase | None, final: bool, matrices: SplitMatrices) -> SleepModel:
    """One study: the from-scratch search, and with ``base`` the pooled start and the choice between them."""
    pipe = tune_and_fit(rows, config=config, seed=seed, reporter=reporter, stage=stage, matrices=matrices)
    if base is None:
        return _model(pipe, rows, config, seed)
    choice = tune_start(rows, base.held_out, base.descriptors, config=config, seed=seed, reporter=reporter)
    if prefer_scratch(pipe.best_value, choice):
        return _model(pipe, rows, config, seed, start=choice)
    return _started(base.final if final else base.held_out, base.descriptors, rows, choice, pipe, config, seed)


def personal_studies(nights: Sequence[Night], config: TrainingConfig = TrainingConfig()) -> int:
    """Number of held-out studies of :func:`train_personal`: groups of labelled nights.

    Parameters
    ----------
    nights : sequence of Night
        One participant's nights.
    config : TrainingConfig, default=TrainingConfig()
        Only ``movement_time`` is used (which nights are labelled).

    Returns
    -------
    int
        Groups (:func:`~models.learning.splits.fold_groups`) of the labelled nights; this is
        what ``config.min_personal_nights`` is compared with.
    """
    labelled = labelled_nights(nights, config)
    return len(set(fold_groups(labelled))) if labelled else 0


def _labelled(nights: Sequence[Night], config: TrainingConfig, source: FeatureSource | None) -> list[NightRows]:
    owners = sorted({n.participant_id for n in nights})
    if len(owners) > 1:
        raise TrainingDataError(f"a personal model takes one participant's nights, got {owners}",
                                code="mixed_participants")
    labelled = labelled_nights(nights, config)
    n_groups = len(set(fold_groups(labelled))) if labelled else 0
    if n_groups < config.min_personal_nights:
        copies = f" ({len(labelled)} nights, overlapping copies counted once)" if n_groups < len(labelled) else ""
        raise TrainingDataError(
            f"a personal model needs {config.min_personal_nights} labelled nights, got {n_groups}{copies}",
            code="too_few_labelled_nights")
    return prepare_nights(labelled, config, feature_cache=source)


def train_personal(nights: Sequence[Night], *, config: TrainingConfig = TrainingConfig(),
                   progress: Progress | None = None, feature_cache: FeatureSource | None = None,
                   base: PooledBase | None = None, corrected: Sequence[tuple[Night, NDArray[np.float64]]] = (),
                   correction_weight: float = 0.5) -> PersonalResult:
    """Tune, evaluate (nested) and train a participant's personal model.

    Parameters
    ----------
    nights : sequence of Night
        One participant's nights; only nights with scored in-bed reference epochs are used.
    config : TrainingConfig, default=TrainingConfig()
    progress : callable, default=None
        ``progress(done, total, stage)`` after every trial and fit, called in the caller's
        thread; if it raises, training stops and the exception propagates.
    feature_cache : FeatureSource, default=None
        Where night features are looked up and misses kept (:mod:`models.features.source`);
        None = a :class:`~models.features.cache.FeatureCache` for this call only.
    base : PooledBase, default=None
        The pooled models to start from (module docstring); its ``held_out`` model must never
        have seen this participant. None = every model from scratch.
    corrected : sequence of (Night, ndarray of shape (n_epochs,)), default=()
        Nights without PSG and their reviewed corrected labels (1 sleep, 0 wake, NaN not judged).
        They join the final model's fit (and its inner tuning) with sample weight
        ``correction_weight`` and are never held out: the held-out figures stay PSG-only.
        ``model.info_["corrected_nights"]`` counts those used.
    correction_weight : float, default=0.5
        Sample weight of a corrected night's rows (a PSG night's weigh 1).

    Returns
    -------
    PersonalResult

    Raises
    ------
    TrainingDataError
        If the nights belong to several participants (code ``mixed_participants``), fewer than
        ``config.min_personal_nights`` groups of nights are labelled (``too_few_labelled_nights``;
        overlapping copies of a night count once) or they mix epoch lengths (``mixed_epoch_lengths``).
    """
    rows = _labelled(nights, config, feature_cache)
    extra = corrected_rows(corrected, config, weight=correction_weight, feature_cache=feature_cache)
    per_study = config.n_trials + 1
    # one entry per night (chronological), grouped by its fold group: split k holds out the k-th group
    groups = np.asarray(fold_groups([r.night for r in rows]))
    outer = list(SPLITTERS["leave-one-night-out"]().split(groups, groups=groups))
    n = len(outer)
    matrices = SplitMatrices()  # inner splits met by several studies are built once per worker

    def outer_task(k: int) -> Any:
        def run(reporter: Reporter) -> tuple[list[tuple[int, HeldOutNight]], dict[str, Any]]:
            train_idx, held_idx = outer[k]
            others = [rows[i] for i in train_idx]
            seed = study_seed(config.seed, k + 1)
            what = "night" if held_idx.size == 1 else f"group of {held_idx.size} nights"
            model = _fit_study(others, config=config, seed=seed, reporter=reporter,
                               stage=f"personal: {what} {k + 1}/{n} held out", base=base, final=False,
                               matrices=matrices)
            out = [(int(i), _held_out(model, rows[i], config)) for i in held_idx]
            return out, _trial_row("+".join(h.night_id for _, h in out), model)
        return run

    def final_task(reporter: Reporter) -> SleepModel:
        seed = study_seed(config.seed, 0)
        model = _fit_study([*rows, *extra], config=config, seed=seed, reporter=reporter,
                           stage="personal: final model", base=base, final=True, matrices=matrices)
        model.info_["corrected_nights"] = len(extra)
        return model

    results = run_tasks([final_task, *(outer_task(k) for k in range(len(outer)))], n_jobs=config.n_jobs,
                        total=(n + 1) * per_study, progress=progress)
    model: SleepModel = results[0]
    held_out: list[HeldOutNight] = [h for _, h in sorted(pair for held, _ in results[1:] for pair in held)]
    night_metrics = night_metrics_table(held_out)
    trials = pd.DataFrame([row for _, row in results[1:]] + [_trial_row("final", model)])
    return PersonalResult(model=model, outer=held_out, night_metrics=night_metrics,
                          summary=summary_table(night_metrics), best_params=dict(model.params_), trials=trials)


def _held_out(model: SleepModel, held: NightRows, config: TrainingConfig) -> HeldOutNight:
    p = model.predict_proba(held.night, features=held.features, descriptors=model.info_.get("descriptors"))
    return HeldOutNight(participant_id=held.night.participant_id, night_hash=held.night.content_hash,
                        label=held.night.label, method="personal", p_sleep=p, sleep=model.calls(p),
                        reference=held.reference, in_bed=held.night.in_bed, threshold=model.threshold_,
                        intervals=model.intervals(p, held.night, level=config.interval_level,
                                                  n_paths=config.interval_paths))


def _trial_row(study: str, model: SleepModel) -> dict[str, Any]:
    tuning = model.info_["tuning"]
    return {"study": study, **tuning, "start": model.info_["start"], "added_rounds": model.info_["added_rounds"],
            "threshold": model.threshold_, **model.params_}
