"""Sleep parameters of many sampled paths of one night at once.

:func:`path_parameters` gives, for a batch of sleep/wake paths over the same night, the values
:func:`models.scoring.parameters.sleep_parameters` gives each path, for the parameters in
:data:`PATH_PARAMETER_NAMES`. Under the common definitions (``sol="first_sleep"`` and
``unscored_breaks_bouts=False``, any ``waso_end`` and ``min_awakening_epochs``) it works on the
whole batch with array operations; otherwise it calls ``sleep_parameters`` path by path.

With unscored epochs (the same for every path of a night) the scored epochs are taken in order,
as ``sleep_parameters`` does: TST, WASO, efficiency and awakenings are those of the night with
the unscored epochs cut out, SOL is measured on the in-bed clock.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..scoring.parameters import InvalidInBedIntervalError, sleep_parameters
from ..scoring.protocol import DEFAULT_PROTOCOL, StudyProtocol
from ..scoring.rescoring import check_epoch_seconds
from .hmm import InvalidHmmError

__all__ = ["PATH_PARAMETER_NAMES", "path_parameters"]

#: Parameters computed for every path, in table order.
PATH_PARAMETER_NAMES: tuple[str, ...] = ("sol_min", "tst_min", "waso_min", "awakenings", "sleep_efficiency_pct")


def _per_path(paths: NDArray[np.int8], unscored: NDArray[np.bool_], epoch_seconds: int, off: int, on: int,
              protocol: StudyProtocol) -> dict[str, NDArray[np.float64]]:
    out = {name: np.empty(paths.shape[0]) for name in PATH_PARAMETER_NAMES}
    for k, path in enumerate(paths):
        sleep = np.where(unscored, np.nan, path.astype(np.float64))
        params = sleep_parameters(sleep, epoch_seconds, lights_off_idx=off, lights_on_idx=on,
                                  protocol=protocol).as_dict()
        for name in PATH_PARAMETER_NAMES:
            out[name][k] = params[name]
    return out


def path_parameters(paths: ArrayLike, epoch_seconds: int, *, lights_off_idx: int = 0,
                    lights_on_idx: int | None = None, unscored: ArrayLike | None = None,
                    protocol: StudyProtocol = DEFAULT_PROTOCOL) -> dict[str, NDArray[np.float64]]:
    """Sleep parameters of each path of a batch.

    Parameters
    ----------
    paths : array-like of shape (n_paths, n_epochs)
        1 = sleep, 0 = wake (whole recording).
    epoch_seconds : {15, 30, 60}
    lights_off_idx, lights_on_idx : int, int or None
        In-bed interval ``[lights_off_idx, lights_on_idx)``; None = end of the recording.
    unscored : array-like of bool, shape (n_epochs,), default=None
        Epochs unscored on every path (NaN in the night's probabilities); None = all scored.
    protocol : StudyProtocol, default=DEFAULT_PROTOCOL

    Returns
    -------
    dict of str to ndarray of float64, shape (n_paths,)
        One array per name of :data:`PATH_PARAMETER_NAMES` (minutes, count or percent).
    """
    x = np.asarray(paths)
    if x.ndim != 2 or not np.isin(x, (0, 1)).all():
        raise InvalidHmmError(f"paths must be a 2-D array of 0 and 1, got shape {x.shape}")
    x = x.astype(np.int8, copy=False)
    n_paths, n = x.shape
    epoch_min = check_epoch_seconds(epoch_seconds) / 60.0
    off, on = int(lights_off_idx), n if lights_on_idx is None else int(lights_on_idx)
    if not 0 <= off <= on <= n:
        raise InvalidInBedIntervalError(f"in-bed interval [{off}, {on}) is not inside the recording of {n} epochs")
    mask = np.zeros(n, dtype=bool) if unscored is None else np.asarray(unscored, dtype=bool)
    if mask.shape != (n,):
        raise InvalidHmmError(f"unscored must have shape ({n},), got {mask.shape}")
    if protocol.sol != "first_sleep" or protocol.unscored_breaks_bouts:
        return _per_path(x, mask, int(epoch_seconds), off, on, protocol)
    scored_idx = np.flatnonzero(~mask[off:on])  # in-bed positions of the scored epochs
    v = x[:, off:on][:, scored_idx]
    m = scored_idx.size
    nan = np.full(n_paths, np.nan)
    if m == 0:
        return {name: nan.copy() for name in PATH_PARAMETER_NAMES}
    n_sleep = v.sum(axis=1, dtype=np.int64)
    has_sleep = n_sleep > 0
    first = np.argmax(v, axis=1)
    last = m - 1 - np.argmax(v[:, ::-1], axis=1)
    # wake bouts after onset: each starts right after a sleep epoch; each ends before a sleep epoch or at the end
    start_r, start_c = np.nonzero((v[:, :-1] == 1) & (v[:, 1:] == 0))
    start_c = start_c + 1
    ends = (v == 0) & np.concatenate([v[:, 1:] == 1, np.ones((n_paths, 1), dtype=bool)], axis=1)
    end_r, end_c = np.nonzero(ends)
    after_onset = has_sleep[end_r] & (end_c > first[end_r])  # drops wake before the first sleep
    end_c = end_c[after_onset]
    lengths = end_c - start_c + 1
    counted = lengths >= protocol.min_awakening_epochs
    if protocol.waso_end == "lights_on":
        wake_after = (m - first) - n_sleep
    else:
        wake_after = (last - first + 1) - n_sleep
        counted &= start_c < last[start_r]
    awakenings = np.bincount(start_r[counted], minlength=n_paths).astype(np.float64)
    tst = n_sleep * epoch_min
    return {
        "sol_min": np.where(has_sleep, scored_idx[first] * epoch_min, np.nan),
        "tst_min": tst.astype(np.float64),
        "waso_min": np.where(has_sleep, wake_after * epoch_min, 0.0),
        "awakenings": np.where(has_sleep, awakenings, 0.0),
        "sleep_efficiency_pct": 100.0 * tst / (m * epoch_min),
    }
