"""Agreement of night-level sleep parameters (Bland-Altman) and the rule-versus-reference report.

Convention: difference = method - reference, for every night where both values are finite.

Bland-Altman (Bland & Altman 1986, Lancet; 1999, Stat Methods Med Res 8:135-160):

- bias = mean difference; SD of differences with ddof=1; 95% limits of agreement
  ``bias -/+ 1.96 SD``.
- 95% CI of the bias: ``bias -/+ t(0.975, n-1) * SD / sqrt(n)``.
- 95% CI of each limit: ``limit -/+ t(0.975, n-1) * sqrt(3 SD^2 / n)``, the approximate
  standard error of a limit given by Bland & Altman (1986, 1999).
- proportional bias: ordinary least squares of the difference on the pair mean
  (:func:`scipy.stats.linregress`): slope, intercept and the slope's two-sided p-value.
- log-ratio variant (Bland & Altman 1999): the same on ``ln(method) - ln(reference)``,
  back-transformed into a ratio method/reference (geometric mean ratio and its 95% limits).
  Pairs with a zero or negative value have no logarithm: they are left out of this variant
  only, and ``n_log`` says how many pairs it used (no offset is added, as an offset would change
  what the ratio means).
- mean absolute error: mean of ``|difference|``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from .epoch_metrics import ALWAYS_SLEEP, ScoredNight, agreement_table, always_sleep
from ..nights.night import MovementTimePolicy, Night
from ..scoring.parameters import PARAMETER_NAMES, sleep_parameters
from ..scoring.rescoring import InvalidSleepVectorError, as_sleep_vector
from ..scoring.rules import METHOD_IDS, score_with_rule

__all__ = [
    "BLAND_ALTMAN_PARAMETERS",
    "BlandAltman",
    "NightRecord",
    "REFERENCE",
    "RuleComparison",
    "bland_altman",
    "bland_altman_table",
    "compare_rules_with_reference",
]

#: Method label of the reference labels in parameter tables.
REFERENCE = "reference"
#: Parameters compared by Bland-Altman (time in bed and unscored epochs are the same on both sides).
BLAND_ALTMAN_PARAMETERS: tuple[str, ...] = tuple(
    p for p in PARAMETER_NAMES if p not in ("time_in_bed_min", "unscored_epochs"))
_LOA_Z = 1.96  # Bland & Altman 1986


@dataclass(frozen=True)
class BlandAltman:
    """Bland-Altman statistics of one parameter, one method against the reference.

    All values are in the parameter's unit except ``slope`` (unitless), ``slope_p_value`` and the
    ``ratio_*`` fields (ratios method/reference). NaN where too few pairs: bias and MAE need 1
    pair, SD, limits and CIs 2, the regression 3 with distinct means.
    """

    n: int
    bias: float
    sd: float
    loa_lower: float
    loa_upper: float
    bias_ci_lower: float
    bias_ci_upper: float
    loa_lower_ci_lower: float
    loa_lower_ci_upper: float
    loa_upper_ci_lower: float
    loa_upper_ci_upper: float
    slope: float
    intercept: float
    slope_p_value: float
    mae: float
    n_log: int
    ratio_bias: float
    ratio_loa_lower: float
    ratio_loa_upper: float


def _limits(d: NDArray[np.float64]) -> tuple[float, ...]:
    """Bias, SD, limits and their 95% CIs (NaN where n is too small)."""
    nan = float("nan")
    n = d.size
    if n == 0:
        return (nan,) * 10
    bias = float(d.mean())
    if n == 1:
        return (bias,) + (nan,) * 9
    sd = float(d.std(ddof=1))
    t = float(stats.t.ppf(0.975, n - 1))
    se_bias, se_limit = sd / np.sqrt(n), np.sqrt(3.0 * sd**2 / n)
    lower, upper = bias - _LOA_Z * sd, bias + _LOA_Z * sd
    return (bias, sd, lower, upper, bias - t * se_bias, bias + t * se_bias,
            lower - t * se_limit, lower + t * se_limit, upper - t * se_limit, upper + t * se_limit)


def bland_altman(method: ArrayLike, reference: ArrayLike) -> BlandAltman:
    """Bland-Altman agreement of one night-level parameter across nights.

    Parameters
    ----------
    method : array-like of shape (n_nights,)
        The method's value per night (NaN = not available).
    reference : array-like of shape (n_nights,)
        The reference value per night, same unit.

    Returns
    -------
    BlandAltman

    Raises
    ------
    InvalidSleepVectorError
        If the inputs differ in length.

    Examples
    --------
    >>> r = bland_altman([2.0, 4.0, 6.0], [1.0, 2.0, 3.0])
    >>> r.bias, r.sd, r.ratio_bias
    (2.0, 1.0, 2.0)
    """
    m, r = np.asarray(method, dtype=np.float64), np.asarray(reference, dtype=np.float64)
    if m.shape != r.shape or m.ndim != 1:
        raise InvalidSleepVectorError(f"method {m.shape} and reference {r.shape} must be 1-D of the same length")
    both = np.isfinite(m) & np.isfinite(r)
    m, r = m[both], r[both]
    d = m - r
    bias, sd, lower, upper, *cis = _limits(d)
    nan = float("nan")
    slope = intercept = p_value = nan
    means = (m + r) / 2.0
    if d.size >= 3 and np.ptp(means) > 0:
        fit = stats.linregress(means, d)
        slope, intercept, p_value = float(fit.slope), float(fit.intercept), float(fit.pvalue)
    positive = (m > 0) & (r > 0)
    log_bias, _, log_lower, log_upper, *_ = _limits(np.log(m[positive]) - np.log(r[positive]))
    return BlandAltman(
        n=int(d.size), bias=bias, sd=sd, loa_lower=lower, loa_upper=upper,
        bias_ci_lower=cis[0], bias_ci_upper=cis[1], loa_lower_ci_lower=cis[2], loa_lower_ci_upper=cis[3],
        loa_upper_ci_lower=cis[4], loa_upper_ci_upper=cis[5],
        slope=slope, intercept=intercept, slope_p_value=p_value,
        mae=float(np.abs(d).mean()) if d.size else nan,
        n_log=int(positive.sum()), ratio_bias=float(np.exp(log_bias)),
        ratio_loa_lower=float(np.exp(log_lower)), ratio_loa_upper=float(np.exp(log_upper)))


def bland_altman_table(parameters: pd.DataFrame, *, reference_method: str = REFERENCE,
                       parameter_names: Sequence[str] = BLAND_ALTMAN_PARAMETERS) -> pd.DataFrame:
    """Bland-Altman statistics of every method against the reference, per parameter.

    Parameters
    ----------
    parameters : pandas.DataFrame
        One row per night and method: ``participant_id``, ``night_id``, ``method`` and the
        parameter columns (as returned in :attr:`RuleComparison.parameters`).
    reference_method : str, default="reference"
        The ``method`` value of the reference rows.
    parameter_names : sequence of str, default=BLAND_ALTMAN_PARAMETERS

    Returns
    -------
    table : pandas.DataFrame
        One row per method and parameter: ``method``, ``parameter`` and the
        :class:`BlandAltman` fields. Nights are matched on (participant_id, night_id).
    """
    keys = ["participant_id", "night_id"]
    ref = parameters[parameters["method"] == reference_method].set_index(keys)
    rows = []
    for method in dict.fromkeys(parameters["method"]):
        if method == reference_method:
            continue
        own = parameters[parameters["method"] == method].set_index(keys).reindex(ref.index)
        for name in parameter_names:
            rows.append({"method": method, "parameter": name} | asdict(bland_altman(own[name], ref[name])))
    return pd.DataFrame(rows, columns=["method", "parameter", *BlandAltman.__dataclass_fields__])


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
    """

    participant_id: str
    night_id: str
    reference: NDArray[np.float64]
    counts: NDArray[np.float64]
    epoch_seconds: int
    lights_off_idx: int = 0
    lights_on_idx: int | None = None

    @classmethod
    def from_night(cls, night: Night, *, night_id: str | None = None,
                   movement_time: MovementTimePolicy = "wake") -> NightRecord:
        """Record of a labelled :class:`~models.nights.night.Night` (its in-bed interval and reference)."""
        reference = night.reference_sleep(movement_time=movement_time)
        if reference is None:
            raise InvalidSleepVectorError(f"night {night.label or night.content_hash[:12]!r} has no reference labels")
        first, stop = night.in_bed
        return cls(participant_id=night.participant_id, night_id=night_id or night.label or night.content_hash[:12],
                   reference=reference, counts=night.counts, epoch_seconds=night.epoch_seconds,
                   lights_off_idx=first, lights_on_idx=stop)


@dataclass(frozen=True, eq=False)
class RuleComparison:
    """Everything a rule-versus-reference report shows.

    Attributes
    ----------
    epoch_metrics : pandas.DataFrame
        :func:`models.agreement.epoch_metrics.agreement_table` of every method and the always-sleep baseline.
    parameters : pandas.DataFrame
        One row per night and method (the reference first, then the baseline and the methods):
        ``participant_id``, ``night_id``, ``method``, :data:`~models.scoring.parameters.PARAMETER_NAMES`,
        ``sleep_onset_idx`` and ``final_awakening_idx``.
    bland_altman : pandas.DataFrame
        :func:`bland_altman_table` of every method and the baseline against the reference.
    """

    epoch_metrics: pd.DataFrame
    parameters: pd.DataFrame
    bland_altman: pd.DataFrame = field(repr=False)


def compare_rules_with_reference(
        nights: Sequence[NightRecord], *, methods: Sequence[str] = METHOD_IDS, count_scale: float = 1.0,
        rule_options: Mapping[str, Mapping[str, Any]] | None = None,
        parameter_options: Mapping[str, Any] | None = None) -> RuleComparison:
    """Score nights with classical rules and compare them with their reference labels.

    Each rule scores the whole recording (so its windows see the epochs around lights-off and
    lights-on); every comparison uses the in-bed epochs only. The always-sleep baseline is
    always included. A method's parameters are computed with the reference's unscored epochs
    masked out too, so both sides of a difference cover the same epochs.

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

    Returns
    -------
    RuleComparison

    Raises
    ------
    InvalidSleepVectorError
        If a night's reference and counts differ in length.
    UnknownMethodError, InvalidRuleOptionError, InvalidInBedIntervalError
        As raised by the rule and parameter functions.
    """
    rule_options = rule_options or {}
    parameter_options = dict(parameter_options or {})
    scored: list[ScoredNight] = []
    param_rows: list[dict[str, Any]] = []
    for night in nights:
        ref = as_sleep_vector(night.reference, allow_unscored=True, name="reference")
        if ref.size != np.shape(night.counts)[0]:
            raise InvalidSleepVectorError(
                f"night {night.night_id!r}: reference has {ref.size} epochs, counts {np.shape(night.counts)[0]}")
        bed = slice(night.lights_off_idx, ref.size if night.lights_on_idx is None else night.lights_on_idx)
        unscored = np.isnan(ref)
        sides: list[tuple[str, NDArray[np.generic], NDArray[np.float64] | None]] = [
            (REFERENCE, ref, None), (ALWAYS_SLEEP, always_sleep(ref), None)]
        for method in methods:
            options = rule_options.get(method.partition("+")[0], {})
            result = score_with_rule(night.counts, night.epoch_seconds, method, count_scale=count_scale, **options)
            sides.append((method, result.sleep, result.score))
        ids = {"participant_id": night.participant_id, "night_id": night.night_id}
        for method, sleep, score in sides:
            masked = np.where(unscored, np.nan, sleep)
            params = sleep_parameters(masked, night.epoch_seconds, lights_off_idx=night.lights_off_idx,
                                      lights_on_idx=night.lights_on_idx, **parameter_options)
            param_rows.append(ids | {"method": method} | params.as_dict())
            if method != REFERENCE:
                scored.append(ScoredNight(participant_id=night.participant_id, night_id=night.night_id,
                                          method=method, reference=ref[bed], predicted=sleep[bed],
                                          score=None if score is None else score[bed]))
    param_columns = ["participant_id", "night_id", "method", *PARAMETER_NAMES, "sleep_onset_idx",
                     "final_awakening_idx"]
    parameters = pd.DataFrame(param_rows, columns=param_columns)
    return RuleComparison(epoch_metrics=agreement_table(scored), parameters=parameters,
                          bland_altman=bland_altman_table(parameters))
