"""Classical rules against the reference on labelled nights (the rule-versus-reference report).

Each rule is reported twice: as published (its method id; coefficients, count scale and
threshold as given) and calibrated to the study's count units leave-participants-out
(``<method>:calibrated``, :mod:`models.agreement.rule_calibration`: the count scale, or the
count-threshold's threshold in counts, chosen on the other participants' labelled nights).

Each night's rules and the always-sleep baseline are compared with its reference by
:func:`models.agreement.comparison.compare_night`, and the nights are tabulated by
:func:`models.agreement.comparison.comparison_tables`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..nights.night import MovementTimePolicy, Night
from ..scoring.rescoring import InvalidSleepVectorError, as_sleep_vector
from ..scoring.rules import METHOD_IDS, score_with_rule
from .comparison import ComparisonTables, compare_night, comparison_tables
from .epoch_metrics import ALWAYS_SLEEP, always_sleep
from .rule_calibration import RuleCalibration, calibrate_rules

__all__ = ["NightRecord", "compare_rules_with_reference"]


@dataclass(frozen=True, eq=False)
class NightRecord:
    """One night for :func:`compare_rules_with_reference`.

    Attributes
    ----------
    participant_id, night_id : str
    reference : ndarray of shape (n_epochs,)
        Reference labels: 1 = sleep, 0 = wake, NaN = unscored.
    counts : ndarray of shape (n_epochs,)
        Activity counts per epoch (NaN = missing).
    epoch_seconds : {15, 30, 60}
    lights_off_idx : int, default=0
        First in-bed epoch.
    lights_on_idx : int or None, default=None
        End of the in-bed interval (exclusive); None = end of the recording.
    label : str or None, default=None
        The lab's own name for the night (its own column in the tables).
    """

    participant_id: str
    night_id: str
    reference: NDArray[np.float64]
    counts: NDArray[np.float64]
    epoch_seconds: int
    lights_off_idx: int = 0
    lights_on_idx: int | None = None
    label: str | None = None

    @classmethod
    def from_night(cls, night: Night, *, night_id: str | None = None,
                   movement_time: MovementTimePolicy = "wake") -> NightRecord:
        """Record of a labelled :class:`~models.nights.night.Night` (its in-bed interval and reference).

        ``night_id`` defaults to :attr:`Night.night_id <models.nights.night.Night.night_id>`.
        """
        reference = night.reference_sleep(movement_time=movement_time)
        if reference is None:
            raise InvalidSleepVectorError(f"night {night.label or night.night_id!r} has no reference labels")
        first, stop = night.in_bed
        return cls(participant_id=night.participant_id, night_id=night_id or night.night_id, reference=reference,
                   counts=night.counts, epoch_seconds=night.epoch_seconds, lights_off_idx=first, lights_on_idx=stop,
                   label=night.label)


def _sides(night: NightRecord, reference: NDArray[np.float64], methods: Sequence[str], count_scale: float,
           rule_options: Mapping[str, Mapping[str, Any]],
           calibrations: Mapping[str, RuleCalibration]) -> dict[str, tuple[ArrayLike, ArrayLike | None]]:
    sides: dict[str, tuple[ArrayLike, ArrayLike | None]] = {ALWAYS_SLEEP: (always_sleep(reference), None)}
    for method in methods:
        options = rule_options.get(method.partition("+")[0], {})
        result = score_with_rule(night.counts, night.epoch_seconds, method, count_scale=count_scale, **options)
        sides[method] = (result.sleep, result.score)
    for method, calibration in calibrations.items():
        options = calibration.options(night.participant_id, rule_options.get(method.partition("+")[0]),
                                      count_scale=count_scale)
        result = score_with_rule(night.counts, night.epoch_seconds, method, **options)
        sides[calibration.name] = (result.sleep, result.score)
    return sides


def compare_rules_with_reference(
        nights: Sequence[NightRecord], *, methods: Sequence[str] = METHOD_IDS, count_scale: float = 1.0,
        rule_options: Mapping[str, Mapping[str, Any]] | None = None,
        parameter_options: Mapping[str, Any] | None = None, calibrate: bool = True,
        groups: Mapping[str, int] | None = None) -> ComparisonTables:
    """Score nights with classical rules and compare them with their reference labels.

    Each rule scores the whole recording (so its windows see the epochs around lights-off and
    lights-on); every comparison uses the in-bed epochs only. The always-sleep baseline is
    always included, right after the reference. Epochs with missing counts are unscored by every
    rule; they and the reference's unscored epochs are masked on both sides of every parameter
    difference and left out of the epoch metrics (:func:`~models.agreement.comparison.compare_night`),
    so every side covers the same epochs.

    Parameters
    ----------
    nights : sequence of NightRecord
    methods : sequence of str, default=METHOD_IDS
        Method ids of :func:`models.scoring.rules.score_with_rule`.
    count_scale : float, default=1.0
        Factor applied to the counts before every rule.
    rule_options : mapping, default=None
        Options per base method id, e.g. ``{"count-threshold": {"threshold": 20}}``.
    parameter_options : mapping, default=None
        Keyword options of :func:`models.scoring.parameters.sleep_parameters` (same for every side).
    calibrate : bool, default=True
        Also report each rule calibrated leave-participants-out (``<method>:calibrated``,
        after all published rules; :func:`~models.agreement.rule_calibration.calibrate_rules`).
        Nights of fewer than two participant groups give no calibrated rows.
    groups : mapping of str to int, default=None
        Participant -> group for the calibration (participants sharing a night left out
        together); None = each participant their own group.

    Returns
    -------
    ComparisonTables
        Epoch metrics, parameters, per-night parameter errors and Bland-Altman statistics of the
        baseline and every rule (published, then calibrated).

    Raises
    ------
    InvalidSleepVectorError
        If a night's reference and counts differ in length.
    UnknownMethodError, InvalidRuleOptionError, InvalidInBedIntervalError
        As raised by the rule and parameter functions.
    """
    rule_options = rule_options or {}
    references = []
    for night in nights:
        reference = as_sleep_vector(night.reference, allow_unscored=True, name="reference")
        if reference.size != np.shape(night.counts)[0]:
            raise InvalidSleepVectorError(f"night {night.night_id!r}: reference has {reference.size} epochs, "
                                          f"counts {np.shape(night.counts)[0]}")
        references.append(reference)
    calibrations = calibrate_rules(nights, methods, groups=groups, count_scale=count_scale,
                                   rule_options=rule_options) if calibrate else {}
    compared = [compare_night(
        reference, _sides(night, reference, methods, count_scale, rule_options, calibrations),
        epoch_seconds=night.epoch_seconds, lights_off_idx=night.lights_off_idx,
        lights_on_idx=night.lights_on_idx, parameter_options=parameter_options,
        participant_id=night.participant_id, night_id=night.night_id, label=night.label,
        missing=~np.isfinite(np.asarray(night.counts, dtype=np.float64)))
        for night, reference in zip(nights, references, strict=True)]
    return comparison_tables(compared)
