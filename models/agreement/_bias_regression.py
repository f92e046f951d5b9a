"""Proportional bias and regression-based limits for differences with repeated nights.

Bland & Altman 1999 (Stat Methods Med Res 8:135-160), regression method: the difference on the
magnitude ``A`` (pair mean, or the reference value), ``d = b0 + b1 A``; the size of the residuals
on the same magnitude, ``|r| = c0 + c1 A``; limits ``b0 + b1 A -/+ 1.96 sqrt(pi/2) (c0 + c1 A)``
(from memory: ``sqrt(pi/2)`` turns a mean absolute residual into an SD under normality).

With several nights per participant the difference regression has a random intercept per
participant (REML; the estimate statsmodels ``MixedLM`` makes, computed in closed form per participant
by :mod:`._random_intercept`) — unless the least-squares residuals show no
between-participant variance (one-way ANOVA, MS_between <= MS_within), where the REML variance
estimate is at its boundary and the fit is least squares with participant-clustered standard
errors instead; the residual-size regression is ordinary least
squares, as in the 1999 method, with participant-clustered (sandwich; Liang & Zeger 1986, from
memory) standard errors for its slope test (a random intercept adds nothing there: the size of a
residual has little participant structure, and the fit then sits on the variance boundary where
a REML fit is slow and reduces to least squares). When every participant has one night both
are ordinary least squares. The residuals of the second regression are taken from the fixed
part of the first (``r = d - b0 - b1 A``), so they keep the between-participant spread that
the limits must cover.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import statsmodels.api as sm  # type: ignore[import-untyped]
from numpy.typing import NDArray

from ._random_intercept import random_intercept_line

__all__ = ["ABS_TO_SD", "CLUSTERED_MODEL", "MIXED_MODEL", "OLS_MODEL", "bias_regressions"]

MIXED_MODEL = "random intercept per participant (MixedLM, REML)"  # the statsmodels model it equals
OLS_MODEL = "ordinary least squares (one night per participant)"
CLUSTERED_MODEL = "ordinary least squares, participant-clustered standard errors"
#: sqrt(pi/2): mean absolute deviation to SD under normality (Bland & Altman 1999; from memory).
ABS_TO_SD = math.sqrt(math.pi / 2.0)


def _fit(y: NDArray[np.float64], x: NDArray[np.float64], groups: NDArray[np.intp],
         alpha: float, *, mixed: bool = True) -> dict[str, Any]:
    """Intercept, slope, slope CI and p-value of ``y ~ x``.

    With repeated groups: a random intercept per group (``mixed``) or least squares with
    group-clustered standard errors; without: ordinary least squares.
    """
    repeated = np.unique(groups).size < groups.size
    model = MIXED_MODEL if repeated and mixed else CLUSTERED_MODEL if repeated else OLS_MODEL
    if repeated and mixed:
        _, codes = np.unique(groups, return_inverse=True)
        return random_intercept_line(y, x, codes, alpha) | {"model": model}
    design = sm.add_constant(x, has_constant="add")
    result = sm.OLS(y, design).fit(**({"cov_type": "cluster", "cov_kwds": {"groups": groups}} if repeated else {}))
    params = np.asarray(result.params, dtype=np.float64)
    ci = np.asarray(result.conf_int(alpha=alpha), dtype=np.float64)
    p_values = np.asarray(result.pvalues, dtype=np.float64)
    return {"intercept": float(params[0]), "slope": float(params[1]),
            "slope_ci": (float(ci[1, 0]), float(ci[1, 1])), "p_value": float(p_values[1]),
            "model": model, "converged": True}


def _empty(model: str) -> dict[str, Any]:
    nan = float("nan")
    return {"intercept": nan, "slope": nan, "slope_ci": (nan, nan), "p_value": nan, "model": model,
            "converged": False}


def _participant_variance(y: NDArray[np.float64], x: NDArray[np.float64], groups: NDArray[np.intp]) -> bool:
    """Whether the least-squares residuals of ``y ~ x`` vary between groups (MS_between > MS_within)."""
    design = np.column_stack([np.ones_like(x), x])
    residual = y - design @ np.linalg.lstsq(design, y, rcond=None)[0]
    _, codes = np.unique(groups, return_inverse=True)
    k, n = int(codes.max()) + 1, residual.size
    if n <= k:
        return False
    m = np.bincount(codes, minlength=k)
    means = np.bincount(codes, weights=residual, minlength=k) / m
    within = float(((residual - means[codes]) ** 2).sum()) / (n - k)
    between = float((m * (means - residual.mean()) ** 2).sum()) / (k - 1)
    return bool(between > within)


def bias_regressions(d: NDArray[np.float64], magnitude: NDArray[np.float64] | None, groups: NDArray[np.intp], *,
                     ci_level: float, loa_z: float, against: str) -> tuple[dict[str, Any], dict[str, Any] | None]:
    """Proportional bias and (when differences are non-uniform) regression-based limits.

    Parameters
    ----------
    d : ndarray of shape (n_nights,)
        Differences method - reference.
    magnitude : ndarray of shape (n_nights,) or None
        The magnitude regressed on (pair mean or reference); None when only differences are known.
    groups : ndarray of intp, shape (n_nights,)
        Participant code per night.
    ci_level : float
        Level of the slope CI; differences count as non-uniform when a slope's p-value is below
        ``1 - ci_level``.
    loa_z : float
        Normal quantile of the limits (1.96).
    against : str
        Name of the magnitude (recorded in the result).

    Returns
    -------
    proportional_bias : dict
        ``slope``, ``slope_ci``, ``p_value``, ``intercept``, ``model``, ``converged``, ``against``.
    regression_limits : dict or None
        None when the differences are uniform (neither slope significant) or cannot be fitted.
    """
    alpha = 1.0 - ci_level
    if magnitude is None:
        return _empty("not estimated (differences without the values they came from)") | {"against": None}, None
    if d.size < 3 or np.ptp(magnitude) == 0 or np.unique(groups).size < 2:
        return _empty("not estimated (fewer than 3 nights, 2 participants or 2 magnitudes)") | {
            "against": against}, None
    try:
        # no between-participant variance left after the slope: the REML fit would sit on the
        # boundary, where it equals least squares (and MixedLM is slow to say so)
        bias = _fit(d, magnitude, groups, alpha, mixed=_participant_variance(d, magnitude, groups))
        residual = np.abs(d - bias["intercept"] - bias["slope"] * magnitude)
        spread = _fit(residual, magnitude, groups, alpha, mixed=False)
    except (np.linalg.LinAlgError, ValueError, ZeroDivisionError) as error:  # singular design
        return _empty(f"not estimated (model fit failed: {error})") | {"against": against}, None
    reasons = [name for name, fit in (("proportional_bias", bias), ("non_constant_spread", spread))
               if np.isfinite(fit["p_value"]) and fit["p_value"] < alpha]
    proportional = {k: bias[k] for k in ("slope", "slope_ci", "p_value", "intercept", "model", "converged")}
    proportional["against"] = against
    if not reasons:
        return proportional, None
    k = loa_z * ABS_TO_SD
    limits = {
        "against": against, "reasons": reasons, "model": bias["model"], "multiplier": k,
        "bias_intercept": bias["intercept"], "bias_slope": bias["slope"],
        "abs_residual_intercept": spread["intercept"], "abs_residual_slope": spread["slope"],
        "abs_residual_p_value": spread["p_value"], "abs_residual_model": spread["model"],
        "lower_intercept": bias["intercept"] - k * spread["intercept"],
        "lower_slope": bias["slope"] - k * spread["slope"],
        "upper_intercept": bias["intercept"] + k * spread["intercept"],
        "upper_slope": bias["slope"] + k * spread["slope"],
        "magnitude_range": (float(magnitude.min()), float(magnitude.max())),
    }
    return proportional, limits
