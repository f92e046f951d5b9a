"""A study's methods side by side on held-out nights, and each participant's method choice.

For every labelled night the comparison holds, next to the PSG reference:

================  ==========================================================================
method            where its predictions come from
================  ==========================================================================
personal          the participant's own model, tuned and trained without that night
                  (participants with ``min_personal_nights`` labelled nights or more)
pooled            the pooled model of the fold that left the participant out
pooled+offset     the same, shifted by an offset fitted on the participant's other labelled
                  nights (participants with two labelled nights or more)
cole-kripke,      the classical rules with default options (:mod:`models.scoring.rules`)
sadeh,
count-threshold
always-sleep      the baseline that calls every epoch sleep
================  ==========================================================================

Epoch metrics (in-bed epochs) come from :func:`models.agreement.epoch_metrics.agreement_table`; sleep
parameters from :func:`models.scoring.parameters.sleep_parameters` with the reference's unscored epochs
masked on both sides; Bland-Altman across all nights from
:func:`models.agreement.bland_altman.bland_altman_table`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from ..agreement.bland_altman import REFERENCE, bland_altman_table
from ..features.cache import FeatureCache
from ..features.source import FeatureSource
from ..agreement.epoch_metrics import ALWAYS_SLEEP, ScoredNight, agreement_table, always_sleep
from ..nights.night import Night
from ..scoring.parameters import PARAMETER_NAMES, sleep_parameters
from .personal import PersonalResult, train_personal
from .pooled import PooledResult, train_pooled
from ..scoring.rules import score_with_rule
from .tasks import Progress
from .config import TrainingConfig
from .held_out import HeldOutNight
from .rows import labelled_nights

__all__ = ["COMPARED_RULES", "ERROR_PARAMETERS", "MODEL_METHODS", "StudyComparison", "choose_method", "compare_study"]

#: Model methods, in table order.
MODEL_METHODS: tuple[str, ...] = ("personal", "pooled", "pooled+offset")
#: Classical rules in the comparison (default options).
COMPARED_RULES: tuple[str, ...] = ("cole-kripke", "sadeh", "count-threshold")
#: Parameters whose per-night error (method - reference) is tabulated.
ERROR_PARAMETERS: tuple[str, ...] = ("sol_min", "tst_min", "waso_min", "awakenings", "sleep_efficiency_pct")


def choose_method(night_metrics: pd.DataFrame, *, policy: str = "balanced_accuracy") -> tuple[str, str]:
    """Choose between a participant's personal and pooled model from held-out figures.

    Parameters
    ----------
    night_metrics : pandas.DataFrame
        The participant's held-out nights: a ``method`` column (``personal``, ``pooled``,
        ``pooled+offset``) and a column named ``policy``.
    policy : str, default="balanced_accuracy"
        Metric compared (higher is better), one of ``CHOICE_POLICIES``.

    Returns
    -------
    method : {"personal", "pooled"}
        ``"pooled"`` means the pooled model with the participant's offset (zero without labels).
    reason : str
        The figures behind the choice.

    Notes
    -----
    The pooled side is scored as deployed: ``pooled+offset`` when the participant has held-out
    offset figures, else ``pooled``. Personal wins only when its mean is strictly higher; ties go
    to pooled, the simpler model.
    """
    means = night_metrics.groupby("method")[policy].mean() if len(night_metrics) else pd.Series(dtype=float)
    pooled_method = "pooled+offset" if np.isfinite(means.get("pooled+offset", np.nan)) else "pooled"
    pooled, personal = means.get(pooled_method, np.nan), means.get("personal", np.nan)
    if not np.isfinite(personal):
        return "pooled", "no personal held-out figures (too few labelled nights)"
    if not np.isfinite(pooled) or personal > pooled:
        return "personal", f"personal {policy} {personal:.3f} > {pooled_method} {pooled:.3f}"
    return "pooled", f"{pooled_method} {policy} {pooled:.3f} >= personal {personal:.3f} (ties go to pooled)"


@dataclass(frozen=True, eq=False)
class StudyComparison:
    """Result of :func:`compare_study` (tables are pandas DataFrames; :meth:`to_dict` for JSON).

    Attributes
    ----------
    epoch_metrics : pandas.DataFrame
        :func:`~models.agreement.epoch_metrics.agreement_table` of every method: per night, per participant
        (mean and SD over held-out nights) and pooled over all epochs.
    parameters : pandas.DataFrame
        Sleep parameters per night and method, the reference included.
    parameter_errors : pandas.DataFrame
        Per night and method, ``<parameter>_error`` = method - reference for
        :data:`ERROR_PARAMETERS`.
    bland_altman : pandas.DataFrame
        Study-wide Bland-Altman statistics per method and parameter.
    participants : pandas.DataFrame
        One row per participant: nights, labelled nights, mean held-out balanced accuracy per
        method, chosen method, reason, offset and notes.
    personal : dict of str to PersonalResult
    pooled : PooledResult
    notes : list of str
        What is missing and why (e.g. no held-out figure for a single labelled night).
    """

    epoch_metrics: pd.DataFrame = field(repr=False)
    parameters: pd.DataFrame = field(repr=False)
    parameter_errors: pd.DataFrame = field(repr=False)
    bland_altman: pd.DataFrame = field(repr=False)
    participants: pd.DataFrame = field(repr=False)
    personal: dict[str, PersonalResult] = field(repr=False)
    pooled: PooledResult = field(repr=False)
    notes: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able tables (records; NaN becomes None)."""
        def records(df: pd.DataFrame) -> list[dict[str, Any]]:
            return df.astype(object).where(df.notna(), None).to_dict(orient="records")
        return {"participants": records(self.participants), "epoch_metrics": records(self.epoch_metrics),
                "parameters": records(self.parameters), "parameter_errors": records(self.parameter_errors),
                "bland_altman": records(self.bland_altman), "shrinkage": self.pooled.shrinkage, "notes": self.notes}


class _Stages:
    """Maps each part's progress onto one study-wide count."""

    def __init__(self, progress: Progress | None, total: int) -> None:
        self.progress, self.total, self.base = progress, total, 0

    def part(self, size: int) -> Progress | None:
        if self.progress is None:
            return None
        base, report = self.base, self.progress
        self.base += size
        return lambda done, _total, stage: report(base + done, self.total, stage)


def _sides(night: Night, config: TrainingConfig, models: Mapping[str, HeldOutNight],
           rule_options: Mapping[str, Mapping[str, Any]]) -> list[tuple[str, np.ndarray, np.ndarray | None]]:
    ref = night.reference_sleep(movement_time=config.movement_time)
    sides: list[tuple[str, np.ndarray, np.ndarray | None]] = [(REFERENCE, ref, None)]  # type: ignore[list-item]
    sides += [(m, models[m].sleep, models[m].p_sleep) for m in MODEL_METHODS if m in models]
    for method in COMPARED_RULES:
        scored = score_with_rule(night.counts, night.epoch_seconds, method, **rule_options.get(method, {}))
        sides.append((method, scored.sleep, scored.score))
    sides.append((ALWAYS_SLEEP, always_sleep(ref), None))
    return sides


def compare_study(nights: Mapping[str, Sequence[Night]], *, config: TrainingConfig = TrainingConfig(),
                  progress: Progress | None = None, rule_options: Mapping[str, Mapping[str, Any]] | None = None,
                  parameter_options: Mapping[str, Any] | None = None,
                  feature_cache: FeatureSource | None = None) -> StudyComparison:
    """Train every model of a study and compare all methods on held-out nights.

    Parameters
    ----------
    nights : mapping of str to sequence of Night
        Participant id -> all their nights (labelled and unlabelled).
    config : TrainingConfig, default=TrainingConfig()
    progress : callable, default=None
        ``progress(done, total, stage)`` over the whole comparison; raising stops it.
    rule_options : mapping, default=None
        Options per rule, e.g. ``{"count-threshold": {"threshold": 20}}``.
    parameter_options : mapping, default=None
        Keyword options of :func:`models.scoring.parameters.sleep_parameters` (same for every method).
    feature_cache : FeatureSource, default=None
        Night features are computed once and shared by all models; None = a
        :class:`~models.features.cache.FeatureCache` for this comparison only.

    Returns
    -------
    StudyComparison

    Raises
    ------
    TrainingDataError
        As :func:`~models.learning.pooled.train_pooled` (fewer than three labelled participants, ...).
    """
    rule_options, parameter_options = dict(rule_options or {}), dict(parameter_options or {})
    feature_cache = FeatureCache() if feature_cache is None else feature_cache
    pids = sorted(nights)
    labelled = {pid: labelled_nights(list(nights[pid]), config) for pid in pids}
    personal_pids = [pid for pid in pids if len(labelled[pid]) >= config.min_personal_nights]
    n_lab = sum(len(v) for v in labelled.values())
    pooled_total = n_lab + min(config.pooled_folds, sum(bool(v) for v in labelled.values())) + 1
    personal_totals = {pid: (len(labelled[pid]) + 1) * (config.n_trials + 1) for pid in personal_pids}
    stages = _Stages(progress, pooled_total + sum(personal_totals.values()))
    pooled = train_pooled(nights, config=config, progress=stages.part(pooled_total), feature_cache=feature_cache)
    personal = {pid: train_personal(nights[pid], config=config, progress=stages.part(personal_totals[pid]),
                                    feature_cache=feature_cache) for pid in personal_pids}

    scored: list[ScoredNight] = []
    param_rows: list[dict[str, Any]] = []
    for pid in pids:
        by_hash: dict[str, dict[str, HeldOutNight]] = {}
        outer = personal[pid].outer if pid in personal else []
        for h in [*outer, *pooled.held_out[pid], *pooled.offset_held_out.get(pid, [])]:
            by_hash.setdefault(h.night_hash, {})[h.method] = h
        for night in labelled[pid]:
            first, stop = night.in_bed
            ids = {"participant_id": pid, "night_id": night.label or night.content_hash[:12]}
            sides = _sides(night, config, by_hash.get(night.content_hash, {}), rule_options)
            unscored = np.isnan(sides[0][1])
            for method, sleep, score in sides:
                masked = np.where(unscored, np.nan, sleep)
                params = sleep_parameters(masked, night.epoch_seconds, lights_off_idx=first, lights_on_idx=stop,
                                          **parameter_options)
                param_rows.append(ids | {"method": method} | params.as_dict())
                if method != REFERENCE:
                    scored.append(ScoredNight(participant_id=pid, night_id=ids["night_id"], method=method,
                                              reference=sides[0][1][first:stop], predicted=sleep[first:stop],
                                              score=None if score is None else score[first:stop]))
    parameters = pd.DataFrame(param_rows, columns=["participant_id", "night_id", "method", *PARAMETER_NAMES,
                                                   "sleep_onset_idx", "final_awakening_idx"])
    epoch_metrics = agreement_table(scored)
    participants, notes = _participants(pids, nights, labelled, pooled, epoch_metrics, config)
    return StudyComparison(epoch_metrics=epoch_metrics, parameters=parameters,
                           parameter_errors=_errors(parameters), bland_altman=bland_altman_table(parameters),
                           participants=participants, personal=personal, pooled=pooled, notes=notes)


def _errors(parameters: pd.DataFrame) -> pd.DataFrame:
    keys = ["participant_id", "night_id"]
    ref = parameters[parameters["method"] == REFERENCE].set_index(keys)[list(ERROR_PARAMETERS)]
    rows = parameters[parameters["method"] != REFERENCE].set_index(keys)
    diff = rows[list(ERROR_PARAMETERS)] - ref.reindex(rows.index)
    diff.columns = [f"{c}_error" for c in ERROR_PARAMETERS]
    return pd.concat([rows[["method"]], diff], axis=1).reset_index()


def _participants(pids: list[str], nights: Mapping[str, Sequence[Night]], labelled: Mapping[str, list[Night]],
                  pooled: PooledResult, epoch_metrics: pd.DataFrame,
                  config: TrainingConfig) -> tuple[pd.DataFrame, list[str]]:
    night_rows = epoch_metrics[epoch_metrics["level"] == "night"]
    rows, notes = [], []
    for pid in pids:
        mine = night_rows[night_rows["participant_id"] == pid]
        models = mine[mine["method"].isin(MODEL_METHODS)]
        method, reason = choose_method(models, policy=config.choice_policy)
        n_lab = len(labelled[pid])
        if n_lab == 0:
            notes.append(f"{pid}: no labelled night, so no held-out figures; the pooled model applies with offset 0")
        elif n_lab == 1:
            notes.append(f"{pid}: 1 labelled night, so no held-out pooled+offset figure (the offset needs another "
                         "labelled night to be scored on)")
        if 0 < n_lab < config.min_personal_nights:
            notes.append(f"{pid}: {n_lab} labelled night(s) < {config.min_personal_nights}, so no personal model")
        means = mine.groupby("method")["balanced_accuracy"].mean()
        rows.append({"participant_id": pid, "n_nights": len(nights[pid]), "n_labelled_nights": n_lab}
                    | {f"{m}_balanced_accuracy": float(means.get(m, np.nan)) for m in (*MODEL_METHODS, *COMPARED_RULES)}
                    | {"chosen": method, "reason": reason, "offset": pooled.offsets[pid]})
    return pd.DataFrame(rows), notes
