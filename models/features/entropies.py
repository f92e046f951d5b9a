"""Sample, permutation and spectral entropy of every centred window, vectorised.

Each function gives, for every epoch, the entropy of the centred window around it, with the same
definition as the reference library function applied to that window alone (antropy 0.2.3; see
each docstring). Windows are truncated at the night's ends (see :mod:`models.features.windows`); missing
epochs (NaN) are left out as each docstring describes, never treated as zero counts. Values are
reproducible and local: the value at epoch ``i`` depends only on epochs
``i - half_width .. i + half_width``.

Defined values for still windows (all counts equal, e.g. all zero during sleep): every entropy
is 0 -- a perfectly regular window. This matches antropy for permutation and spectral entropy;
for sample entropy it follows from the fixed tolerance (all templates match, so A = B).
"""

from __future__ import annotations

from functools import lru_cache
from itertools import permutations
from math import factorial

import numpy as np
from numpy.lib.stride_tricks import as_strided, sliding_window_view
from numpy.typing import NDArray

from .windows import CentredWindows, window_bounds

__all__ = ["permutation_entropy", "sample_entropy", "spectral_entropy"]

FloatArray = NDArray[np.float64]


def _cumulative(mask: NDArray[np.bool_]) -> NDArray[np.int64]:
    """Prefix sums along axis 0 with a leading row of zeros (exact integers)."""
    out = np.zeros((mask.shape[0] + 1,) + mask.shape[1:], dtype=np.int64)
    np.cumsum(mask, axis=0, out=out[1:])
    return out


def _pair_matches(values: FloatArray, usable: NDArray[np.bool_], max_lag: int, order: int,
                  tolerance: float) -> tuple[NDArray[np.bool_], NDArray[np.bool_]]:
    """Template-pair matches for every lag d = 1..max_lag, shapes (n_epochs, max_lag).

    Row i, column d - 1 is the pair (i, i + d). Returns the matches on ``order`` values (B) and on
    ``order + 1`` values (A).
    """
    n, m = values.shape[0], order
    lagged = sliding_window_view(np.concatenate([values, np.full(max_lag + m, np.nan)]), max_lag + 1)
    close = lagged[:, 1:] - lagged[:, :1]  # row i: y[i + d] - y[i]
    partner = sliding_window_view(np.concatenate([usable, np.zeros(max_lag, bool)]), max_lag + 1)[:, 1:]
    close = np.abs(close, out=close) < tolerance  # NaN compares False: a missing value never matches
    match_b = close[:n] & usable[:, None] & partner
    for k in range(1, m):
        match_b &= close[k:n + k]
    return match_b, match_b & close[m:n + m]


def _lag_sums(matches: NDArray[np.bool_], lags: list[int]) -> dict[int, tuple[NDArray[np.int64], NDArray[np.int64]]]:
    """Running pair counts over lags 1..L for each L in ``lags``.

    Returns, for each L, ``(earlier, later)`` of shape (n_epochs + 1,): ``earlier[t]`` counts the
    matching pairs (i, i + d), d <= L, with ``i < t``; ``later[t]`` those with ``i + d < t``.
    """
    n, max_lag = matches.shape
    bounds = sorted(set(lags))
    starts = [0, *bounds[:-1]]
    # later partner: column d - 1 of row j holds the pair (j - d, j), read from a sheared view
    padded = np.zeros((n + max_lag, max_lag), dtype=bool)
    padded[max_lag:] = matches
    row, col = padded.strides
    sheared = as_strided(padded[max_lag - 1:], shape=(n, max_lag), strides=(row, col - row))
    out = {}
    parts = [np.cumsum(np.add.reduceat(m_, starts, axis=1, dtype=np.int64), axis=1) for m_ in (matches, sheared)]
    for idx, lag in enumerate(bounds):
        pair = []
        for part in parts:
            running = np.zeros(n + 1, dtype=np.int64)
            np.cumsum(part[:, idx], out=running[1:])
            pair.append(running)
        out[lag] = (pair[0], pair[1])
    return out


def sample_entropy(values: FloatArray, half_widths: tuple[int, ...], *, order: int = 2,
                   tolerance: float = 0.2) -> FloatArray:
    """Sample entropy (Richman & Moorman 2000) of each centred window, for several window sizes.

    Definition = ``antropy.sample_entropy(window, order=order, tolerance=tolerance)`` (its
    Chebyshev/numba path): templates are runs of ``order + 1`` consecutive values and only the
    first ``N - order`` templates of a window of length N are used, for both lengths. B = number of
    template pairs ``i < j`` whose first ``order`` values are all within the tolerance, A = number
    of pairs whose ``order + 1`` values are all within it. A match is a distance **strictly below**
    ``tolerance`` (antropy's numba path; its KD-tree path and the published text use ``<=``).
    SampEn = ``-ln(A / B)``.

    Tolerance: a fixed ``tolerance`` in the units of ``values`` (nightbank: log1p counts), not
    antropy's default ``0.2 * SD`` of the window. On count data the SD-relative tolerance is 0 in
    still windows (SampEn undefined exactly where sleep is) and makes a window with one twitch as
    "irregular" as a restless one; a fixed tolerance keeps values comparable across windows and
    nights (a common choice for sliding-window SampEn). With log counts, 0.2 means counts within
    about 20% of each other match.

    Parameters
    ----------
    values : ndarray of float64, shape (n_epochs,)
        The series; NaN marks a missing epoch. A template containing a missing epoch is not used.
    half_widths : tuple of int
        Half-width of each window size in epochs.
    order : int, default=2
        Embedding dimension m.
    tolerance : float, default=0.2
        Tolerance r, in the units of ``values``.

    Returns
    -------
    ndarray of float64, shape (n_epochs, len(half_widths))
        SampEn per epoch and window size. NaN when B = 0 (no two templates match, or fewer than two
        usable templates). When A = 0 < B (antropy: ``inf``) the value is capped at
        ``ln(T * (T - 1) / 2)``, T = number of usable templates: the largest finite value possible
        for that window (Richman & Moorman's upper bound, from memory). Still windows give 0.

    Notes
    -----
    Pair counts of all windows come from running counts (exact integers): with ``e = hi - order``
    the last template start of a window, its pairs ``lo <= i < j <= e`` are (pairs with
    ``j <= e``, counted by the later template) minus (pairs with ``i < lo``, counted by the
    earlier one), both over lags ``1 .. e - lo``; every pair with ``i < lo`` and such a lag ends
    before ``e``. Full windows share one lag limit per window size; a window truncated at the
    series' start holds every pair ending by ``e``, one truncated at its end every pair from
    ``lo``, so only per-row sums over a few lag limits are needed.
    """
    y = np.asarray(values, dtype=np.float64)
    n, m = y.shape[0], int(order)
    out = np.full((n, len(half_widths)), np.nan)
    max_lag = min(2 * max(half_widths) - m, n - 1 - m)
    if max_lag < 1:
        return out
    observed = ~np.isnan(y)
    usable: NDArray[np.bool_] = np.all(sliding_window_view(np.concatenate([observed, np.zeros(m, dtype=bool)]), m + 1),
                                       axis=1)
    full_lags = [min(2 * h - m, max_lag) for h in half_widths if 2 * h - m >= 1]
    sums = [_lag_sums(x, [*full_lags, max_lag]) for x in _pair_matches(y, usable, max_lag, m, tolerance)]
    n_usable = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(usable, out=n_usable[1:])
    for col, h in enumerate(half_widths):
        lo, hi = window_bounds(n, h)
        end = hi - m  # last template start
        ok = end - lo >= 1
        row_end = np.clip(end + 1, 0, n)
        counts = []
        for lag_sums in sums:  # B, then A
            earlier_all, later_all = lag_sums[max_lag]
            # left-truncated windows: every pair ending by ``end``; right-truncated: every pair from ``lo``
            count = np.where(lo == 0, later_all[row_end], earlier_all[n] - earlier_all[lo])
            full = np.flatnonzero((lo > 0) & (hi < n - 1) & ok)
            if full.size:
                earlier, later = lag_sums[min(2 * h - m, max_lag)]
                count[full] = later[row_end[full]] - earlier[lo[full]]
            counts.append(np.where(ok, count, 0))
        b, a = counts
        t = (n_usable[np.maximum(end + 1, lo)] - n_usable[lo]).astype(np.float64)
        cap = np.log(np.maximum(t * (t - 1.0) / 2.0, 1.0))
        ratio = np.log(np.maximum(b, 1).astype(np.float64)) - np.log(np.maximum(a, 1).astype(np.float64))
        out[:, col] = np.where(b == 0, np.nan, np.where(a == 0, cap, ratio))
    return out


@lru_cache(maxsize=8)
def _pattern_table(order: int) -> NDArray[np.int64]:
    """Map ``sum(rank_positions * order**arange(order))`` to a pattern index 0..order!-1."""
    table = np.full(order**order, -1, dtype=np.int64)
    weights = order ** np.arange(order)
    for idx, perm in enumerate(permutations(range(order))):
        table[int(np.dot(perm, weights))] = idx
    return table


def permutation_entropy(values: FloatArray, half_widths: tuple[int, ...], *, order: int = 3) -> FloatArray:
    """Normalised permutation entropy (Bandt & Pompe 2002) of each centred window.

    Definition = ``antropy.perm_entropy(window, order=order, delay=1, normalize=True)``: each run
    of ``order`` consecutive values maps to its ordinal pattern; **ties rank the earlier position
    lower** (stable sort), so a run of equal counts is an "increasing" pattern. H = -sum p log2 p
    over the pattern frequencies, divided by ``log2(order!)``, in [0, 1].

    Parameters
    ----------
    values : ndarray of float64, shape (n_epochs,)
        The series; NaN marks a missing epoch. Patterns containing a missing epoch are skipped.
    half_widths : tuple of int
        Half-width of each window size in epochs.
    order : int, default=3
        Pattern length (embedding dimension); delay is 1.

    Returns
    -------
    ndarray of float64, shape (n_epochs, len(half_widths))
        NaN for a window holding no complete pattern; 0 for a still (constant) window.
    """
    y = np.asarray(values, dtype=np.float64)
    n, m = y.shape[0], int(order)
    out = np.full((n, len(half_widths)), np.nan)
    if n < m:
        return out
    embedded = sliding_window_view(y, m)
    ranks = np.argsort(embedded, axis=1, kind="stable")
    pattern = _pattern_table(m)[ranks @ (m ** np.arange(m))]
    complete: NDArray[np.bool_] = ~np.any(np.isnan(embedded), axis=1)
    onehot = (pattern[:, None] == np.arange(factorial(m))[None, :]) & complete[:, None]
    cum = _cumulative(onehot)
    for col, h in enumerate(half_widths):
        lo, hi = window_bounds(n, h)
        stop = np.maximum(hi - m + 2, lo)  # patterns starting at lo .. hi - m + 1
        counts = (cum[stop] - cum[lo]).astype(np.float64)
        total = counts.sum(axis=1)
        p = np.divide(counts, total[:, None], out=np.zeros_like(counts), where=total[:, None] > 0)
        plogp = np.where(p > 0, p * np.log2(np.where(p > 0, p, 1.0)), 0.0)
        h_norm = np.clip(-plogp.sum(axis=1) / np.log2(factorial(m)), 0.0, 1.0)
        out[:, col] = np.where(total > 0, h_norm, np.nan)
    return out


@lru_cache(maxsize=16)
def _centred_dft_basis(length: int) -> tuple[FloatArray, FloatArray]:
    """cos and sin of ``2 pi k u / N`` for u = 1..N//2 (rows) and k = 0..N//2 (columns), N = ``length`` (odd)."""
    u = np.arange(1, length // 2 + 1)[:, None]
    k = np.arange(length // 2 + 1)[None, :]
    angle = 2.0 * np.pi * ((u * k) % length) / length
    return np.cos(angle), np.sin(angle)


def _centred_power(rows: FloatArray) -> FloatArray:
    """``|X_k|**2`` for k = 0..N//2 of each row of odd length N = 2h + 1, shape (n_rows, h + 1).

    With the time origin at the middle epoch (a phase that cancels in the power), ``X_k`` has
    real part ``x_h + sum_u (x_{h+u} + x_{h-u}) cos(2 pi k u / N)`` and imaginary part
    ``-sum_u (x_{h+u} - x_{h-u}) sin(2 pi k u / N)``, u = 1..h: two products with h-row bases,
    half the work of one product with the full N-row basis.
    """
    h = rows.shape[1] // 2
    cos, sin = _centred_dft_basis(rows.shape[1])
    later, earlier = rows[:, h + 1:], rows[:, h - 1::-1]
    real = (later + earlier) @ cos
    real += rows[:, h:h + 1]
    imag = (later - earlier) @ sin
    np.square(real, out=real)
    real += np.square(imag, out=imag)
    return real


def _normalised_spectral_entropy(power: FloatArray, lengths: NDArray[np.int64]) -> FloatArray:
    """Entropy of one-sided periodogram rows over log2(bins); row r uses ``lengths[r] // 2 + 1`` bins.

    ``power`` holds ``|X_k|**2`` for k = 0.. (zero past a row's bins) and is modified in place. As
    scipy ``periodogram`` (density, one-sided), every bin except DC and, for even lengths, Nyquist
    is doubled. H = -sum p log2 p is computed as ``log2(T) - sum(P log2 P) / T``, T = sum(P).
    """
    bins = lengths // 2 + 1
    power[:, 1:] *= 2.0
    even = np.flatnonzero(lengths % 2 == 0)
    power[even, bins[even] - 1] *= 0.5
    total = power.sum(axis=1)
    logs = np.zeros_like(power)
    np.log2(power, out=logs, where=power > 0)
    plogp = np.einsum("ij,ij->i", power, logs)
    positive = total > 0
    safe_total = np.where(positive, total, 1.0)
    # a single-bin spectrum (window of 1 epoch) holds no power after demeaning: 0 like any constant
    return np.where(positive, (np.log2(safe_total) - plogp / safe_total) / np.log2(np.maximum(bins, 2)), 0.0)


def spectral_entropy(windows: CentredWindows) -> FloatArray:
    """Normalised spectral entropy of each centred window.

    Definition = ``antropy.spectral_entropy(window, sf=1, method='fft', normalize=True)``: the
    one-sided periodogram of the demeaned window (scipy ``periodogram``: boxcar window, every bin
    except DC and, for even lengths, Nyquist doubled), normalised to sum 1; H = -sum p log2 p
    divided by log2 of the number of bins (``N // 2 + 1``, DC included).

    Missing epochs inside a window are replaced by the window's observed mean (so they add no
    power); the window length N still counts them. Truncated windows at the night's ends use
    their own length N. Full-length windows (odd N) use two matrix products with cached
    half-length DFT bases (see :func:`_centred_power`; lengths like 61 and 181 are primes, where
    FFTs are slow).

    Parameters
    ----------
    windows : CentredWindows
        The centred windows of one series.

    Returns
    -------
    ndarray of float64, shape (n_epochs,)
        In [0, 1]; 0 for a still (constant) window, whose spectrum holds no power outside DC
        (antropy also gives 0); NaN without observed epochs.
    """
    n, h, width = windows.values.shape[0], windows.half_width, windows.width
    dev = windows.deviations  # observed values minus window mean, 0 elsewhere
    lengths = windows.hi - windows.lo + 1
    out = np.full(n, np.nan)
    if n >= width:  # full windows: the contiguous rows h .. n - h - 1
        out[h:n - h] = _normalised_spectral_entropy(_centred_power(dev[h:n - h]), lengths[h:n - h])
    edge = np.flatnonzero(lengths < width)  # truncated windows: at most 2 per length
    if edge.size:
        edge = edge[np.argsort(lengths[edge], kind="stable")]
        edge_len = lengths[edge]
        first = windows.lo[edge] - edge + h  # column of the window's first epoch in its row
        columns = np.minimum(first[:, None] + np.arange(width)[None, :], width - 1)
        segments = dev[edge[:, None], columns]  # left-aligned; only the first edge_len values are used
        spectra = np.zeros((edge.size, int(edge_len[-1]) // 2 + 1), dtype=np.complex128)
        group_starts = np.flatnonzero(np.diff(edge_len, prepend=-1)).tolist()
        for g0, g1 in zip(group_starts, [*group_starts[1:], edge.size], strict=True):
            length = int(edge_len[g0])
            np.fft.rfft(segments[g0:g1, :length], axis=1, out=spectra[g0:g1, :length // 2 + 1])
        out[edge] = _normalised_spectral_entropy(np.square(spectra.real) + np.square(spectra.imag), edge_len)
    out[~windows.any_observed] = np.nan
    return out
