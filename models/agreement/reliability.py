"""Intraclass correlation for absolute agreement: ICC(A,1).

McGraw & Wong 1996 (Psychol Methods 1:30-46), two-way random effects, absolute agreement, single
measure (the same coefficient as Shrout & Fleiss 1979 ICC(2,1)). For ``n`` targets (nights or
participants) rated by ``k`` methods (e.g. the method and PSG), from the two-way ANOVA without
replication:

- ``ICC = (MSR - MSE) / (MSR + (k - 1) MSE + k (MSC - MSE) / n)``
  (MSR rows = targets, MSC columns = methods, MSE residual);
- confidence interval (McGraw & Wong 1996, Table 7 case 2A; Shrout & Fleiss 1979) with
  ``a = k ICC / (n (1 - ICC))``, ``b = 1 + k ICC (n - 1) / (n (1 - ICC))``,
  ``v = (a MSC + b MSE)^2 / ((a MSC)^2 / (k - 1) + (b MSE)^2 / ((n - 1)(k - 1)))``,
  ``F* = F(1 - alpha/2; n - 1, v)``, ``F_* = F(1 - alpha/2; v, n - 1)``:
  ``lower = n (MSR - F* MSE) / (F* (k MSC + (k n - k - n) MSE) + n MSR)``,
  ``upper = n (F_* MSR - MSE) / (k MSC + (k n - k - n) MSE + n F_* MSR)``;
- the F test of ICC = 0: ``MSR / MSE`` on (n - 1, (n - 1)(k - 1)) degrees of freedom.

Unlike a correlation, ICC(A,1) is lowered by a systematic difference between the methods.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats

from ._bootstrap import InvalidAgreementInputError, json_dict

__all__ = ["IccResult", "icc_a1"]


@dataclass(frozen=True)
class IccResult:
    """ICC(A,1) of one set of ratings.

    Attributes
    ----------
    icc : float
        Unitless, at most 1; NaN when undefined (fewer than 2 targets, or no variation at all).
    ci : tuple of float
        (low, high) at ``ci_level``.
    ci_level : float
    n_targets, n_raters : int
        Complete rows used, and columns.
    ms_rows, ms_columns, ms_error : float
        Mean squares of the two-way ANOVA (squared rating unit).
    f_value, p_value : float
        F test of ICC = 0 (``MSR / MSE``).
    """

    icc: float
    ci: tuple[float, float]
    ci_level: float
    n_targets: int
    n_raters: int
    ms_rows: float
    ms_columns: float
    ms_error: float
    f_value: float
    p_value: float

    def to_dict(self) -> dict[str, Any]:
        """Every field, JSON-safe."""
        return json_dict({name: getattr(self, name) for name in self.__dataclass_fields__})


def icc_a1(ratings: ArrayLike, *, ci_level: float = 0.95) -> IccResult:
    """ICC(A,1): two-way random effects, absolute agreement, single measure.

    Parameters
    ----------
    ratings : array-like of shape (n_targets, n_raters)
        One row per target (e.g. night), one column per method (e.g. method, PSG); rows with a
        non-finite value are left out.
    ci_level : float, default=0.95

    Returns
    -------
    IccResult

    Raises
    ------
    InvalidAgreementInputError
        If ``ratings`` is not 2-D with at least 2 columns, or ``ci_level`` is outside (0, 1).

    Examples
    --------
    >>> round(icc_a1([[1, 2], [2, 3], [3, 4], [4, 5]]).icc, 4)  # a constant offset lowers it
    0.7692
    """
    x = np.asarray(ratings, dtype=np.float64)
    if x.ndim != 2 or x.shape[1] < 2:
        raise InvalidAgreementInputError(f"ratings must have shape (n_targets, n_raters >= 2), got {x.shape}")
    if not 0.0 < ci_level < 1.0:
        raise InvalidAgreementInputError(f"ci_level must be in (0, 1), got {ci_level!r}")
    x = x[np.isfinite(x).all(axis=1)]
    n, k = x.shape
    nan = float("nan")
    if n < 2:
        return IccResult(nan, (nan, nan), ci_level, n, k, nan, nan, nan, nan, nan)
    grand = x.mean()
    ss_rows = k * float(((x.mean(axis=1) - grand) ** 2).sum())
    ss_cols = n * float(((x.mean(axis=0) - grand) ** 2).sum())
    ss_error = max(float(((x - grand) ** 2).sum()) - ss_rows - ss_cols, 0.0)
    msr, msc, mse = ss_rows / (n - 1), ss_cols / (k - 1), ss_error / ((n - 1) * (k - 1))
    denominator = msr + (k - 1) * mse + k * (msc - mse) / n
    if denominator <= 0:
        return IccResult(nan, (nan, nan), ci_level, n, k, msr, msc, mse, nan, nan)
    icc = (msr - mse) / denominator
    df_error = (n - 1) * (k - 1)
    f_value = msr / mse if mse > 0 else float("inf")
    p_value = float(stats.f.sf(f_value, n - 1, df_error)) if mse > 0 else 0.0
    low = high = nan
    if mse > 0 and icc < 1.0:
        a = k * icc / (n * (1.0 - icc))
        b = 1.0 + k * icc * (n - 1) / (n * (1.0 - icc))
        v = (a * msc + b * mse) ** 2 / ((a * msc) ** 2 / (k - 1) + (b * mse) ** 2 / df_error)
        tail = 1.0 - (1.0 - ci_level) / 2.0
        f_low, f_high = float(stats.f.ppf(tail, n - 1, v)), float(stats.f.ppf(tail, v, n - 1))
        spread = k * msc + (k * n - k - n) * mse
        low = n * (msr - f_low * mse) / (f_low * spread + n * msr)
        high = n * (f_high * msr - mse) / (spread + n * f_high * msr)
    return IccResult(icc=float(icc), ci=(float(low), float(high)), ci_level=ci_level, n_targets=n, n_raters=k,
                     ms_rows=msr, ms_columns=msc, ms_error=mse, f_value=float(f_value), p_value=p_value)
