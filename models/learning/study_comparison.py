"""A study's methods side by side on held-out nights, and each participant's method choice.

For every labelled night the comparison holds, next to the PSG reference:

================  ==========================================================================
method            where its predictions come from
================  ==========================================================================
personal          the participant's own model, tuned and trained without that night
                  (participants with ``min_personal_nights`` labelled night groups or more;
                  overlapping copies of a night are one group, held out together)
pooled            the pooled model of the fold that left the participant out (and every
                  participant sharing a night with them)
pooled+offset     the same, shifted by an offset fitted on the participant's labelled nights
                  outside the night's group (participants with two labelled night groups
                  or more)
auto              the participant's choice among the three, made without the night's group
                  (:func:`models.learning.method_choice.nested_choice`): the chosen model's
                  prediction of the night
cole-kripke,      the classical rules as published, default options (:mod:`models.scoring.rules`)
sadeh,
count-threshold
<rule>:calibrated the same rules with the count scale (count-threshold: the threshold, in
                  counts) chosen on the other participants' labelled nights
                  (:mod:`models.agreement.rule_calibration`)
always-sleep      the baseline that calls every epoch sleep
================  ==========================================================================

Each night is compared with its reference by :func:`held_out_comparison` (the one comparison of
:func:`models.agreement.comparison.compare_night`: epoch metrics on the in-bed epochs, sleep parameters
with the reference's unscored epochs and the night's missing epochs masked on both sides; every
method leaves missing epochs unscored) and the nights are tabulated by
:func:`models.agreement.comparison.comparison_tables` (Bland-Altman across all nights).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike

from ..agreement.bland_altman import REFERENCE
from ..agreement.comparison import NightComparison, compare_night, comparison_tables
from ..agreement.epoch_metrics import ALWAYS_SLEEP, always_sleep
from ..agreement.rule_calibration import RuleCalibration, calibrate_rules
from ..agreement.rule_comparison import NightRecord
from ..decoding.intervals import interval_coverage
from ..features.cache import FeatureCache
from ..features.source import FeatureSource
from ..nights.night import MovementTimePolicy, Night
from ..records import json_records
from ..scoring.rules import score_with_rule
from .config import TrainingConfig, TrainingDataError
from .held_out import HeldOutNight
from .method_choice import AUTO, MODEL_METHODS, MethodChoice, nested_choice
from .personal import PersonalResult, personal_studies, train_personal
from .pooled import PooledResult, train_pooled
from .rows import labelled_nights
from .splits import fold_groups, participant_groups
from .tasks import Progress

__all__ = ["COMPARED_RULES", "COVERAGE_COLUMNS", "StudyComparison", "compare_study", "held_out_comparison"]

#: Classical rules in the comparison (default options).
COMPARED_RULES: tuple[str, ...] = ("cole-kripke", "sadeh", "count-threshold")
#: Columns of :attr:`StudyComparison.interval_coverage`.
COVERAGE_COLUMNS: tuple[str, ...] = ("method", "parameter", "level", "coverage", "n_nights", "median_width")


def _coverage_table(held: Sequence[tuple[str, str, Mapping[str, HeldOutNight]]],
                    parameters: pd.DataFrame) -> pd.DataFrame:
    """Observed against nominal coverage of the held-out intervals, per model method and parameter."""
    reference = parameters[parameters["method"] == REFERENCE]
    truth: dict[tuple[str, str], Mapping[Any, Any]] = {
        (str(r["participant_id"]), str(r["night_id"])): r for r in reference.to_dict(orient="records")}
    rows = []
    for method in (*MODEL_METHODS, AUTO):
        mine = [(h.intervals, truth[(pid, night_id)]) for pid, night_id, by_method in held
                if (h := by_method.get(method)) is not None and h.intervals is not None and (pid, night_id) in truth]
        if not mine:
            continue
        levels = {iv.level for iv, _ in mine}
        for level in sorted(levels):
            nights = [(iv, t) for iv, t in mine if iv.level == level]
            names = list(nights[0][0].intervals)
            cover = interval_coverage([iv.intervals for iv, _ in nights],
                                      [{n: float(t[n]) if t[n] is not None else np.nan for n in names}
                                       for _, t in nights], level=level)
            for name in names:
                widths = np.array([iv.intervals[name][1] - iv.intervals[name][0] for iv, _ in nights], dtype=float)
                widths = widths[np.isfinite(widths)]
                rows.append({"method": method, "parameter": name, "level": level,
                             "coverage": cover[name]["observed"], "n_nights": int(cover[name]["n_nights"]),
                             "median_width": float(np.median(widths)) if widths.size else np.nan})
    return pd.DataFrame(rows, columns=list(COVERAGE_COLUMNS))


@dataclass(frozen=True, eq=False)
class StudyComparison:
    """Result of :func:`compare_study` (tables are pandas DataFrames; :meth:`to_dict` for JSON).

    Attributes
    ----------
    epoch_metrics : pandas.DataFrame
        :func:`~models.agreement.epoch_metrics.agreement_table` of every method: per night, per participant
        (mean and SD over held-out nights) and pooled over all epochs.
    parameters : pandas.DataFrame
        Sleep parameters per night and method, the reference included
        (:data:`~models.agreement.comparison.PARAMETER_COLUMNS`).
    parameter_errors : pandas.DataFrame
        Per night and method, ``<parameter>_error`` = method - reference for
        :data:`~models.agreement.comparison.ERROR_PARAMETERS`.
    bland_altman : pandas.DataFrame
        Study-wide Bland-Altman statistics per method and parameter.
    participants : pandas.DataFrame
        One row per participant: nights, labelled nights, mean held-out balanced accuracy per
        method (``auto`` and the calibrated rules included), chosen method, reason (with auto's
        nested figure), offset and notes.
    personal : dict of str to PersonalResult
    pooled : PooledResult
    choices : dict of str to MethodChoice
        Per participant, the method choice and auto's nested per-night choices.
    calibrations : dict of str to RuleCalibration
        Per rule of :data:`COMPARED_RULES`, its leave-participants-out calibration (empty with
        fewer than two participant groups).
    notes : list of str
        What is missing and why (e.g. no held-out figure for a single labelled night).
    interval_coverage : pandas.DataFrame
        Per model method (``auto`` included) and parameter: nominal ``level``, observed
        ``coverage`` (share of held-out nights whose reference value lies in the night's
        interval, :func:`~models.decoding.intervals.interval_coverage`), ``n_nights`` and the
        ``median_width`` of the intervals (parameter units). Reference values are those of
        ``parameters``.
    """

    epoch_metrics: pd.DataFrame = field(repr=False)
    parameters: pd.DataFrame = field(repr=False)
    parameter_errors: pd.DataFrame = field(repr=False)
    bland_altman: pd.DataFrame = field(repr=False)
    participants: pd.DataFrame = field(repr=False)
    personal: dict[str, PersonalResult] = field(repr=False)
    pooled: PooledResult = field(repr=False)
    notes: list[str] = field(default_factory=list)
    choices: dict[str, MethodChoice] = field(default_factory=dict, repr=False)
    calibrations: dict[str, RuleCalibration] = field(default_factory=dict, repr=False)
    interval_coverage: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=list(COVERAGE_COLUMNS)),
                                            repr=False)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able tables (:func:`models.records.json_records`: NaN becomes None)."""
        return {"participants": json_records(self.participants), "epoch_metrics": json_records(self.epoch_metrics),
                "parameters": json_records(self.parameters), "parameter_errors": json_records(self.parameter_errors),
                "bland_altman": json_records(self.bland_altman), "shrinkage": self.pooled.shrinkage,
                "offset_rule": self.pooled.offset_rule,
                "rule_calibrations": {m: c.to_dict() for m, c in self.calibrations.items()}, "notes": self.notes,
                "interval_coverage": json_records(self.interval_coverage)}


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


def _sides(night: Night, held_out: Mapping[str, HeldOutNight], rule_options: Mapping[str, Mapping[str, Any]],
           calibrations: Mapping[str, RuleCalibration],
           participant_id: str) -> dict[str, tuple[ArrayLike, ArrayLike | None]]:
    sides: dict[str, tuple[ArrayLike, ArrayLike | None]] = {
        m: (held_out[m].sleep, held_out[m].p_sleep) for m in (*MODEL_METHODS, AUTO) if m in held_out}
    for method in COMPARED_RULES:
        scored = score_with_rule(night.counts, night.epoch_seconds, method, **rule_options.get(method, {}))
        sides[method] = (scored.sleep, scored.score)
    for method, calibration in calibrations.items():
        options = calibration.options(participant_id, rule_options.get(method))
        scored = score_with_rule(night.counts, night.epoch_seconds, method, **options)
        sides[calibration.name] = (scored.sleep, scored.score)
    sides[ALWAYS_SLEEP] = (always_sleep(night.counts), None)
    return sides


def held_out_comparison(night: Night, held_out: Mapping[str, HeldOutNight], *, participant_id: str | None = None,
                        movement_time: MovementTimePolicy = "wake",
                        rule_options: Mapping[str, Mapping[str, Any]] | None = None,
                        parameter_options: Mapping[str, Any] | None = None,
                        calibrations: Mapping[str, RuleCalibration] | None = None) -> NightComparison:
    """One labelled night of a study comparison: every method against the night's reference.

    The methods, in table order: the held-out models present (:data:`MODEL_METHODS` and
    ``auto``, calls and ``p_sleep``), :data:`COMPARED_RULES` scoring the whole recording (calls
    and continuous score), the calibrated rules of ``calibrations`` and the always-sleep
    baseline (no score).

    Parameters
    ----------
    night : Night
        A night with reference labels.
    held_out : mapping of str to HeldOutNight
        The night's held-out model predictions by method (a model without one is left out).
    participant_id : str, default=None
        Names the night's participant in the tables; None = ``night.participant_id``.
    movement_time : {"wake", "sleep", "exclude"}, default="wake"
        How R&K movement-time epochs of the reference count.
    rule_options : mapping, default=None
        Options per rule of :data:`COMPARED_RULES`, e.g. ``{"count-threshold": {"threshold": 20}}``.
    parameter_options : mapping, default=None
        Keyword options of :func:`models.scoring.parameters.sleep_parameters`.
    calibrations : mapping of str to RuleCalibration, default=None
        Calibrated rules to add (scored with the value chosen without the night's participant).

    Returns
    -------
    NightComparison
        Named by :attr:`Night.night_id <models.nights.night.Night.night_id>` and the night's label.

    Raises
    ------
    TrainingDataError
        If the night has no reference labels.
    """
    reference = night.reference_sleep(movement_time=movement_time)
    if reference is None:
        raise TrainingDataError(f"night {night.night_id} has no reference", code="no_reference")
    first, stop = night.in_bed
    pid = night.participant_id if participant_id is None else participant_id
    return compare_night(reference, _sides(night, held_out, rule_options or {}, calibrations or {}, pid),
                         epoch_seconds=night.epoch_seconds, lights_off_idx=first, lights_on_idx=stop,
                         parameter_options=parameter_options, participant_id=pid,
                         night_id=night.night_id, label=night.label, missing=night.missing)


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
    feature_cache = FeatureCache() if feature_cache is None else feature_cache
    pids = sorted(nights)
    labelled = {pid: labelled_nights(list(nights[pid]), config) for pid in pids}
    studies = {pid: personal_studies(list(nights[pid]), config) for pid in pids}
    personal_pids = [pid for pid in pids if studies[pid] >= config.min_personal_nights]
    n_lab = sum(len(v) for v in labelled.values())
    n_groups = len(set(participant_groups({pid: labelled[pid] for pid in pids if labelled[pid]}).values()))
    pooled_total = n_lab + min(config.pooled_folds, n_groups) + 1
    personal_totals = {pid: (studies[pid] + 1) * (config.n_trials + 1) for pid in personal_pids}
    stages = _Stages(progress, pooled_total + sum(personal_totals.values()))
    pooled = train_pooled(nights, config=config, progress=stages.part(pooled_total), feature_cache=feature_cache)
    personal = {pid: train_personal(nights[pid], config=config, progress=stages.part(personal_totals[pid]),
                                    feature_cache=feature_cache) for pid in personal_pids}

    linked = participant_groups({pid: labelled[pid] for pid in pids if labelled[pid]})
    records = [NightRecord.from_night(n, movement_time=config.movement_time) for pid in pids for n in labelled[pid]]
    calibrations = calibrate_rules(records, COMPARED_RULES, groups=linked, rule_options=rule_options)
    compared: list[NightComparison] = []
    held: list[tuple[str, str, dict[str, HeldOutNight]]] = []
    choices: dict[str, MethodChoice] = {}
    for pid in pids:
        by_hash: dict[str, dict[str, HeldOutNight]] = {}
        outer = personal[pid].outer if pid in personal else []
        for h in [*outer, *pooled.held_out[pid], *pooled.offset_held_out.get(pid, [])]:
            by_hash.setdefault(h.night_hash, {})[h.method] = h
        choices[pid] = _nested(pid, labelled[pid], by_hash, config)
        compared += [held_out_comparison(night, by_hash.get(night.content_hash, {}), participant_id=pid,
                                         movement_time=config.movement_time, rule_options=rule_options,
                                         parameter_options=parameter_options, calibrations=calibrations)
                     for night in labelled[pid]]
        held += [(pid, night.night_id, by_hash.get(night.content_hash, {})) for night in labelled[pid]]
    tables = comparison_tables(compared)
    participants, notes = _participants(pids, nights, labelled, studies, pooled, tables.epoch_metrics, choices,
                                        calibrations, config)
    return StudyComparison(epoch_metrics=tables.epoch_metrics, parameters=tables.parameters,
                           parameter_errors=tables.parameter_errors, bland_altman=tables.bland_altman,
                           participants=participants, personal=personal, pooled=pooled, notes=notes,
                           choices=choices, calibrations=calibrations,
                           interval_coverage=_coverage_table(held, tables.parameters))


def _nested(pid: str, labelled: Sequence[Night], by_hash: dict[str, dict[str, HeldOutNight]],
            config: TrainingConfig) -> MethodChoice:
    """The participant's choice and auto's held-out night predictions (added to ``by_hash`` as ``auto``).

    The figures choices are made on are those of the comparison (in-bed epochs, missing epochs
    unscored); a night's group (its overlapping copies) is left out with it.
    """
    groups = dict(zip((n.night_id for n in labelled), fold_groups(list(labelled)), strict=True)) if labelled else {}
    rows = []
    for night in labelled:
        held = by_hash.get(night.content_hash, {})
        reference = night.reference_sleep(movement_time=config.movement_time)
        if not held or reference is None:
            continue
        compared = compare_night(reference, {m: (h.sleep, h.p_sleep) for m, h in held.items()},
                                 epoch_seconds=night.epoch_seconds, lights_off_idx=night.in_bed[0],
                                 lights_on_idx=night.in_bed[1], participant_id=pid, night_id=night.night_id,
                                 missing=night.missing)
        rows += [{"night_id": night.night_id, "method": m} | metrics for m, metrics in compared.epoch_metrics.items()]
    table = pd.DataFrame(rows, columns=None if rows else ["night_id", "method", config.choice_policy])
    choice = nested_choice(table, policy=config.choice_policy, night_groups=groups)
    for night_id, chosen in zip(choice.per_night["night_id"], choice.per_night["chosen"], strict=True):
        night = next(n for n in labelled if n.night_id == night_id)
        held = by_hash[night.content_hash]
        held[AUTO] = dataclasses.replace(held[chosen], method=AUTO)
    return choice


def _participants(pids: list[str], nights: Mapping[str, Sequence[Night]], labelled: Mapping[str, list[Night]],
                  studies: Mapping[str, int], pooled: PooledResult, epoch_metrics: pd.DataFrame,
                  choices: Mapping[str, MethodChoice], calibrations: Mapping[str, RuleCalibration],
                  config: TrainingConfig) -> tuple[pd.DataFrame, list[str]]:
    night_rows = epoch_metrics[epoch_metrics["level"] == "night"]
    rows, notes = [], []
    shown = (*MODEL_METHODS, AUTO, *COMPARED_RULES, *(c.name for c in calibrations.values()))
    for pid in pids:
        mine = night_rows[night_rows["participant_id"] == pid]
        method, reason = choices[pid].method, choices[pid].reason
        n_lab, n_groups = len(labelled[pid]), studies[pid]
        copies = " (overlapping copies of a night counted once)" if n_groups < n_lab else ""
        if n_lab == 0:
            notes.append(f"{pid}: no labelled night, so no held-out figures; the pooled model applies with offset 0")
        elif n_groups == 1:
            notes.append(f"{pid}: 1 labelled night{copies}, so no held-out pooled+offset figure (the offset needs "
                         "another labelled night to be scored on)")
        if 0 < n_groups < config.min_personal_nights:
            notes.append(f"{pid}: {n_groups} labelled night(s){copies} < {config.min_personal_nights}, so no personal "
                         "model")
        means = mine.groupby("method")["balanced_accuracy"].mean()
        rows.append({"participant_id": pid, "n_nights": len(nights[pid]), "n_labelled_nights": n_lab}
                    | {f"{m}_balanced_accuracy": float(means.get(m, np.nan)) for m in shown}
                    | {"chosen": method, "reason": reason, "offset": pooled.offsets[pid]}
                    | {f"{c.name}_{c.parameter}": c.per_participant.get(pid, np.nan) for c in calibrations.values()})
    return pd.DataFrame(rows), notes
