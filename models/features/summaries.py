"""Summary statistics of each centred window: location, spread, quantiles, shape, shares.

All statistics use only the observed epochs of a window (missing epochs and positions beyond the
night's ends are left out, see :mod:`models.features.windows`).

Conventions (chosen to match the general-purpose references):

- SD is the population SD (``ddof=0``), the second central moment scipy's skewness and kurtosis
  use.
- Quantiles use numpy's default ``method='linear'`` (= R type 7 = pandas ``rolling().quantile``).
- Skewness is scipy's default ``scipy.stats.skew(x)``: ``g1 = m3 / m2**1.5`` (``bias=True``).
- Kurtosis is scipy's default ``scipy.stats.kurtosis(x)``: Fisher (normal = 0) and ``bias=True``,
  ``g2 = m4 / m2**2 - 3``. (pandas' ``.skew()``/``.kurt()`` are the ``bias=False`` forms.)
- A constant window (all observed values equal, e.g. all-zero counts during sleep) has SD 0 and
  undefined skewness and kurtosis: both are NaN, without a warning (scipy also returns NaN).
- A window with no observed epoch gives NaN everywhere, and coverage 0.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from .windows import CentredWindows, window_counts

__all__ = ["SHARE_STATISTICS", "SUMMARY_STATISTICS", "window_shares", "window_summaries"]

FloatArray = NDArray[np.float64]

#: Names of the statistics returned by :func:`window_summaries`, in order.
SUMMARY_STATISTICS: tuple[str, ...] = (
    "mean", "sd", "min", "p10", "p25", "median", "p75", "p90", "max", "skew", "kurt",
)
#: Names of the statistics returned by :func:`window_shares`, in order.
SHARE_STATISTICS: tuple[str, ...] = ("zero_share", "move_share", "coverage")

_QUANTILES = {"p10": 0.10, "p25": 0.25, "median": 0.50, "p75": 0.75, "p90": 0.90}


def _ratio(num: FloatArray, den: FloatArray, ok: NDArray[np.bool_]) -> FloatArray:
    return np.divide(num, den, out=np.full_like(num, np.nan), where=ok)


def window_summaries(windows: CentredWindows) -> dict[str, FloatArray]:
    """Location, spread, quantiles and shape of each window's observed values.

    Parameters
    ----------
    windows : CentredWindows
        The centred windows of one series (nightbank passes ``log1p(counts)``).

    Returns
    -------
    dict of str to ndarray of float64, shape (n_epochs,)
        Keys :data:`SUMMARY_STATISTICS`: mean, population SD, min, 10th/25th/50th/75th/90th
        percentiles (numpy 'linear'), max, skewness (scipy ``skew``, ``bias=True``) and excess
        kurtosis (scipy ``kurtosis``, Fisher, ``bias=True``). NaN where undefined (see module
        docstring).

    Examples
    --------
    >>> import numpy as np
    >>> w = CentredWindows(np.array([0.0, 0.0, 3.0, 0.0, 0.0]), half_width=1)
    >>> window_summaries(w)["max"].tolist()
    [0.0, 3.0, 3.0, 3.0, 0.0]
    """
    k = windows.n_observed.astype(np.float64)
    has = windows.any_observed
    dev = windows.deviations
    d2 = np.square(dev)
    m2 = _ratio(windows.sum_squares, k, has)
    m3 = _ratio(np.einsum("ij,ij->i", d2, dev), k, has)
    m4 = _ratio(np.einsum("ij,ij->i", d2, d2), k, has)
    shaped = has & ~windows.is_constant
    m2_safe = np.where(shaped, m2, 1.0)
    skew = np.where(shaped, m3 / m2_safe**1.5, np.nan)
    kurt = np.where(shaped, m4 / np.square(m2_safe) - 3.0, np.nan)
    sd = np.sqrt(m2)
    out = {"mean": windows.mean, "sd": sd, "min": windows.minimum}
    out.update({name: windows.quantile(q) for name, q in _QUANTILES.items()})
    out.update({"max": windows.maximum, "skew": skew, "kurt": kurt})
    return {name: out[name] for name in SUMMARY_STATISTICS}


def window_shares(counts: FloatArray, half_width: int, *, movement_level: float) -> dict[str, FloatArray]:
    """Share of zero-count epochs, of movement epochs, and of the window that was observed.

    Parameters
    ----------
    counts : ndarray of float64, shape (n_epochs,)
        Activity counts per epoch; NaN marks a missing epoch.
    half_width : int
        Half-width of the window in epochs.
    movement_level : float
        Counts per epoch above which (strictly) an epoch is a movement epoch.

    Returns
    -------
    dict of str to ndarray of float64, shape (n_epochs,)
        ``zero_share`` and ``move_share``: fractions of the window's observed epochs with
        ``counts == 0`` and ``counts > movement_level`` (NaN without observed epochs);
        ``coverage``: observed epochs divided by the full window length ``2 * half_width + 1``
        (below 1 near the night's ends and around missing epochs).

    Examples
    --------
    >>> import numpy as np
    >>> s = window_shares(np.array([0.0, 50.0, np.nan, 0.0]), 1, movement_level=20.0)
    >>> s["coverage"].round(3).tolist(), s["zero_share"].tolist()
    ([0.667, 0.667, 0.667, 0.333], [0.5, 0.5, 0.5, 1.0])
    """
    observed = ~np.isnan(counts)
    k = window_counts(observed, half_width).astype(np.float64)
    has = k > 0
    zeros = window_counts(observed & (counts == 0), half_width).astype(np.float64)
    moves = window_counts(observed & (counts > movement_level), half_width).astype(np.float64)
    return {
        "zero_share": _ratio(zeros, k, has),
        "move_share": _ratio(moves, k, has),
        "coverage": k / float(2 * half_width + 1),
    }
