"""Is a night's reference plausible? Checks that catch a reference read the wrong way round or mis-coded.

A reference whose codes were mapped with the wrong polarity (1 read as sleep where the lab wrote
1 for wake), shifted or taken from the wrong column looks like a valid night, and would silently
spoil every comparison and model trained on it. Three figures expose it:

* **sleep efficiency** of the reference within the in-bed period (100 x reference sleep / scored
  in-bed epochs): healthy and clinical nights alike rarely go below 40 % in a sleep laboratory;
* **movement**, over the whole recording: the actigraph moves more in reference wake than in
  reference sleep, so the mean counts of reference-sleep epochs must not exceed (a multiple of)
  those of reference-wake epochs. The whole recording is used because quiet wake in bed alone can
  move less than sleep with its postural shifts;
* **a classical rule agrees**, over the whole recording: Cole–Kripke's sleep/wake calls reach a
  balanced accuracy of about 0.6-0.8 against PSG; a value far below 0.5 means the reference runs
  against the movement.

A night fails when any figure crosses its threshold. A figure that cannot be computed (a reference
without wake epochs has no wake mean and no balanced accuracy) is not held against the night.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import InvalidNightError, Problem
from ..nights.night import MovementTimePolicy, Night
from ..nights.quality import QCFlag
from ..scoring.parameters import sleep_parameters
from ..scoring.rules import score_with_rule
from .epoch_metrics import epoch_agreement

__all__ = ["PlausibilityConfig", "PlausibilityReport", "check_reference", "reference_plausibility"]


@dataclass(frozen=True)
class PlausibilityConfig:
    """Thresholds of the reference checks (documented defaults).

    Parameters
    ----------
    min_sleep_efficiency_pct : float, default=40.0
        Lowest plausible reference sleep efficiency within the in-bed period, percent (common
        practice: PSG nights below 40 % are rare even in insomnia).
    rule : str, default="cole-kripke"
        Classical method compared with the reference (a method id of
        :data:`~models.scoring.rules.METHOD_IDS`).
    min_rule_balanced_accuracy : float, default=0.35
        Lowest plausible balanced accuracy of ``rule`` against the reference (0.5 is chance; common
        practice: count rules reach about 0.6-0.8 against PSG, so below 0.35 they disagree more
        than chance allows).
    max_sleep_to_wake_counts_ratio : float, default=1.5
        Mean counts in reference-sleep epochs may be at most this multiple of the mean counts in
        reference-wake epochs (chosen here: a labelling unrelated to movement gives a ratio near 1
        and a reversed one far above it, since wake moves several times more than sleep).
    min_scored_epochs : int, default=120
        Fewer scored in-bed reference epochs than this (1 h of 30-s epochs) and the night is not
        checked: the figures would be noise.
    movement_time : {"wake", "sleep", "exclude"}, default="wake"
        How R&K movement-time epochs count.
    """

    min_sleep_efficiency_pct: float = 40.0
    rule: str = "cole-kripke"
    min_rule_balanced_accuracy: float = 0.35
    max_sleep_to_wake_counts_ratio: float = 1.5
    min_scored_epochs: int = 120
    movement_time: MovementTimePolicy = "wake"


@dataclass(frozen=True)
class PlausibilityReport:
    """The figures of the reference checks of one night.

    Attributes
    ----------
    checked : bool
        False when the night has no reference or too few scored in-bed epochs (figures NaN).
    n_scored_epochs : int
        Scored reference epochs in the in-bed period.
    sleep_efficiency_pct : float
        Reference sleep efficiency within the in-bed period, percent.
    mean_counts_sleep, mean_counts_wake : float
        Mean counts per epoch in reference-sleep and reference-wake epochs of the whole recording
        (missing epochs left out; counts capped at the night's 99th percentile, so a single spike
        does not decide).
    rule_balanced_accuracy : float
        Balanced accuracy of the configured rule against the reference, scored epochs of the whole
        recording.
    reasons : list of str
        One sentence per failed check; empty when plausible.
    """

    checked: bool
    n_scored_epochs: int
    sleep_efficiency_pct: float
    mean_counts_sleep: float
    mean_counts_wake: float
    rule_balanced_accuracy: float
    reasons: list[str] = field(default_factory=list)

    @property
    def plausible(self) -> bool:
        """True unless a check failed."""
        return not self.reasons

    def figures(self) -> dict[str, float]:
        """The four figures by name (NaN as None)."""
        out = {"sleep_efficiency_pct": self.sleep_efficiency_pct, "mean_counts_sleep": self.mean_counts_sleep,
               "mean_counts_wake": self.mean_counts_wake, "rule_balanced_accuracy": self.rule_balanced_accuracy}
        return {k: (None if np.isnan(v) else round(float(v), 4)) for k, v in out.items()}  # type: ignore[misc]

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form (NaN figures as null)."""
        return {"checked": self.checked, "plausible": self.plausible, "n_scored_epochs": self.n_scored_epochs,
                **self.figures(), "reasons": list(self.reasons)}


def _mean(values: np.ndarray) -> float:
    values = values[np.isfinite(values)]
    return float(values.mean()) if values.size else float("nan")


def reference_plausibility(night: Night, *, config: PlausibilityConfig = PlausibilityConfig()) -> PlausibilityReport:
    """The figures of the reference checks of a night (see the module docstring).

    Parameters
    ----------
    night : Night
    config : PlausibilityConfig

    Returns
    -------
    PlausibilityReport
        ``checked`` is False for a night without reference or with fewer than
        ``config.min_scored_epochs`` scored in-bed epochs.
    """
    nan = float("nan")
    sleep = night.reference_sleep(movement_time=config.movement_time)
    first, stop = night.in_bed
    scored = 0 if sleep is None else int(np.isfinite(sleep[first:stop]).sum())
    if sleep is None or scored < config.min_scored_epochs:
        return PlausibilityReport(False, scored, nan, nan, nan, nan)
    params = sleep_parameters(sleep, night.epoch_seconds, lights_off_idx=first, lights_on_idx=stop)
    # counts capped at the night's 99th percentile first, so one spike cannot turn the comparison round
    # (winsorising; common practice for means of heavy-tailed counts)
    present = night.counts[np.isfinite(night.counts)]
    capped = np.minimum(night.counts, np.percentile(present, 99)) if present.size else night.counts
    mean_sleep, mean_wake = _mean(capped[sleep == 1]), _mean(capped[sleep == 0])
    calls = score_with_rule(night.counts, night.epoch_seconds, config.rule).sleep
    balanced = epoch_agreement(sleep, calls)["balanced_accuracy"]
    reasons: list[str] = []
    se = float(params.sleep_efficiency_pct)
    if se < config.min_sleep_efficiency_pct:
        reasons.append(f"reference sleep efficiency {se:.1f}% is below {config.min_sleep_efficiency_pct:g}%")
    ratio = config.max_sleep_to_wake_counts_ratio
    if np.isfinite(mean_sleep) and np.isfinite(mean_wake) and mean_sleep > ratio * mean_wake:
        reasons.append(f"mean counts in reference sleep ({mean_sleep:.2f}) exceed "
                       f"{'' if ratio == 1 else f'{ratio:g} x '}those in reference wake ({mean_wake:.2f})")
    if np.isfinite(balanced) and balanced < config.min_rule_balanced_accuracy:
        reasons.append(f"{config.rule} agrees with the reference at a balanced accuracy of {balanced:.3f}, below "
                       f"{config.min_rule_balanced_accuracy:g}")
    return PlausibilityReport(True, scored, se, mean_sleep, mean_wake, float(balanced), reasons)


def check_reference(night: Night, *, accept: bool = False,
                    config: PlausibilityConfig = PlausibilityConfig()) -> QCFlag | None:
    """Refuse, or flag when accepted, a night whose reference is implausible.

    Parameters
    ----------
    night : Night
    accept : bool, default=False
        Keep an implausible reference anyway (the lab has confirmed it): return a flag instead of
        raising.
    config : PlausibilityConfig

    Returns
    -------
    QCFlag or None
        None when the reference is plausible or not checked (no reference, too few scored epochs);
        a ``reference_implausible`` flag over the in-bed epochs when implausible and ``accept``.

    Raises
    ------
    InvalidNightError
        Problem ``reference_implausible`` (field ``reference``, with the figures) when implausible
        and not accepted.
    """
    report = reference_plausibility(night, config=config)
    if not report.checked or report.plausible:
        return None
    message = "the reference looks implausible (codes mapped the wrong way round?): " + "; ".join(report.reasons)
    thresholds = {"min_sleep_efficiency_pct": config.min_sleep_efficiency_pct,
                  "min_rule_balanced_accuracy": config.min_rule_balanced_accuracy,
                  "max_sleep_to_wake_counts_ratio": config.max_sleep_to_wake_counts_ratio}
    if accept:
        first, stop = night.in_bed
        return QCFlag("reference_implausible", message + " (accepted)", [(first, stop)], thresholds)
    raise InvalidNightError([Problem("reference_implausible", message,
                                     {"field": "reference", **report.figures(), "thresholds": thresholds})],
                            source=night.source_name)
