"""Equivalence of a method with the reference: two one-sided tests (TOST) on paired data.

Schuirmann 1987 (J Pharmacokinet Biopharm 15:657-680): with paired differences ``d = a - b``
(n pairs, mean ``dbar``, SD ``s``, ``se = s / sqrt(n)``) and a margin ``(low, high)``, test
``H0: mean <= low`` with ``t1 = (dbar - low) / se`` (p from the upper tail) and
``H0: mean >= high`` with ``t2 = (dbar - high) / se`` (p from the lower tail), both on n - 1
degrees of freedom; the TOST p-value is the larger one and equivalence is declared when it is
below alpha, which is the same as the ``1 - 2 alpha`` t-interval lying inside the margin.

For sleep parameters the pairs are *participants* (the mean over each participant's nights of
method and of reference), so that a participant with many nights does not count as many
independent observations; the margins come from the study protocol, fixed in advance.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from scipy import stats

from ..scoring.protocol import DEFAULT_PROTOCOL, StudyProtocol
from ._bootstrap import InvalidAgreementInputError, json_dict, participant_codes

__all__ = ["parameter_equivalence", "tost_paired"]


def _margins(margin: float | tuple[float, float]) -> tuple[float, float]:
    if isinstance(margin, tuple | list):
        if len(margin) != 2:
            raise InvalidAgreementInputError(f"margin must be a number or (low, high), got {margin!r}")
        low, high = float(margin[0]), float(margin[1])
    else:
        low, high = -abs(float(margin)), abs(float(margin))
    if not (np.isfinite(low) and np.isfinite(high) and low < high):
        raise InvalidAgreementInputError(f"margin must give finite low < high, got {margin!r}")
    return low, high


def tost_paired(a: ArrayLike, b: ArrayLike, *, margin: float | tuple[float, float],
                alpha: float = 0.05) -> dict[str, Any]:
    """Two one-sided paired t-tests of ``low < mean(a - b) < high``.

    Parameters
    ----------
    a, b : array-like of shape (n_pairs,)
        Paired values (e.g. method and reference); pairs with a non-finite value are left out.
    margin : float or (float, float)
        ``m`` for the symmetric margin (-m, m), or (low, high), in the unit of the values.
    alpha : float, default=0.05
        Level of each one-sided test.

    Returns
    -------
    dict
        ``n``, ``mean_difference``, ``sd_difference``, ``low``, ``high``, ``df``,
        ``t_lower``/``p_lower`` (H0: mean <= low), ``t_upper``/``p_upper`` (H0: mean >= high),
        ``p_value`` (the larger), ``ci`` (the 1 - 2 alpha t-interval), ``alpha`` and
        ``equivalent`` (p_value < alpha). NaN p-values (and ``equivalent`` False) with fewer than
        2 pairs or no spread.

    Raises
    ------
    InvalidAgreementInputError
        For inputs of different lengths, a bad margin or alpha outside (0, 0.5).
    """
    x, y = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    if x.ndim != 1 or x.shape != y.shape:
        raise InvalidAgreementInputError(f"a {x.shape} and b {y.shape} must be 1-D of the same length")
    if not 0.0 < alpha < 0.5:
        raise InvalidAgreementInputError(f"alpha must be in (0, 0.5), got {alpha!r}")
    low, high = _margins(margin)
    keep = np.isfinite(x) & np.isfinite(y)
    d = x[keep] - y[keep]
    n = int(d.size)
    nan = float("nan")
    out: dict[str, Any] = {"n": n, "mean_difference": float(d.mean()) if n else nan, "low": low, "high": high,
                           "alpha": alpha, "df": n - 1 if n else 0}
    sd = float(d.std(ddof=1)) if n >= 2 else nan
    out["sd_difference"] = sd
    if n < 2 or not sd > 0:
        return out | {"t_lower": nan, "p_lower": nan, "t_upper": nan, "p_upper": nan, "p_value": nan,
                      "ci": (nan, nan), "equivalent": False}
    se = sd / np.sqrt(n)
    mean = float(d.mean())
    t_lower, t_upper = (mean - low) / se, (mean - high) / se
    p_lower, p_upper = float(stats.t.sf(t_lower, n - 1)), float(stats.t.cdf(t_upper, n - 1))
    half = float(stats.t.ppf(1.0 - alpha, n - 1)) * se
    p_value = max(p_lower, p_upper)
    return out | {"t_lower": float(t_lower), "p_lower": p_lower, "t_upper": float(t_upper), "p_upper": p_upper,
                  "p_value": p_value, "ci": (mean - half, mean + half), "equivalent": bool(p_value < alpha)}


def parameter_equivalence(method: ArrayLike, reference: ArrayLike, participant_ids: ArrayLike, *, parameter: str,
                          method_name: str = "method",
                          protocol: StudyProtocol = DEFAULT_PROTOCOL) -> dict[str, Any]:
    """TOST of a sleep parameter on participant means, against the protocol's margin.

    Parameters
    ----------
    method, reference : array-like of shape (n_nights,)
        Values per night; nights with a non-finite value on either side are left out.
    participant_ids : array-like of shape (n_nights,)
    parameter : str
        A name of :data:`models.scoring.protocol.EQUIVALENCE_PARAMETERS` (gives the margin).
    method_name : str, default="method"
    protocol : StudyProtocol, default=DEFAULT_PROTOCOL
        ``equivalence_margins[parameter]`` is the margin (+/-); alpha = ``1 - ci_level``.

    Returns
    -------
    dict
        JSON-safe: ``method``, ``parameter``, ``n_participants``, ``n_nights``, ``margin`` and
        the fields of :func:`tost_paired` (its ``n`` is the number of participants).
    """
    if parameter not in protocol.equivalence_margins:
        raise InvalidAgreementInputError(
            f"no equivalence margin for {parameter!r}; margins exist for {', '.join(protocol.equivalence_margins)}")
    x, r = np.asarray(method, dtype=np.float64), np.asarray(reference, dtype=np.float64)
    if x.ndim != 1 or x.shape != r.shape:
        raise InvalidAgreementInputError(f"method {x.shape} and reference {r.shape} must be 1-D of the same length")
    codes, _ = participant_codes(participant_ids, x.size)
    keep = np.isfinite(x) & np.isfinite(r)
    means = pd.DataFrame({"p": codes[keep], "m": x[keep], "r": r[keep]}).groupby("p", sort=False).mean()
    margin = float(protocol.equivalence_margins[parameter])
    result = tost_paired(means["m"].to_numpy(), means["r"].to_numpy(), margin=margin,
                         alpha=1.0 - protocol.ci_level)
    return json_dict({"method": method_name, "parameter": parameter, "n_participants": int(len(means)),
                      "n_nights": int(keep.sum()), "margin": margin} | result)
