"""Shape-over-time features of each centred window: shifts, lumpiness, stability, runs, crossings.

Each function gives, for every epoch, the feature of the centred window around it, defined as in
R ``tsfeatures`` (Hyndman et al., 1.1.1) or statsmodels, applied to that window alone. Windows are
truncated at the night's ends and missing epochs (NaN) are skipped as described per feature.

Sub-windows ("tiles") have a fixed width in epochs (R's default for non-seasonal data is 10;
nightbank passes 5 minutes in epochs, i.e. 10 at 30 s). Deviations from R, each because R's value
would look like stillness where the feature is simply undefined:

- ``max_level_shift`` / ``max_var_shift``: R returns 0 when the window holds fewer than two
  sub-windows; these return NaN.
- ``lumpiness`` / ``stability``: R returns 0 when the window holds fewer than two tiles; these
  return NaN.

Defined values for still (constant) windows: level and variance shift 0, lumpiness and stability
0 (R skips standardising a constant series, which gives 0), flat spots = the window's length (R
and the Python port give n; a missing epoch breaks the run), crossing points 0; the lag-1
autocorrelation is NaN (undefined 0/0, as in R and statsmodels).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from .windows import CentredWindows

__all__ = [
    "crossing_points", "flat_spots", "lag1_autocorrelation", "lumpiness", "max_level_shift",
    "max_var_shift", "stability",
]

FloatArray = NDArray[np.float64]


def _max_shift(stat: FloatArray, windows: CentredWindows, width: int) -> FloatArray:
    """Largest ``|stat[i + width] - stat[i]|`` over sub-window pairs inside each window."""
    n, h = windows.values.shape[0], windows.half_width
    span = 2 * h + 2 - 2 * width  # number of pair starts i in a full window
    if span < 1 or stat.shape[0] <= width:
        return np.full(n, np.nan)
    diff = np.abs(stat[width:] - stat[:-width])  # pair starting at i needs epochs i .. i + 2w - 1
    # window c allows starts c - h .. c + h - 2w + 1; starts outside 0..n-2w are NaN
    padded = np.full(n + span - 1, np.nan)
    padded[h:h + diff.shape[0]] = diff
    return _sliding_fmax(padded, span)


def _sliding_fmax(values: FloatArray, span: int) -> FloatArray:
    """Largest non-NaN value of every run of ``span`` consecutive values (NaN if none), shape (n - span + 1,).

    Van Herk / Gil-Werman: in aligned blocks of ``span`` values, running maxima from each block's
    start and from its end; a run is the end of one block and the start of the next. Maxima are
    exact, so this equals the maximum of each run taken directly.
    """
    n = values.shape[0]
    n_blocks = -(-n // span)
    blocks = np.full(n_blocks * span, np.nan)
    blocks[:n] = values
    blocks = blocks.reshape(n_blocks, span)
    from_start = np.fmax.accumulate(blocks, axis=1).reshape(-1)
    from_end = np.fmax.accumulate(blocks[:, ::-1], axis=1)[:, ::-1].reshape(-1)
    runs = n - span + 1
    largest: FloatArray = np.fmax(from_end[:runs], from_start[span - 1:span - 1 + runs])
    return largest


def max_level_shift(windows: CentredWindows, *, width: int) -> FloatArray:
    """Largest change in mean between two adjacent, non-overlapping sub-windows of each window.

    Definition = R ``tsfeatures::max_level_shift(x, width)`` on the raw window: ``m_i`` = mean of
    ``x[i .. i + width - 1]`` (NaN skipped), feature = ``max_i |m_{i + width} - m_i|`` over all
    pairs inside the window.

    Parameters
    ----------
    windows : CentredWindows
    width : int
        Sub-window width in epochs.

    Returns
    -------
    ndarray of float64, shape (n_epochs,)
        In the units of the series; NaN when the window is shorter than ``2 * width`` (R: 0).
    """
    mean, _ = windows.rolling_mean_var(width)
    return _max_shift(mean, windows, width)


def max_var_shift(windows: CentredWindows, *, width: int) -> FloatArray:
    """Largest change in variance between two adjacent, non-overlapping sub-windows of each window.

    Definition = R ``tsfeatures::max_var_shift(x, width)``: as :func:`max_level_shift` with the
    sub-window sample variance (``ddof=1``, NaN skipped) instead of the mean.

    Parameters
    ----------
    windows : CentredWindows
    width : int
        Sub-window width in epochs.

    Returns
    -------
    ndarray of float64, shape (n_epochs,)
        In squared units of the series; NaN when the window is shorter than ``2 * width`` (R: 0).
    """
    _, var = windows.rolling_mean_var(width)
    return _max_shift(var, windows, width)


def _tile_spread(stat: FloatArray, windows: CentredWindows, width: int) -> FloatArray:
    """Sample variance (ddof=1) over each window's tiles of a per-tile statistic (NaN tiles skipped)."""
    starts, inside = windows.tiles(width)  # tiles from the window's first epoch
    vals = np.where(inside, stat[starts], np.nan)
    defined = ~np.isnan(vals)
    k = defined.sum(axis=1)
    low = np.fmin.reduce(vals, axis=1)
    shifted = np.where(defined, vals - low[:, None], 0.0).sum(axis=1)
    mean = low + np.divide(shifted, k, out=np.full(k.shape, np.nan), where=k > 0)
    ss = np.square(np.where(defined, vals - mean[:, None], 0.0)).sum(axis=1)
    variance: FloatArray = np.divide(ss, k - 1, out=np.full(k.shape, np.nan), where=k > 1)
    return variance


def _tiles(windows: CentredWindows, width: int, *, power: int, use_var: bool) -> FloatArray:
    n = windows.values.shape[0]
    if windows.width < 2 * width or n < width:
        return np.full(n, np.nan)
    mean, var = windows.rolling_mean_var(width)
    spread = _tile_spread(var if use_var else mean, windows, width)
    sd = np.sqrt(windows.variance(ddof=1))
    # a constant window's tiles have identical means and zero variances, so spread is exactly 0
    scaled: FloatArray = spread / np.where(sd > 0, sd, 1.0) ** power
    return scaled


def lumpiness(windows: CentredWindows, *, width: int) -> FloatArray:
    """Variance of the tile variances of each standardised window.

    Definition = R ``tsfeatures::lumpiness(x, width)``: standardise the window (mean, SD with
    ``ddof=1``), cut it into consecutive tiles of ``width`` epochs starting at its first epoch
    (an incomplete last tile is dropped), take each tile's variance (``ddof=1``, NaN skipped) and
    return the variance (``ddof=1``) of those. Computed from unstandardised tiles divided by
    ``SD**4``.

    Parameters
    ----------
    windows : CentredWindows
    width : int
        Tile width in epochs.

    Returns
    -------
    ndarray of float64, shape (n_epochs,)
        Unitless; NaN with fewer than two defined tiles (R: 0); 0 for a constant window.
    """
    return _tiles(windows, width, power=4, use_var=True)


def stability(windows: CentredWindows, *, width: int) -> FloatArray:
    """Variance of the tile means of each standardised window.

    Definition = R ``tsfeatures::stability(x, width)``: the same tiles as :func:`lumpiness`, the
    variance (``ddof=1``) of their means after standardising; computed as the variance of the
    unstandardised tile means divided by ``SD**2``.

    Parameters
    ----------
    windows : CentredWindows
    width : int
        Tile width in epochs.

    Returns
    -------
    ndarray of float64, shape (n_epochs,)
        Unitless; NaN with fewer than two defined tiles (R: 0); 0 for a constant window.
    """
    return _tiles(windows, width, power=2, use_var=False)


class _Stretches:
    """Runs of consecutive windows sharing ``keys``, each with the epochs its windows cover, laid end to end.

    Attributes: ``first_window`` (first window of each run), ``group`` and ``position`` (run and
    epoch of each laid-out element), ``first_pair`` (laid-out index of each window's first epoch).
    """

    def __init__(self, windows: CentredWindows, *keys: FloatArray) -> None:
        n = windows.values.shape[0]
        new_run = np.zeros(n, dtype=bool)
        new_run[0] = True
        for key in keys:
            new_run[1:] |= key[1:] != key[:-1]
        first_window = np.flatnonzero(new_run)
        last_window = np.append(first_window[1:] - 1, n - 1)
        start = windows.lo[first_window]
        length = windows.hi[last_window] + 1 - start
        offset = np.concatenate([[0], np.cumsum(length)[:-1]]).astype(np.int64)
        self.first_window = first_window
        self.group = np.repeat(np.arange(first_window.shape[0]), length)
        self.position = np.arange(self.group.shape[0]) - offset[self.group] + start[self.group]
        window_run = np.cumsum(new_run) - 1
        self.first_pair = offset[window_run] + windows.lo - start[window_run]


def _bin_labels(values: FloatArray, low: FloatArray, step: FloatArray, n_bins: int) -> FloatArray:
    """Bin label 1..n_bins of each value given its window's lowest value and bin width (NaN stays NaN).

    Bin b holds (edge_b, edge_{b+1}] with edges ``low + b * step`` as ``np.linspace(min, max,
    n_bins + 1)``; a value within rounding of an interior edge is placed by comparing it with
    that edge.
    """
    scaled = values - low
    scaled /= step
    distance = np.rint(scaled)
    distance -= scaled
    near = np.abs(distance, out=distance) < 1e-9 * n_bins
    near &= scaled > 0.5
    (idx,) = np.nonzero(near)
    label = np.ceil(scaled, out=scaled)  # NaN stays NaN
    np.clip(label, 1.0, float(n_bins), out=label)
    if idx.size:
        edge_idx = np.rint((values[idx] - low[idx]) / step[idx])
        keep = edge_idx < n_bins
        idx, edge_idx = idx[keep], edge_idx[keep]
        label[idx] = np.where(values[idx] > edge_idx * step[idx] + low[idx], edge_idx + 1, edge_idx)
    return label


def _run_lengths(flags: NDArray[np.bool_], *, reverse: bool = False) -> NDArray[np.int64]:
    """Length of the run of True ending (``reverse``: starting) at each position, 0 at a False."""
    f = flags[::-1] if reverse else flags
    idx = np.arange(1, f.shape[0] + 1)
    runs = idx - np.maximum.accumulate(np.where(f, 0, idx))
    return runs[::-1] if reverse else runs


def _range_max(values: NDArray[np.int64], first: NDArray[np.int64], last: NDArray[np.int64]) -> NDArray[np.int64]:
    """``max(values[first[i] .. last[i]])`` (inclusive; 0 for an empty range), from a sparse table."""
    length = last - first + 1
    out = np.zeros(first.shape[0], dtype=np.int64)
    ok = np.flatnonzero(length > 0)
    if not ok.size:
        return out
    first, last, length = first[ok], last[ok], length[ok]
    level = np.floor(np.log2(length)).astype(np.int64)
    tables = [values]
    while 2 ** len(tables) <= length.max():
        prev, half = tables[-1], 2 ** (len(tables) - 1)
        tables.append(np.maximum(prev[:-half], prev[half:]))
    best = np.zeros(ok.size, dtype=np.int64)
    for k in np.unique(level).tolist():
        rows = np.flatnonzero(level == k)
        table = tables[k]
        best[rows] = np.maximum(table[first[rows]], table[last[rows] - 2 ** k + 1])
    out[ok] = best
    return out


def flat_spots(windows: CentredWindows, *, n_bins: int = 10) -> FloatArray:
    """Longest run of consecutive epochs falling in the same of ``n_bins`` equal-width value bins.

    Definition = R ``tsfeatures::flat_spots`` (``cut(x, breaks=10)``, longest ``rle`` run) and the
    Python port (``pd.cut(x, bins=10)``): bins split [min, max] of the window into equal parts,
    right-closed, with the lowest edge widened so the minimum falls in the first bin. A missing
    epoch breaks a run.

    Parameters
    ----------
    windows : CentredWindows
    n_bins : int, default=10

    Returns
    -------
    ndarray of float64, shape (n_epochs,)
        Run length in epochs; for a constant window, the longest run of observed epochs (all of
        them when none is missing); NaN without observed epochs.

    Notes
    -----
    Neighbouring windows usually share their minimum and maximum, hence their bins. Consecutive
    windows with the same bins form a group; each group labels the epochs it covers once, and
    each window's longest run is read from run lengths of that one labelled stretch (the run
    that enters the window is cut at its first epoch; the rest come from a sparse-table range
    maximum).
    """
    low_all, high_all = np.nan_to_num(windows.minimum), np.nan_to_num(windows.maximum)
    stretch = _Stretches(windows, low_all, high_all)
    low, high = low_all[stretch.first_window], high_all[stretch.first_window]
    step = np.where(high > low, (high - low) / n_bins, 1.0)  # edges as np.linspace(min, max, n_bins + 1)
    group = stretch.group
    label = _bin_labels(windows.values[stretch.position], low[group], step[group], n_bins)
    same = label[1:] == label[:-1]  # NaN never equals: missing epochs break runs
    same &= group[1:] == group[:-1]
    ending, starting = _run_lengths(same), _run_lengths(same, reverse=True)
    first, n_pairs = stretch.first_pair, windows.hi - windows.lo
    if same.size:
        entering = np.minimum(starting[np.minimum(first, same.shape[0] - 1)], n_pairs)
        longest = np.maximum(entering, _range_max(ending, first + entering, first + n_pairs - 1))
    else:
        longest = np.zeros(first.shape[0], dtype=np.int64)
    return np.where(windows.any_observed, longest + 1.0, np.nan)


def crossing_points(windows: CentredWindows) -> FloatArray:
    """Number of times each window crosses its median.

    Definition = R ``tsfeatures::crossing_points``: ``b_t = x_t <= median`` (ties at the median
    count as below), feature = number of ``t`` with ``b_t != b_{t+1}``. Pairs with a missing epoch
    are skipped (R: ``sum(..., na.rm = TRUE)``). In sleep windows the median is often 0, so only
    transitions between 0 and positive counts count. Consecutive windows with the same median
    share one pass over the epochs they cover; each count is a difference of running counts.

    Parameters
    ----------
    windows : CentredWindows

    Returns
    -------
    ndarray of float64, shape (n_epochs,)
        Count of crossings; NaN without observed epochs.
    """
    median = np.nan_to_num(windows.quantile(0.5))
    stretch = _Stretches(windows, median)  # consecutive windows with the same median
    group, values = stretch.group, windows.values[stretch.position]
    below = values <= median[stretch.first_window][group]
    both = ~np.isnan(values)
    both = both[1:] & both[:-1] & (group[1:] == group[:-1])
    changes = np.zeros(group.shape[0], dtype=np.int64)
    np.cumsum((below[1:] != below[:-1]) & both, out=changes[1:])
    first = stretch.first_pair
    crossings = (changes[first + windows.hi - windows.lo] - changes[first]).astype(np.float64)
    return np.where(windows.any_observed, crossings, np.nan)


def lag1_autocorrelation(windows: CentredWindows) -> FloatArray:
    """Lag-1 autocorrelation of each window (classic biased estimator).

    Definition = statsmodels ``acf(x, nlags=1, adjusted=False, fft=False)[1]`` = R ``acf``
    (tsfeatures ``x_acf1``): ``sum_t d_t d_{t+1} / sum_t d_t**2`` with ``d`` the deviations from
    the window mean. Pairs with a missing epoch are left out of the numerator.

    Parameters
    ----------
    windows : CentredWindows

    Returns
    -------
    ndarray of float64, shape (n_epochs,)
        In [-1, 1]; NaN for a constant window or without observed epochs.
    """
    dev = windows.deviations
    num = np.einsum("ij,ij->i", dev[:, 1:], dev[:, :-1])
    ok = windows.any_observed & ~windows.is_constant
    autocorrelation: FloatArray = np.divide(num, windows.sum_squares, out=np.full(num.shape, np.nan), where=ok)
    return autocorrelation
