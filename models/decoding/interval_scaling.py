"""Per-night intervals centred on the decoded night and widened to their inner-night coverage.

The posterior paths of the chain (:func:`models.decoding.intervals.sampled_parameters`) treat the
classifier's per-epoch evidence as independent, so their spread is too narrow, and their centre
need not be the decoded night's value (the decoder may threshold the marginals below 0.5 or take
the Viterbi path). A *scaled* interval keeps the posterior's shape but moves it onto the decoded
value ``c`` of the parameter and stretches each side by a factor ``s`` of that parameter:

``[c - s * (m - q_low), c + s * (q_high - m)]``

where ``m`` is the posterior median and ``q_low``, ``q_high`` the posterior's equal-tailed
quantiles at the level (each side at least one resolution step of the parameter: one epoch in
minutes, one awakening, one epoch's share of the in-bed time for efficiency). The endpoints are
rounded outwards to the parameter's resolution and clipped to the values it can take (0 to the
in-bed minutes, 0 to 100 %, awakenings from 0).

``s`` is chosen on inner nights by split-conformal calibration with normalised scores (Lei,
G'Sell, Rinaldo, Tibshirani & Wasserman 2018, "Distribution-free predictive inference for
regression", JASA 113, locally weighted conformal bands; from memory): the score of a night is
the smallest ``s`` whose interval holds its reference value (:func:`required_scale`), and ``s``
is the ``ceil((n + 1) * level)``-th smallest of the ``n`` scores (:func:`conformal_scale`), the
largest score when ``n`` is too small for that rank. On exchangeable nights the interval then
covers at least ``level`` of new nights; nights of the model's own inner folds are somewhat
easier than held-out ones, so coverage on held-out nights can still fall short.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np
from numpy.typing import ArrayLike

from .hmm import InvalidHmmError

__all__ = ["conformal_scale", "covered", "inner_scales", "posterior_sides", "required_scale", "resolutions",
           "scaled_intervals"]


def resolutions(epoch_seconds: int, in_bed_epochs: int) -> dict[str, tuple[float, float]]:
    """Resolution step and largest value of each path parameter of a night.

    Parameters
    ----------
    epoch_seconds : int
    in_bed_epochs : int
        Epochs from lights off to lights on (>= 1).

    Returns
    -------
    dict of str to (float, float)
        ``(step, upper)`` per parameter name, in the parameter's unit (minutes, count, percent).
    """
    minutes = epoch_seconds / 60.0
    span_min = max(int(in_bed_epochs), 1) * minutes
    return {"sol_min": (minutes, span_min), "tst_min": (minutes, span_min), "waso_min": (minutes, span_min),
            "awakenings": (1.0, math.inf), "sleep_efficiency_pct": (100.0 * minutes / span_min, 100.0)}


def posterior_sides(samples: ArrayLike, level: float) -> tuple[float, float, float]:
    """``(q_low, median, q_high)`` of sampled values (NaN left out; all NaN without a defined draw).

    Quantiles by the inverse empirical CDF (numpy ``method="inverted_cdf"``), as the unscaled
    intervals of :func:`models.decoding.intervals.parameter_intervals`.
    """
    v = np.asarray(samples, dtype=np.float64)
    v = v[~np.isnan(v)]
    if v.size == 0:
        return float("nan"), float("nan"), float("nan")
    low, median, high = np.quantile(v, [(1.0 - level) / 2.0, 0.5, (1.0 + level) / 2.0], method="inverted_cdf")
    return float(low), float(median), float(high)


def _sides(low: float, median: float, high: float, step: float) -> tuple[float, float]:
    return max(median - low, step), max(high - median, step)


def required_scale(centre: float, sides: tuple[float, float, float], truth: float, step: float) -> float:
    """Smallest scale whose interval around ``centre`` holds ``truth`` (NaN when a value is undefined).

    Parameters
    ----------
    centre : float
        The decoded night's value.
    sides : (float, float, float)
        :func:`posterior_sides` of the night's draws.
    truth : float
        Reference value.
    step : float
        Resolution step of the parameter (the smallest side).
    """
    low, median, high = sides
    if not all(np.isfinite(x) for x in (centre, low, median, high, truth)):
        return float("nan")
    down, up = _sides(low, median, high, step)
    return float((centre - truth) / down if truth < centre else (truth - centre) / up)


def conformal_scale(scores: ArrayLike, level: float) -> float:
    """The split-conformal scale of inner-night scores (module docstring); 1.0 without a finite score.

    Parameters
    ----------
    scores : array-like of shape (n_nights,)
        :func:`required_scale` per inner night (NaN left out).
    level : float
        In (0, 1).
    """
    if not 0.0 < level < 1.0:
        raise InvalidHmmError(f"level must lie in (0, 1), got {level!r}")
    s = np.sort(np.asarray(scores, dtype=np.float64))
    s = s[np.isfinite(s)]
    if s.size == 0:
        return 1.0
    rank = min(math.ceil((s.size + 1) * level), s.size)
    return float(s[rank - 1])


def scaled_intervals(samples: Mapping[str, ArrayLike], centre: Mapping[str, float], scale: Mapping[str, float], *,
                     level: float, epoch_seconds: int, in_bed_epochs: int) -> dict[str, list[float]]:
    """Scaled intervals of one night (module docstring).

    Parameters
    ----------
    samples : mapping of str to array-like of shape (n_paths,)
        Sampled values per parameter (:func:`models.decoding.intervals.sampled_parameters`).
    centre : mapping of str to float
        Decoded value per parameter; a missing or non-finite value falls back to the posterior median.
    scale : mapping of str to float
        Scale per parameter (>= 0); a parameter without one keeps scale 1.
    level : float
        In (0, 1).
    epoch_seconds, in_bed_epochs : int
        For :func:`resolutions`.

    Returns
    -------
    dict of str to [low, high]
        ``[nan, nan]`` where no draw defines the parameter.
    """
    steps = resolutions(epoch_seconds, in_bed_epochs)
    out: dict[str, list[float]] = {}
    for name, values in samples.items():
        low, median, high = posterior_sides(values, level)
        if not np.isfinite(median):
            out[name] = [float("nan"), float("nan")]
            continue
        step, upper = steps.get(name, (0.0, math.inf))
        c = centre.get(name, float("nan"))
        c = float(c) if c is not None and np.isfinite(c) else median
        s = float(scale.get(name, 1.0))
        if not np.isfinite(s) or s < 0:
            raise InvalidHmmError(f"the interval scale of {name} must be a finite number >= 0, got {s!r}")
        down, up = _sides(low, median, high, step)
        a, b = c - s * down, c + s * up
        if name != "sleep_efficiency_pct" and step > 0:  # whole epochs / awakenings: round outwards
            a, b = math.floor(a / step + 1e-9) * step, math.ceil(b / step - 1e-9) * step
        out[name] = [float(min(max(a, 0.0), upper)), float(min(max(b, 0.0), upper))]
    return out


def inner_scales(samples_per_night: Sequence[Mapping[str, ArrayLike]],
                 centre_per_night: Sequence[Mapping[str, float | None]],
                 truth_per_night: Sequence[Mapping[str, float | None]], *, level: float, epoch_seconds: int,
                 in_bed_epochs: Sequence[int]) -> dict[str, float]:
    """Conformal scale per parameter from inner nights' draws, decoded values and reference values.

    Parameters
    ----------
    samples_per_night : sequence of mapping of str to array-like of shape (n_paths,)
    centre_per_night, truth_per_night : sequence of mapping of str to float or None
        Decoded and reference values per night (None = undefined).
    level : float
    epoch_seconds : int
    in_bed_epochs : sequence of int
        Per night.

    Returns
    -------
    dict of str to float
        Per parameter of the first night's samples.
    """
    names = list(samples_per_night[0]) if samples_per_night else []
    out: dict[str, float] = {}
    for name in names:
        scores = []
        for k, samples in enumerate(samples_per_night):
            step = resolutions(epoch_seconds, in_bed_epochs[k]).get(name, (0.0, math.inf))[0]
            c, t = centre_per_night[k].get(name), truth_per_night[k].get(name)
            sides = posterior_sides(samples[name], level)
            centre = float(c) if c is not None and np.isfinite(c) else sides[1]
            scores.append(required_scale(centre, sides, float("nan") if t is None else float(t), step))
        out[name] = conformal_scale(scores, level)
    return out


def _number(value: float | None) -> float:
    return float("nan") if value is None else float(value)


def covered(intervals: Mapping[str, Sequence[float]], truth: Mapping[str, float | None]) -> dict[str, float]:
    """1.0 / 0.0 per parameter whether ``truth`` lies in ``[low, high]``; NaN when either is undefined."""
    out: dict[str, float] = {}
    for name, (low, high) in intervals.items():
        t = _number(truth.get(name))
        out[name] = float(low <= t <= high) if np.isfinite(t) and np.isfinite(low) and np.isfinite(high) \
            else float("nan")
    return out

