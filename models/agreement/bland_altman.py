"""Agreement of night-level sleep parameters across nights (Bland-Altman).

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

from collections.abc import Iterator, Sequence
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from ..scoring.parameters import PARAMETER_NAMES
from ..scoring.rescoring import InvalidSleepVectorError
from ._bootstrap import InvalidAgreementInputError

__all__ = ["BLAND_ALTMAN_PARAMETERS", "BlandAltman", "REFERENCE", "bland_altman", "bland_altman_table",
           "matched_nights"]

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
        parameter columns (as :attr:`models.agreement.comparison.ComparisonTables.parameters`).
    reference_method : str, default="reference"
        The ``method`` value of the reference rows.
    parameter_names : sequence of str, default=BLAND_ALTMAN_PARAMETERS

    Returns
    -------
    table : pandas.DataFrame
        One row per method and parameter: ``method``, ``parameter`` and the
        :class:`BlandAltman` fields. Nights are matched on (participant_id, night_id).
    """
    rows = []
    for method, own, ref in matched_nights(parameters, reference_method=reference_method,
                                           parameter_names=parameter_names):
        for name in parameter_names:
            rows.append({"method": method, "parameter": name} | asdict(bland_altman(own[name], ref[name])))
    return pd.DataFrame(rows, columns=["method", "parameter", *BlandAltman.__dataclass_fields__])


def matched_nights(parameters: pd.DataFrame, *, reference_method: str = REFERENCE,
                   parameter_names: Sequence[str] = ()) -> Iterator[tuple[str, pd.DataFrame, pd.DataFrame]]:
    """Each method's rows of a parameter table aligned with the reference's rows.

    Parameters
    ----------
    parameters : pandas.DataFrame
        One row per night and method (``participant_id``, ``night_id``, ``method``, parameters).
    reference_method : str, default="reference"
    parameter_names : sequence of str, default=()
        Parameter columns that must be present.

    Yields
    ------
    method : str
        Every method but the reference, in order of first appearance.
    own, reference : pandas.DataFrame
        Indexed by (participant_id, night_id) in the reference's night order; ``own`` has NaN
        rows for the reference nights the method lacks.

    Raises
    ------
    InvalidAgreementInputError
        If a needed column is missing (raised before anything is yielded).
    """
    missing = sorted({"participant_id", "night_id", "method", *parameter_names} - set(parameters.columns))
    if missing:
        raise InvalidAgreementInputError(f"parameter table lacks the columns {', '.join(missing)}")
    return _matched(parameters, reference_method)


def _matched(parameters: pd.DataFrame, reference_method: str) -> Iterator[tuple[str, pd.DataFrame, pd.DataFrame]]:
    keys = ["participant_id", "night_id"]
    ref = parameters[parameters["method"] == reference_method].set_index(keys)
    for method in dict.fromkeys(parameters["method"]):
        if method != reference_method:
            yield str(method), parameters[parameters["method"] == method].set_index(keys).reindex(ref.index), ref
