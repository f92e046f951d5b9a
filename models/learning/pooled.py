"""Pooled model: every participant's labelled nights, evaluated leave-participants-out, with offsets.

Inputs per epoch are the night's features plus the participant's label-free descriptors
(:func:`~models.learning.descriptors.participant_descriptors`, over all their nights, labelled or not).

Hyperparameters are fixed (``TrainingConfig.pooled_params``: depth 6, learning rate 0.1, min
child weight 5, 80% rows and 70% features per tree, L2 1, ``class_balance`` 0.5, no PCA) rather
than searched: with tens of thousands of rows per fold the model is far less sensitive to them
than a personal model, and a search would multiply the cost of the largest fits. What is tuned is
the number of trees (early stopping), the threshold and the decoding, all on *validation
participants*: a share ``pooled_validation_share`` of each fit's training participants, held back
from that fit. The decoding (:func:`models.decoding.fitting.fit_night_decoding`) is fitted on the
fit model's raw predictions of the validation participants' nights (in-bed epochs, no offset),
with the sleep/wake chain counted from the labels of the fit's training participants.
``pooled+offset`` adds the participant's offset to the margin *before* calibration: the
calibrated probability is ``calibrator(expit(margin + offset))``, then decoded.

Evaluation is leave-participants-out (GroupKFold over participant groups, ``pooled_folds``
folds): every participant's held-out predictions come from a fold model that never saw any of
their nights, and whose early stopping and threshold never saw them either. Participants that
share a night (the same content stored under two ids,
:func:`~models.learning.splits.participant_groups`) are one group: they fall in the same fold,
and validation participants are held back as whole groups too. The final model repeats
the procedure on all participants. Each fit trains on at most ``pooled_max_rows`` epochs (a
uniform sample when there are more) through ``xgboost.QuantileDMatrix`` (compressed histogram
input); fits (each fold fit then scores its held-out participants) and night features run on
``n_jobs`` threads.

Offsets (:mod:`models.learning.offset`): the penalty is chosen from the held-out margins of participants
with two or more labelled night groups (:func:`~models.learning.splits.fold_groups`: overlapping
copies of a night are one group, scored and left out together); each participant's offset is then
estimated from all their held-out margins. ``pooled+offset`` held-out figures
(``PooledResult.offset_held_out``) use, for each labelled night, an offset fitted on the
participant's nights *outside its group* with a penalty chosen without the participant and the
participants linked to it (:meth:`~models.learning.offset.ShrinkageChoice.excluding`).

Deployed offsets (:data:`OFFSET_RULE`, also in the final model's ``info_["offset_rule"]`` and so in
its stored metadata): the final model trained on every labelled participant, so its margins on a
participant's own nights are in-sample and would understate how far the participant sits from
the population. A trained-on participant's deployed offset is therefore *cross-fitted*: estimated
on the out-of-fold margins of the fold model that left the participant out (plus that fold
model's baseline), with the penalty chosen on all participants, exactly as the ``pooled+offset``
held-out figures estimate it (there from the nights outside the scored night's group), and added
to the final model's margin. A participant the final model never saw gets their offset from the
final model's own margins (:func:`~models.learning.offset.participant_offset`).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import xgboost as xgb
from numpy.typing import NDArray
from scipy.special import expit
from sklearn.model_selection import GroupKFold, GroupShuffleSplit

from ..decoding.fitting import fit_night_decoding
from ..features.source import FeatureSource
from ..nights.night import Night
from ._boosting import boost_early_stopped
from .artifacts import library_versions
from .classifier import SleepModel
from .config import POOLED_PARAMS, TrainingConfig, TrainingDataError
from .descriptors import DESCRIPTOR_NAMES, participant_descriptors
from .held_out import HeldOutNight, night_metrics_table, summary_table
from .offset import choose_shrinkage, estimate_offset
from .pooled_result import OFFSET_RULE, PooledResult
from .rows import NightRows, corrected_rows, iter_prepared, labelled_nights, study_seed
from .splits import fold_groups, participant_groups
from .tasks import Progress, Reporter, run_tasks
from .threshold import youden_threshold
from .tuning import booster_params

__all__ = ["OFFSET_RULE", "PooledResult", "train_pooled"]

class _Rows:
    """Stacked pooled inputs: features + descriptors of every labelled in-bed epoch.

    ``owners`` holds each row's position in ``participants``, ``groups`` its participant group.
    """

    def __init__(self, data: Mapping[str, list[NightRows]], descriptors: Mapping[str, Mapping[str, float]],
                 linked: Mapping[str, int]) -> None:
        self.participants = [pid for pid, rows in data.items() if any(r.labelled for r in rows)]
        blocks, ys, owners, groups, weights = [], [], [], [], []
        for k, pid in enumerate(self.participants):
            desc = np.array([descriptors[pid][n] for n in DESCRIPTOR_NAMES], dtype=np.float32)
            for r in data[pid]:
                if r.labelled:
                    X = r.features.values[r.rows]
                    blocks.append(np.hstack([X, np.broadcast_to(desc, (X.shape[0], desc.size))]))
                    ys.append(r.reference[r.rows])  # type: ignore[index]
                    owners.append(np.full(r.rows.size, k))
                    groups.append(np.full(r.rows.size, linked[pid]))
                    weights.append(np.full(r.rows.size, r.weight))
        w = np.concatenate(weights)
        self.w = None if np.all(w == 1.0) else w  # per-row sample weights (None: all 1)
        self.X = np.vstack(blocks)
        self.y = np.concatenate(ys)
        self.owners = np.concatenate(owners)
        self.groups = np.concatenate(groups)


def _at_most(idx: NDArray[np.intp], n: int, rng: np.random.Generator) -> NDArray[np.intp]:
    """``idx`` itself, or a sorted uniform sample of ``n`` of its entries."""
    return idx if idx.size <= n else np.sort(rng.choice(idx, size=n, replace=False))


def _fit(rows: _Rows, train_idx: NDArray[np.intp], *, config: TrainingConfig, seed: int, feature_names: tuple[str, ...],
         feature_version: str, training_nights: tuple[str, ...], reporter: Reporter) -> SleepModel:
    """One pooled fit: hold back validation participants, early-stop and pick the threshold on them."""
    hp = dict(POOLED_PARAMS) | dict(config.pooled_params)
    splitter = GroupShuffleSplit(n_splits=1, test_size=config.pooled_validation_share, random_state=seed)
    fit_pos, val_pos = next(splitter.split(train_idx, groups=rows.groups[train_idx]))
    rng = np.random.default_rng(seed)
    fit_idx = _at_most(train_idx[fit_pos], config.pooled_max_rows, rng)
    val_idx = _at_most(train_idx[val_pos], config.pooled_max_rows // 2, rng)
    params = booster_params(hp, y=rows.y[fit_idx], config=config, seed=seed)
    dtrain = xgb.QuantileDMatrix(rows.X[fit_idx], rows.y[fit_idx], max_bin=config.max_bin, nthread=1,
                                 weight=None if rows.w is None else rows.w[fit_idx])
    y_val = rows.y[val_idx]
    # a plain DMatrix: XGBoost evaluates it incrementally, a QuantileDMatrix validation set ~10x slower
    dval = xgb.DMatrix(rows.X[val_idx], y_val, weight=np.where(y_val == 1, params["scale_pos_weight"], 1.0)
                       * (1.0 if rows.w is None else rows.w[val_idx]), nthread=1)
    booster, best = boost_early_stopped(params, dtrain, dval, max_rounds=config.max_rounds,
                                        early_stopping_rounds=config.early_stopping_rounds, check=reporter.check)
    n_rounds = best + 1
    margin_val = booster.predict(dval, iteration_range=(0, n_rounds), output_margin=True).astype(np.float64)
    del dtrain, dval
    return SleepModel(
        kind="pooled", booster=booster[:n_rounds],
        threshold=youden_threshold(y_val, expit(margin_val), min_sensitivity=config.min_sensitivity),
        offset_baseline=estimate_offset(margin_val, y_val, shrinkage=0.0),
        feature_config=config.features, feature_version=feature_version, feature_names=feature_names,
        params=hp | {"n_rounds": n_rounds, "scale_pos_weight": params["scale_pos_weight"], "pca_variance": 0.0},
        n_rounds=n_rounds, descriptor_names=DESCRIPTOR_NAMES, training_nights=training_nights,
        info={"seed": seed, "n_fit_participants": int(np.unique(rows.owners[fit_idx]).size),
              "n_validation_participants": int(np.unique(rows.owners[val_idx]).size),
              "validation_participants": [rows.participants[o] for o in np.unique(rows.owners[val_idx])],
              "libraries": library_versions()})


def _in_bed(r: NightRows, values: NDArray[np.float64]) -> NDArray[np.float64]:
    """A night's in-bed epochs of ``values``, NaN where the night has no training row."""
    first, stop = r.night.in_bed
    out = np.full(stop - first, np.nan)
    out[r.rows - first] = values[r.rows]
    return out


def _with_decoding(model: SleepModel, data: Mapping[str, list[NightRows]],
                   descriptors: Mapping[str, Mapping[str, float]], training: Sequence[str],
                   config: TrainingConfig, seed: int) -> SleepModel:
    """``model`` with its decoding fitted on its validation participants' nights (module docstring)."""
    val_rows = [r for pid in model.info_["validation_participants"] for r in data[pid] if r.labelled]
    p_raw = [_in_bed(r, model.raw_proba(r.night, descriptors=descriptors[r.night.participant_id],
                                        features=r.features)) for r in val_rows]
    labels = [_in_bed(r, r.reference) for r in val_rows]  # type: ignore[arg-type]
    train = [_in_bed(r, r.reference) for pid in training for r in data[pid] if r.labelled]  # type: ignore[arg-type]
    model.decoding_ = fit_night_decoding(p_raw, labels, train, epoch_seconds=val_rows[0].night.epoch_seconds,
                                         decoder=config.decoder, calibration=config.calibration, seed=seed,
                                         min_sensitivity=config.min_sensitivity)
    return model


def _held_out(model: SleepModel, r: NightRows, descriptors: Mapping[str, float], config: TrainingConfig, *,
              method: str = "pooled", offset: float = 0.0, margin: NDArray[np.float64] | None = None) -> HeldOutNight:
    if margin is None:
        margin = model.decision_function(r.night, descriptors=descriptors, features=r.features)
    p = model.proba_from_margin(margin + offset)
    return HeldOutNight(participant_id=r.night.participant_id, night_hash=r.night.content_hash, label=r.night.label,
                        method=method, p_sleep=p, sleep=model.calls(p),
                        reference=r.reference, in_bed=r.night.in_bed, threshold=model.threshold_, offset=offset,
                        margin=margin, intervals=model.intervals(p, r.night, level=config.interval_level,
                                                                 n_paths=config.interval_paths))


def _margins(held: list[HeldOutNight], rows: list[NightRows], baseline: float) -> list[tuple[NDArray[np.float64],
                                                                                           NDArray[np.float64]]]:
    """Per labelled night: held-out margin plus the fold model's baseline, and the reference (scored epochs)."""
    return [(h.margin[r.rows] + baseline, r.reference[r.rows])  # type: ignore[index]
            for h, r in zip(held, rows, strict=True)]


def _by_group(pairs: list[tuple[NDArray[np.float64], NDArray[np.float64]]],
              groups: list[int]) -> list[tuple[NDArray[np.float64], NDArray[np.float64]]]:
    """The nights' (margin, reference) pairs joined per night group, in order of first night."""
    return [(np.concatenate([m for (m, _), g in zip(pairs, groups, strict=True) if g == group]),
             np.concatenate([y for (_, y), g in zip(pairs, groups, strict=True) if g == group]))
            for group in dict.fromkeys(groups)]


def _offset_held_out(held: list[HeldOutNight], rows: list[NightRows],
                     pairs: list[tuple[NDArray[np.float64], NDArray[np.float64]]], groups: list[int],
                     model: SleepModel, shrinkage: float, config: TrainingConfig) -> list[HeldOutNight]:
    """``pooled+offset`` for each labelled night: offset fitted on the participant's nights outside its group."""
    out = []
    for k, (h, r) in enumerate(zip(held, rows, strict=True)):
        rest = [pair for i, pair in enumerate(pairs) if groups[i] != groups[k]]
        b = estimate_offset(np.concatenate([m for m, _ in rest]), np.concatenate([y for _, y in rest]),
                            shrinkage=shrinkage)
        out.append(_held_out(model, r, {}, config, method="pooled+offset", offset=b, margin=h.margin))
    return out


def train_pooled(nights: Mapping[str, Sequence[Night]], *, config: TrainingConfig = TrainingConfig(),
                 progress: Progress | None = None, feature_cache: FeatureSource | None = None,
                 corrected: Mapping[str, Sequence[tuple[Night, NDArray[np.float64]]]] | None = None,
                 correction_weight: float = 0.5) -> PooledResult:
    """Train the pooled model, evaluate it leave-participants-out and estimate participant offsets.

    Parameters
    ----------
    nights : mapping of str to sequence of Night
        Participant id -> all that participant's nights, labelled and unlabelled (unlabelled
        nights only feed the participant's descriptors).
    config : TrainingConfig, default=TrainingConfig()
    progress : callable, default=None
        ``progress(done, total, stage)`` after each night's features and each fit, called in the
        caller's thread; if it raises, training stops and the exception propagates.
    feature_cache : FeatureSource, default=None
        Where night features are looked up and misses kept (:mod:`models.features.source`);
        None = a :class:`~models.features.cache.FeatureCache` for this call only.
    corrected : mapping of str to sequence of (Night, ndarray of shape (n_epochs,)), optional
        Participant id -> nights without PSG and their reviewed corrected labels. Those of
        participants with labelled nights join the final model's fit (rows weighted
        ``correction_weight``); the folds never see them, so the held-out figures stay PSG-only.
        ``model.info_["corrected_nights"]`` counts those used.
    correction_weight : float, default=0.5
        Sample weight of a corrected night's rows (a PSG night's weigh 1).

    Returns
    -------
    PooledResult

    Raises
    ------
    TrainingDataError
        If fewer than three participants have labelled nights (code ``too_few_participants``;
        participants sharing a night count once) or the nights mix epoch lengths.
    """
    pids = sorted(nights)
    descriptors = {pid: participant_descriptors(list(nights[pid])) for pid in pids}
    labelled = {pid: labelled_nights(list(nights[pid]), config) for pid in pids}
    flat = [n for pid in pids for n in labelled[pid]]
    linked = participant_groups({pid: labelled[pid] for pid in pids if labelled[pid]})
    n_labelled_pids, n_groups = len(linked), len(set(linked.values()))
    if n_groups < 3:
        shared = f" ({n_labelled_pids} participants, those sharing a night counted once)" \
            if n_groups < n_labelled_pids else ""
        raise TrainingDataError(
            f"a pooled model needs labelled nights of at least 3 participants, got {n_groups}{shared}",
            code="too_few_participants")
    n_folds = min(config.pooled_folds, n_groups)
    total = len(flat) + n_folds + 1
    data: dict[str, list[NightRows]] = {pid: [] for pid in pids}
    for done, r in enumerate(iter_prepared(flat, config, feature_cache=feature_cache, n_jobs=config.n_jobs), start=1):
        data[r.night.participant_id].append(r)
        if progress is not None:
            progress(done, total, "pooled: features")
    prepared = [r for pid in pids for r in data[pid]]
    rows = _Rows(data, descriptors, linked)
    extra = {pid: corrected_rows(list((corrected or {}).get(pid, ())), config, weight=correction_weight,
                                 feature_cache=feature_cache) for pid in pids if pid in linked}
    n_extra = sum(len(v) for v in extra.values())
    final_rows = _Rows({pid: data[pid] + extra.get(pid, []) for pid in pids}, descriptors, linked) if n_extra else rows
    feature_names, feature_version = tuple(prepared[0].features.names), prepared[0].features.version
    folds = list(GroupKFold(n_splits=n_folds).split(rows.X, rows.y, rows.groups))
    fold_of = {rows.participants[o]: k for k, (_, test) in enumerate(folds) for o in np.unique(rows.owners[test])}

    def fit_task(k: int) -> Any:
        def run(reporter: Reporter) -> tuple[SleepModel, dict[str, list[HeldOutNight]]]:
            train_idx = np.arange(final_rows.y.size) if k < 0 else folds[k][0]
            used = {pid: data[pid] + extra.get(pid, []) if k < 0 else data[pid] for pid in pids}
            training = tuple(r.night.content_hash for pid in pids for r in used[pid] if k < 0 or fold_of.get(pid) != k)
            seed = study_seed(config.seed, 1000 + k + 1)
            model = _fit(final_rows if k < 0 else rows, train_idx, config=config, seed=seed,
                         training_nights=training, reporter=reporter, feature_names=feature_names,
                         feature_version=feature_version)
            model = _with_decoding(model, data, descriptors, [pid for pid in pids if k < 0 or fold_of.get(pid) != k],
                                   config, seed)
            # the fold's participants are scored here, beside the other fits, rather than after all of them
            held = {} if k < 0 else {pid: [_held_out(model, r, descriptors[pid], config) for r in data[pid]]
                                     for pid in pids if fold_of.get(pid) == k}
            reporter.tick("pooled: final model" if k < 0 else f"pooled: fold {k + 1}/{n_folds}")
            return model, held
        return run

    results = run_tasks([fit_task(k) for k in [-1, *range(n_folds)]], n_jobs=config.n_jobs, total=total,
                        progress=progress, done=len(flat))
    final, fitted = results[0][0], [model for model, _ in results[1:]]
    final.info_["offset_rule"] = OFFSET_RULE
    final.info_["corrected_nights"] = n_extra
    scored = {pid: nights_out for _, held in results[1:] for pid, nights_out in held.items()}
    held_out = {pid: scored.get(pid, []) for pid in pids}
    baselines = {pid: fitted[k].offset_baseline_ for pid, k in fold_of.items()}
    pairs = {pid: _margins(held_out[pid], data[pid], baselines[pid]) for pid in pids if data[pid]}
    night_groups = {pid: fold_groups([r.night for r in data[pid]]) for pid in pairs}
    grouped = {pid: _by_group(pairs[pid], night_groups[pid]) for pid in pairs}
    search = choose_shrinkage(grouped, grid=config.shrinkage_grid)
    offsets = {pid: estimate_offset(np.concatenate([m for m, _ in pairs[pid]]),
                                    np.concatenate([y for _, y in pairs[pid]]), shrinkage=search.shrinkage)
               if pid in pairs else 0.0 for pid in pids}
    def linked_to(pid: str) -> list[str]:
        return [q for q in linked if q != pid and linked[q] == linked[pid]]

    offset_held_out = {pid: _offset_held_out(held_out[pid], data[pid], pairs[pid], night_groups[pid],
                                             fitted[fold_of[pid]], search.excluding(pid, linked=linked_to(pid)), config)
                       for pid in pairs if len(grouped[pid]) >= 2}
    everything = [h for pid in pids for h in held_out[pid]] + [h for v in offset_held_out.values() for h in v]
    night_metrics = night_metrics_table(everything)
    summary = night_metrics.groupby("method", sort=False).apply(summary_table)
    return PooledResult(model=final, held_out=held_out, offsets=offsets, shrinkage=search.shrinkage,
                        shrinkage_search=search, offset_held_out=offset_held_out, descriptors=descriptors,
                        folds=fold_of, baselines=baselines, night_metrics=night_metrics, summary=summary,
                        fold_models=dict(enumerate(fitted)))
