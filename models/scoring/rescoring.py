"""Sleep/wake sequences: checking, run-length encoding and Webster rescoring.

A sleep/wake sequence holds one value per epoch: 1 = sleep (the positive class), 0 = wake and,
where allowed, NaN = unscored or excluded. Everything here is vectorised over runs of equal
values; nothing loops over epochs.

Errors::

    NightbankError
    ├── InvalidSleepVectorError      not a 1-D sequence of 0/1 (NaN where allowed)
    └── UnsupportedEpochLengthError  epoch length not in SUPPORTED_EPOCH_SECONDS
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..errors import NightbankError
from ..nights.night import SUPPORTED_EPOCH_SECONDS

__all__ = [
    "InvalidSleepVectorError",
    "UnsupportedEpochLengthError",
    "WEBSTER_AFTER_WAKE_MIN",
    "WEBSTER_ISLAND_MIN",
    "as_sleep_vector",
    "check_epoch_seconds",
    "run_lengths",
    "webster_rescore",
]

#: Webster rules 1-3 as data: (minimum preceding wake, sleep rescored to wake), minutes.
#: Webster et al. 1982 as restated by Cole et al. 1992 (published-methods 1c, from memory).
WEBSTER_AFTER_WAKE_MIN: tuple[tuple[int, int], ...] = ((4, 1), (10, 3), (15, 4))
#: Webster rules 4-5 as data: (longest sleep run rescored, minimum wake on both sides), minutes.
WEBSTER_ISLAND_MIN: tuple[tuple[int, int], ...] = ((6, 10), (10, 20))
_AFTER_WAKE_WAKE_MIN = np.array([w for w, _ in WEBSTER_AFTER_WAKE_MIN])  # ascending, as are the amounts
_AFTER_WAKE_RESCORED_MIN = np.array([0] + [r for _, r in WEBSTER_AFTER_WAKE_MIN])


class InvalidSleepVectorError(NightbankError):
    """A sleep/wake sequence is not 1-D, has values other than 0/1 (or NaN where allowed),
    or its length does not match its partner's."""

    code = "invalid_sleep_vector"


class UnsupportedEpochLengthError(NightbankError):
    """The epoch length is not one of ``SUPPORTED_EPOCH_SECONDS`` (15, 30, 60 s)."""

    code = "unsupported_epoch_length"


def check_epoch_seconds(epoch_seconds: object) -> int:
    """Return ``epoch_seconds`` as an int, or raise :class:`UnsupportedEpochLengthError`.

    Examples
    --------
    >>> check_epoch_seconds(30)
    30
    """
    if isinstance(epoch_seconds, (bool, np.bool_)) or not isinstance(
            epoch_seconds, (int, np.integer, float, np.floating)) or epoch_seconds not in SUPPORTED_EPOCH_SECONDS:
        raise UnsupportedEpochLengthError(
            f"epoch length {epoch_seconds!r} s is not supported; use one of {list(SUPPORTED_EPOCH_SECONDS)} s")
    return int(epoch_seconds)


def as_sleep_vector(sleep: ArrayLike, *, allow_unscored: bool = True, name: str = "sleep") -> NDArray[np.float64]:
    """Check a sleep/wake sequence and return it as float64.

    Parameters
    ----------
    sleep : array-like of shape (n_epochs,)
        1 = sleep, 0 = wake, NaN = unscored (bool and integer arrays are accepted).
    allow_unscored : bool, default=True
        Whether NaN is allowed.
    name : str, default="sleep"
        Name used in error messages.

    Returns
    -------
    sleep : ndarray of float64, shape (n_epochs,)

    Raises
    ------
    InvalidSleepVectorError
        If the input is not 1-D or holds any other value.
    """
    arr = np.asarray(sleep)
    if arr.ndim != 1 or arr.dtype.kind not in "biuf":
        raise InvalidSleepVectorError(f"{name} must be a 1-D numeric array, got shape {arr.shape} dtype {arr.dtype}")
    values = arr.astype(np.float64, copy=False)
    if arr.dtype.kind == "b":
        return values
    # v * (v - 1) is 0 exactly for 0 and 1, and NaN (non-zero) for NaN; counting is the fast check
    with np.errstate(over="ignore"):  # huge values overflow to inf, which is still non-zero
        n_bad = np.count_nonzero(values * (values - 1.0))
    if allow_unscored and n_bad:
        n_bad -= np.count_nonzero(np.isnan(values))
    if n_bad:
        ok = (values == 0.0) | (values == 1.0) | (np.isnan(values) if allow_unscored else False)
        bad = np.flatnonzero(~ok)[:5].tolist()
        allowed = "0, 1 or NaN" if allow_unscored else "0 or 1"
        raise InvalidSleepVectorError(f"{name} must hold only {allowed}; first bad epochs: {bad}")
    return values


def run_lengths(values: NDArray[np.generic]) -> tuple[NDArray[np.intp], NDArray[np.intp], NDArray[np.generic]]:
    """Run-length encoding of a 1-D array.

    Parameters
    ----------
    values : ndarray of shape (n,)

    Returns
    -------
    starts : ndarray of intp, shape (n_runs,)
        Index of the first element of each run.
    lengths : ndarray of intp, shape (n_runs,)
        Number of elements in each run.
    run_values : ndarray of shape (n_runs,)
        The value held in each run.

    Examples
    --------
    >>> starts, lengths, vals = run_lengths(np.array([1, 1, 0, 1]))
    >>> starts.tolist(), lengths.tolist(), vals.tolist()
    ([0, 2, 3], [2, 1, 1], [1, 0, 1])
    """
    n = values.shape[0]
    if n == 0:
        empty = np.zeros(0, dtype=np.intp)
        return empty, empty, values[:0]
    ends = (values[1:] != values[:-1]).nonzero()[0] + 1  # first index of every run but the first
    starts = np.empty(ends.size + 1, dtype=np.intp)
    starts[0] = 0
    starts[1:] = ends
    lengths = np.empty_like(starts)
    lengths[:-1] = ends - starts[:-1]
    lengths[-1] = n - starts[-1]
    return starts, lengths, values[starts]


def webster_rescore(sleep: ArrayLike, epoch_seconds: int) -> NDArray[np.float64]:
    """Apply Webster's five rescoring rules to any sleep/wake sequence.

    Rules (Webster et al. 1982 as restated by Cole et al. 1992, from memory), in minutes:

    1. after at least 4 min of wake, the next 1 min of sleep becomes wake;
    2. after at least 10 min of wake, the next 3 min of sleep become wake;
    3. after at least 15 min of wake, the next 4 min of sleep become wake;
    4. a sleep run of at most 6 min with at least 10 min of wake on both sides becomes wake;
    5. a sleep run of at most 10 min with at least 20 min of wake on both sides becomes wake.

    Parameters
    ----------
    sleep : array-like of shape (n_epochs,)
        1 = sleep, 0 = wake, NaN = unscored.
    epoch_seconds : {15, 30, 60}
        Epoch length; each duration above becomes ``minutes * 60 / epoch_seconds`` epochs
        (4 min = 8 epochs of 30 s).

    Returns
    -------
    sleep : ndarray of float64, shape (n_epochs,)
        The rescored sequence (1.0 / 0.0), NaN where the input is unscored.

    Raises
    ------
    InvalidSleepVectorError
        If ``sleep`` holds anything other than 0, 1 or NaN.
    UnsupportedEpochLengthError
        If ``epoch_seconds`` is not 15, 30 or 60.

    Notes
    -----
    Every rule reads the runs of the *original* sequence, and the epochs each rule marks are
    combined (union). Because every rule only turns sleep into wake, the result does not depend
    on the order of the rules, and an epoch rescored by one rule never lengthens a wake run seen
    by another (no cascade). Only runs that are actually observed count: a sleep run at the
    start or end of the recording has no wake on that side, so rules 4-5 do not apply to it.
    Where rules 1-3 overlap, the longest rescoring applies, capped at the sleep run's length.

    Unscored epochs (NaN, e.g. missing counts) stay unscored and are skipped: the rules read the
    runs of the *scored* epochs in order, so wake on both sides of an unscored stretch is one
    wake run and an unscored stretch neither ends nor starts a run (the convention of
    :func:`models.scoring.parameters.sleep_parameters`). The result equals rescoring the
    sequence with its unscored epochs removed, then putting them back.

    Examples
    --------
    >>> webster_rescore([0, 0, 0, 0, 1, 1], 60).tolist()
    [0.0, 0.0, 0.0, 0.0, 0.0, 1.0]
    >>> webster_rescore([0, 0, np.nan, 0, 0, 1, 1], 60).tolist()
    [0.0, 0.0, nan, 0.0, 0.0, 0.0, 1.0]
    """
    values = as_sleep_vector(sleep, allow_unscored=True)
    per_min = 60 // check_epoch_seconds(epoch_seconds)
    unscored = np.isnan(values)
    if not unscored.any():
        return _webster_scored(values.astype(np.int8), per_min).astype(np.float64)
    out = np.full(values.size, np.nan)
    out[~unscored] = _webster_scored(values[~unscored].astype(np.int8), per_min)
    return out


def _webster_scored(x: NDArray[np.int8], per_min: int) -> NDArray[np.int8]:
    """Webster's rules on a sequence of scored epochs (0/1 only), ``per_min`` epochs per minute."""
    _, lengths, vals = run_lengths(x)
    if lengths.size < 2:
        return x
    # runs alternate wake/sleep: take every other run from the first sleep run; the wake runs
    # around it are its neighbours (length 0 where the recording ends)
    first = 0 if vals[0] == 1 else 1
    padded = np.zeros(lengths.size + 2, dtype=np.intp)
    padded[1:-1] = lengths
    length = lengths[first::2]
    before = padded[first:first + 2 * length.size:2]
    after = padded[first + 2:first + 2 + 2 * length.size:2]
    # rules 1-3: the largest amount whose wake condition holds (0 if none), at most the run
    rescored = _AFTER_WAKE_RESCORED_MIN[np.searchsorted(_AFTER_WAKE_WAKE_MIN * per_min, before, side="right")]
    marked = np.minimum(rescored * per_min, length)
    shorter_side = np.minimum(before, after)
    for sleep_max_min, wake_least_min in WEBSTER_ISLAND_MIN:  # rules 4-5: the whole run
        island = (length <= sleep_max_min * per_min) & (shorter_side >= wake_least_min * per_min)
        marked = np.where(island, length, marked)
    # rebuild: every run becomes a wake piece then a sleep piece (wake run: L, 0; sleep run: marked, L - marked)
    pieces = np.zeros(2 * lengths.size, dtype=np.intp)
    pieces[0::2] = lengths
    pieces[2 * first::4] = marked
    pieces[2 * first + 1::4] = length - marked
    states = np.zeros(pieces.size, dtype=np.int8)
    states[1::2] = 1
    return np.repeat(states, pieces)
