"""Centred sliding windows over one night, with missing epochs masked.

Every window feature in nightbank is computed on a centred window of ``2 * half_width + 1``
epochs around each epoch. Window lengths are configured in minutes and turned into epochs by
:func:`half_width_epochs`, so 15-, 30- and 60-s nights get windows of the same duration.

Two kinds of "unavailable" epoch exist and are treated alike:

- positions beyond either end of the night (the window is truncated, never padded with zeros,
  which would look like stillness), and
- missing (gap-filled) epochs, given as NaN.

:class:`CentredWindows` holds the windows of one night as an ``(n_epochs, 2 * half_width + 1)``
view of the NaN-padded series (no copy) and derives, once and on demand, the statistics that
several features share: the observed count, the sorted rows (NaN last), the mean and the
deviations from it. All statistics use only the observed values of each row, so a value at epoch
``i`` depends only on the epochs ``i - half_width .. i + half_width``.
"""

from __future__ import annotations

from functools import cached_property

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from numpy.typing import NDArray

__all__ = ["CentredWindows", "half_width_epochs", "rolling_mean_var", "window_bounds", "window_counts"]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]


def half_width_epochs(window_min: float, epoch_seconds: float) -> int:
    """Half-width in epochs of a centred window lasting about ``window_min`` minutes.

    The window spans ``2 * h + 1`` epochs with ``h = round(window_min * 60 / (2 * epoch_seconds))``
    (at least 1), i.e. ``window_min`` minutes from the first epoch's start to the last epoch's start.

    Parameters
    ----------
    window_min : float
        Window duration in minutes.
    epoch_seconds : float
        Epoch length in seconds.

    Returns
    -------
    int
        The half-width ``h`` in epochs.

    Examples
    --------
    >>> [2 * half_width_epochs(m, 30) + 1 for m in (10, 30, 60, 90)]
    [21, 61, 121, 181]
    >>> 2 * half_width_epochs(10, 15) + 1, 2 * half_width_epochs(10, 60) + 1
    (41, 11)
    """
    return max(1, round(window_min * 60.0 / (2.0 * epoch_seconds)))


def window_bounds(n_epochs: int, half_width: int) -> tuple[IntArray, IntArray]:
    """First and last epoch index (inclusive) of each centred window, truncated at the night's ends.

    Parameters
    ----------
    n_epochs : int
        Number of epochs in the night.
    half_width : int
        Half-width of the window in epochs.

    Returns
    -------
    lo, hi : ndarray of int64, shape (n_epochs,)
        ``lo[i] = max(0, i - half_width)`` and ``hi[i] = min(n_epochs - 1, i + half_width)``.
    """
    idx = np.arange(n_epochs, dtype=np.int64)
    return np.maximum(idx - half_width, 0), np.minimum(idx + half_width, n_epochs - 1)


def window_counts(mask: NDArray[np.bool_], half_width: int) -> IntArray:
    """Number of True values of ``mask`` inside each centred window (exact integer sums).

    Parameters
    ----------
    mask : ndarray of bool, shape (n_epochs,)
    half_width : int
        Half-width of the window in epochs.

    Returns
    -------
    ndarray of int64, shape (n_epochs,)
    """
    n = mask.shape[0]
    cum = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(mask, out=cum[1:])
    lo, hi = window_bounds(n, half_width)
    return cum[hi + 1] - cum[lo]


def rolling_mean_var(values: FloatArray, width: int) -> tuple[FloatArray, FloatArray]:
    """Mean and sample variance (``ddof=1``) of every run of ``width`` consecutive epochs.

    Parameters
    ----------
    values : ndarray of float64, shape (n_epochs,)
        The series; NaN values are skipped (R ``na.rm = TRUE``).
    width : int
        Sub-window width in epochs.

    Returns
    -------
    mean, var : ndarray of float64, shape (max(n_epochs - width + 1, 0),)
        Element ``i`` covers epochs ``i .. i + width - 1``. The mean is NaN without observed values,
        the variance NaN with fewer than two; a constant sub-window has variance exactly 0.
    """
    y = np.asarray(values, dtype=np.float64)
    if y.shape[0] < width:
        return np.zeros(0), np.zeros(0)
    tiles = sliding_window_view(y, width)
    observed = ~np.isnan(tiles)
    k = observed.sum(axis=1)
    low = np.fmin.reduce(tiles, axis=1)
    shifted = np.where(observed, tiles - low[:, None], 0.0).sum(axis=1)
    mean = low + np.divide(shifted, k, out=np.full(k.shape, np.nan), where=k > 0)
    ss = np.square(np.where(observed, tiles - mean[:, None], 0.0)).sum(axis=1)
    var = np.divide(ss, k - 1, out=np.full(k.shape, np.nan), where=k > 1)
    var[(k > 1) & (np.fmax.reduce(tiles, axis=1) == low)] = 0.0
    return mean, var


class CentredWindows:
    """The centred windows of one series, with the per-window statistics features share.

    Parameters
    ----------
    values : ndarray of float64, shape (n_epochs,)
        The series (nightbank passes ``log1p(counts)``); NaN marks a missing epoch.
    half_width : int
        Half-width of each window in epochs; windows span ``2 * half_width + 1`` epochs.
    shared : dict or None, default=None
        Memo of :meth:`rolling_mean_var` results to share with other windows over the same
        ``values`` (filled on demand); None for a private one.

    Attributes
    ----------
    rows : ndarray of float64, shape (n_epochs, 2 * half_width + 1)
        Read-only view of the NaN-padded series: row ``i`` holds epochs
        ``i - half_width .. i + half_width``, NaN where the epoch is missing or outside the night.
    lo, hi : ndarray of int64, shape (n_epochs,)
        First and last epoch of each (truncated) window, see :func:`window_bounds`.

    Notes
    -----
    Rows with no observed value give NaN for every statistic. The mean is anchored at the row
    minimum (``min + mean(x - min)``), so a constant row has a mean equal to its value and
    deviations that are exactly 0.
    """

    def __init__(self, values: FloatArray, half_width: int, *,
                 shared: dict[int, tuple[FloatArray, FloatArray]] | None = None) -> None:
        self.values = np.asarray(values, dtype=np.float64)
        self.half_width = int(half_width)
        pad = np.full(self.half_width, np.nan)
        self.rows = sliding_window_view(np.concatenate([pad, self.values, pad]), 2 * self.half_width + 1)
        self.lo, self.hi = window_bounds(self.values.shape[0], self.half_width)
        self._rolling: dict[int, tuple[FloatArray, FloatArray]] = {} if shared is None else shared
        self._quantiles: dict[float, FloatArray] = {}
        self._tiles: dict[int, tuple[IntArray, NDArray[np.bool_]]] = {}

    def rolling_mean_var(self, width: int) -> tuple[FloatArray, FloatArray]:
        """:func:`rolling_mean_var` of the series with sub-windows of ``width`` epochs (memoised).

        They do not depend on the window size: windows of several sizes over the same series may
        share one memo (``shared`` argument of the constructor).
        """
        if width not in self._rolling:
            self._rolling[width] = rolling_mean_var(self.values, width)
        return self._rolling[width]

    def tiles(self, width: int) -> tuple[IntArray, NDArray[np.bool_]]:
        """Start of each window's consecutive tiles of ``width`` epochs, from its first epoch (memoised).

        Returns ``starts`` of shape (n_epochs, self.width // width), clipped to the last tile start
        of the series, and ``inside``: whether the tile ends inside the (truncated) window.
        """
        if width not in self._tiles:
            starts = self.lo[:, None] + width * np.arange(self.width // width)[None, :]
            inside = starts + width - 1 <= self.hi[:, None]
            self._tiles[width] = np.minimum(starts, max(self.values.shape[0] - width, 0)), inside
        return self._tiles[width]

    @property
    def width(self) -> int:
        """Full window length in epochs (``2 * half_width + 1``)."""
        return 2 * self.half_width + 1

    @cached_property
    def observed(self) -> NDArray[np.bool_]:
        """Boolean mask of observed positions, shape (n_epochs, width)."""
        mask: NDArray[np.bool_] = ~np.isnan(self.rows)
        return mask

    @cached_property
    def n_observed(self) -> IntArray:
        """Number of observed epochs in each window, shape (n_epochs,)."""
        return window_counts(~np.isnan(self.values), self.half_width)

    @cached_property
    def any_observed(self) -> NDArray[np.bool_]:
        """Windows with at least one observed epoch, shape (n_epochs,)."""
        return self.n_observed > 0

    @cached_property
    def sorted_rows(self) -> FloatArray:
        """Each row sorted ascending, NaN last, shape (n_epochs, width)."""
        return np.sort(self.rows, axis=1)

    @cached_property
    def minimum(self) -> FloatArray:
        """Smallest observed value of each window (NaN if none), shape (n_epochs,)."""
        return self.sorted_rows[:, 0].copy()

    @cached_property
    def maximum(self) -> FloatArray:
        """Largest observed value of each window (NaN if none), shape (n_epochs,)."""
        last = np.maximum(self.n_observed - 1, 0)
        return self.sorted_rows.reshape(-1)[np.arange(last.shape[0]) * self.width + last]

    @cached_property
    def is_constant(self) -> NDArray[np.bool_]:
        """Windows whose observed values are all equal (including single-value windows)."""
        constant: NDArray[np.bool_] = self.any_observed & (self.minimum == self.maximum)
        return constant

    def quantile(self, q: float) -> FloatArray:
        """Quantile ``q`` (0..1) of each window's observed values, numpy's default ``'linear'`` method.

        Same definition as ``np.percentile(x, 100 * q)`` (R type 7): with ``k`` observed values
        sorted as ``s``, position ``p = q * (k - 1)``, value ``s[floor(p)]`` linearly
        interpolated towards ``s[floor(p) + 1]``. NaN for a window with no observed value.
        Memoised per ``q``.
        """
        if q in self._quantiles:
            return self._quantiles[q]
        k = self.n_observed
        pos = q * np.maximum(k - 1, 0).astype(np.float64)
        below = np.floor(pos).astype(np.int64)
        above = np.minimum(below + 1, np.maximum(k - 1, 0))
        frac = pos - below
        flat = self.sorted_rows.reshape(-1)
        row_start = np.arange(k.shape[0], dtype=np.int64) * self.width
        a, b = flat[row_start + below], flat[row_start + above]
        diff = b - a
        # numpy's lerp: a + diff * t, computed from the upper end when t >= 0.5
        out: FloatArray = np.where(frac >= 0.5, b - diff * (1.0 - frac), a + diff * frac)
        out[~self.any_observed] = np.nan
        out.setflags(write=False)
        self._quantiles[q] = out
        return out

    @cached_property
    def _centred(self) -> tuple[FloatArray, FloatArray]:
        """Mean (anchored at the minimum) and deviations, computed in one buffer."""
        dev = self.rows - self.minimum[:, None]
        gapped = np.flatnonzero(self.n_observed < self.width)  # rows with a missing or outside epoch
        missing = np.isnan(self.rows[gapped])
        part = dev[gapped]
        part[missing] = 0.0
        dev[gapped] = part
        total = dev.sum(axis=1)
        offset = np.divide(total, self.n_observed, out=np.full_like(total, np.nan), where=self.any_observed)
        dev -= offset[:, None]
        part = dev[gapped]
        part[missing] = 0.0
        dev[gapped] = part
        return self.minimum + offset, dev

    @property
    def mean(self) -> FloatArray:
        """Mean of the observed values (NaN if none), shape (n_epochs,)."""
        return self._centred[0]

    @property
    def deviations(self) -> FloatArray:
        """Deviation of each observed value from its window's mean, 0 where not observed."""
        return self._centred[1]

    @cached_property
    def sum_squares(self) -> FloatArray:
        """Sum of squared deviations from the mean, shape (n_epochs,); exactly 0 if constant."""
        dev = self.deviations
        squares: FloatArray = np.einsum("ij,ij->i", dev, dev)
        return squares

    def variance(self, *, ddof: int = 0) -> FloatArray:
        """Variance of the observed values with ``ddof`` (NaN when ``k <= ddof``), exact 0 if constant."""
        k = self.n_observed
        variance: FloatArray = np.divide(self.sum_squares, k - ddof, out=np.full(k.shape, np.nan), where=k > ddof)
        return variance
