"""Per-epoch features that are not window statistics: lags, time and movement context, rule
scores and night-level normalisers.

Unlike the window features, several of these are global by design:

- lags are divided by the night's robust scale (:func:`night_scale`), so they depend on the
  whole night through one number;
- the movement-run features follow a run of still epochs as far as it goes;
- night-level normalisers are the same for every epoch of a night.

Missing epochs (NaN counts) are never treated as still: they end still runs, and every feature of
a missing epoch that describes its own counts is NaN.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

__all__ = [
    "lag_features", "movement_context", "night_normalisers", "night_scale", "rule_scores", "time_context",
]

FloatArray = NDArray[np.float64]


def night_scale(counts: FloatArray) -> float:
    """Robust movement scale of a night: the 90th percentile of its observed counts.

    Fallbacks, in order, when that is 0 (a night with over 90% zero epochs): the 90th percentile
    of the positive observed counts, then 1.0 (no positive count at all). Each step is
    proportional to the counts, so ``night_scale(c * counts) == c * night_scale(counts)`` for
    ``c > 0``.

    Parameters
    ----------
    counts : ndarray of float64, shape (n_epochs,)
        Activity counts; NaN marks a missing epoch.

    Returns
    -------
    float
        Scale in counts per epoch, always > 0.

    Examples
    --------
    >>> night_scale(np.array([0.0] * 95 + [10.0, 20.0, 30.0, 40.0, 50.0]))
    46.0
    """
    observed = counts[~np.isnan(counts)]
    if observed.size and (p90 := float(np.percentile(observed, 90))) > 0:
        return p90
    positive = observed[observed > 0]
    return float(np.percentile(positive, 90)) if positive.size else 1.0


def lag_features(counts: FloatArray, half_width: int, *, scale: float) -> dict[str, FloatArray]:
    """Counts of each epoch and its neighbours, divided by the night's scale.

    Parameters
    ----------
    counts : ndarray of float64, shape (n_epochs,)
        Activity counts; NaN marks a missing epoch.
    half_width : int
        Number of neighbours on each side, in epochs.
    scale : float
        Divisor, normally :func:`night_scale` of the night (cancels device gain and a person's
        usual movement level).

    Returns
    -------
    dict of str to ndarray of float64, shape (n_epochs,)
        ``lag_-h`` .. ``lag_+0`` .. ``lag_+h`` (offset in epochs; ``lag_-1`` is the previous
        epoch). NaN beyond the night's ends and for missing epochs.
    """
    n = counts.shape[0]
    padded = np.concatenate([np.full(half_width, np.nan), counts / scale, np.full(half_width, np.nan)])
    return {f"lag_{k:+d}": padded[half_width + k:half_width + k + n] for k in range(-half_width, half_width + 1)}


def time_context(n_epochs: int, epoch_seconds: float, *, lights_off_epoch: int = 0,
                 lights_on_epoch: int | None = None) -> dict[str, FloatArray]:
    """Minutes since lights-off and until lights-on.

    Parameters
    ----------
    n_epochs : int
    epoch_seconds : float
        Epoch length in seconds.
    lights_off_epoch : int, default=0
        Index of the first epoch after lights-off (0 = recording start).
    lights_on_epoch : int or None, default=None
        Index of the first epoch after lights-on; None if unknown.

    Returns
    -------
    dict of str to ndarray of float64, shape (n_epochs,)
        ``since_lights_off_min`` (negative before lights-off) and ``to_lights_on_min`` (negative
        after lights-on; NaN when ``lights_on_epoch`` is None), both between epoch starts.
    """
    idx = np.arange(n_epochs, dtype=np.float64)
    epoch_min = epoch_seconds / 60.0
    to_on = (lights_on_epoch - idx) * epoch_min if lights_on_epoch is not None else np.full(n_epochs, np.nan)
    return {"since_lights_off_min": (idx - lights_off_epoch) * epoch_min, "to_lights_on_min": to_on}


def movement_context(counts: FloatArray, epoch_seconds: float, *, movement_level: float) -> dict[str, FloatArray]:
    """Position of each epoch within its run of still epochs (rescoring rules as features).

    An epoch is still when observed with ``counts <= movement_level``; runs of still epochs are
    ended by movement epochs (``counts > movement_level``), missing epochs and the recording's
    ends. Expressing rescoring as "time since / until the nearest bout" follows Fisher 2021
    (arXiv:2104.14291).

    Parameters
    ----------
    counts : ndarray of float64, shape (n_epochs,)
        Activity counts; NaN marks a missing epoch.
    epoch_seconds : float
        Epoch length in seconds.
    movement_level : float
        Counts per epoch above which an epoch is a movement epoch.

    Returns
    -------
    dict of str to ndarray of float64, shape (n_epochs,)
        ``since_move_min``: duration of the still run up to and including this epoch;
        ``to_move_min``: from this epoch to the end of its still run (inclusive);
        ``still_run_min``: duration of the whole still run. All 0 at a movement epoch, NaN at a
        missing epoch; in minutes.

    Examples
    --------
    >>> m = movement_context(np.array([0.0, 0, 50, 0, 0, 0]), 60, movement_level=20)
    >>> m["since_move_min"].tolist(), m["still_run_min"].tolist()
    ([1.0, 2.0, 0.0, 1.0, 2.0, 3.0], [2.0, 2.0, 0.0, 3.0, 3.0, 3.0])
    """
    n = counts.shape[0]
    missing = np.isnan(counts)
    still = ~missing & (np.where(missing, 0.0, counts) <= movement_level)
    idx = np.arange(n)
    last_break = np.maximum.accumulate(np.where(still, -1, idx)) if n else idx
    next_break = np.minimum.accumulate(np.where(still, n, idx)[::-1])[::-1] if n else idx
    epoch_min = epoch_seconds / 60.0
    out = {
        "since_move_min": np.where(still, idx - last_break, 0) * epoch_min,
        "to_move_min": np.where(still, next_break - idx, 0) * epoch_min,
        "still_run_min": np.where(still, next_break - last_break - 1, 0) * epoch_min,
    }
    for values in out.values():
        values[missing] = np.nan
    return out


def rule_scores(counts: FloatArray, epoch_seconds: float) -> dict[str, FloatArray]:
    """Continuous scores of the classical count rules (higher = more likely sleep), one per rule.

    Calls :func:`models.scoring.rules.continuous_scores` (Cole-Kripke, Sadeh, weighted count threshold,
    with default options). The rules leave missing counts out of their windows (weights
    renormalised over the present epochs) and give a missing epoch itself a NaN score.

    Parameters
    ----------
    counts : ndarray of float64, shape (n_epochs,)
    epoch_seconds : float
        15, 30 or 60.

    Returns
    -------
    dict of str to ndarray of float64, shape (n_epochs,)
        Keyed ``rule_<score name>`` in sorted order.
    """
    from ..scoring.rescoring import check_epoch_seconds  # imported here: rules is an optional family
    from ..scoring.rules import continuous_scores

    missing = np.isnan(counts)
    scores = continuous_scores(counts, check_epoch_seconds(epoch_seconds))
    out = {}
    for key in sorted(scores):
        values = np.array(scores[key], dtype=np.float64)
        values[missing] = np.nan
        out[f"rule_{key}"] = values
    return out


def night_normalisers(counts: FloatArray, n_epochs: int, *, quantiles: tuple[float, ...]) -> dict[str, FloatArray]:
    """Night-level count quantiles broadcast to every epoch.

    Parameters
    ----------
    counts : ndarray of float64, shape (n_epochs,)
        Activity counts; NaN marks a missing epoch (left out).
    n_epochs : int
        Number of rows to broadcast to.
    quantiles : tuple of float
        Percentiles (0..100), numpy 'linear' method.

    Returns
    -------
    dict of str to ndarray of float64, shape (n_epochs,)
        ``night_p<q>`` in counts per epoch; NaN when the night has no observed epoch.
    """
    observed = counts[~np.isnan(counts)]
    values = np.percentile(observed, quantiles) if observed.size else np.full(len(quantiles), np.nan)
    return {f"night_p{q:g}": np.full(n_epochs, v) for q, v in zip(quantiles, values, strict=True)}
