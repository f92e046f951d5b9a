"""Per-night intervals of the sleep parameters from paths drawn from the HMM posterior.

:func:`night_intervals` draws whole sleep/wake paths of a night by forward filtering, backward
sampling (:func:`models.decoding.hmm.sample_paths`), computes the sleep parameters of every path
(:func:`models.decoding.path_parameters.path_parameters`, the definitions of
:func:`models.scoring.parameters.sleep_parameters` under the study protocol) and reports:

- an equal-tailed interval per parameter at ``level``: the ``(1 - level) / 2`` and
  ``(1 + level) / 2`` quantiles of the sampled values, taken as values that occur among the
  samples (the inverse of the empirical distribution function), so that a parameter counted in
  whole epochs gets endpoints it can take and the interval holds at least ``level`` of the draws;
- the posterior median of each parameter;
- with ``centre`` and ``spread_scale`` (settings fitted on inner nights, see
  :mod:`models.decoding.interval_scaling`), the intervals are instead centred on the decoded
  night's values and their sides scaled per parameter;
- a review score, ``uncertainty_min``: the expected absolute error of the posterior median under
  the posterior, E|TST - median TST| + E|WASO - median WASO|, in minutes (nights to look at first).

:func:`interval_coverage` compares the nominal level with the share of held-out nights whose
reference value falls inside its interval: an interval is honest when the two are close.
Everything is reproducible from ``seed``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..scoring.protocol import DEFAULT_PROTOCOL, StudyProtocol
from ._hmm_batch import batch_sample_paths
from .hmm import InvalidHmmError, SleepWakeHmm, sample_paths
from .interval_scaling import scaled_intervals
from .path_parameters import PATH_PARAMETER_NAMES, path_parameters

__all__ = ["DEFAULT_INTERVAL_LEVEL", "NightIntervals", "interval_coverage", "night_intervals",
           "parameter_intervals", "sampled_parameters",
           "sampled_parameters_of_nights"]

#: Default level of the per-night intervals.
DEFAULT_INTERVAL_LEVEL = 0.90
_REVIEW_PARAMETERS = ("tst_min", "waso_min")


def _check_level(level: float) -> float:
    if not 0.0 < level < 1.0:
        raise InvalidHmmError(f"level must lie in (0, 1), got {level!r}")
    return float(level)


@dataclass(frozen=True)
class NightIntervals:
    """Intervals and review score of one night.

    Attributes
    ----------
    level : float
    intervals : dict of str to [float, float]
        ``[low, high]`` per name of :data:`~models.decoding.path_parameters.PATH_PARAMETER_NAMES`
        (NaN, NaN when no draw defines the parameter, e.g. SOL on paths without sleep).
    median : dict of str to float
        Posterior median per parameter.
    expected_abs_error : dict of str to float
        E|value - median| under the posterior for TST and WASO, minutes.
    uncertainty_min : float
        Sum of ``expected_abs_error``: the night's review score, minutes.
    n_paths : int
    """

    level: float
    intervals: dict[str, list[float]]
    median: dict[str, float]
    expected_abs_error: dict[str, float]
    uncertainty_min: float
    n_paths: int

    def to_dict(self) -> dict[str, object]:
        """Plain values (NaN kept as float NaN; pass through ``models.records.json_record`` for JSON)."""
        return {"level": self.level, "intervals": {k: list(v) for k, v in self.intervals.items()},
                "median": dict(self.median), "expected_abs_error": dict(self.expected_abs_error),
                "uncertainty_min": self.uncertainty_min, "n_paths": self.n_paths}


def parameter_intervals(samples: Mapping[str, ArrayLike], *,
                        level: float = DEFAULT_INTERVAL_LEVEL) -> dict[str, list[float]]:
    """Equal-tailed intervals of sampled parameter values.

    Parameters
    ----------
    samples : mapping of str to array-like of shape (n_paths,)
        Sampled values per parameter; NaN draws are left out.
    level : float, default=DEFAULT_INTERVAL_LEVEL
        In (0, 1).

    Returns
    -------
    dict of str to [low, high]
        Quantiles ``(1 - level) / 2`` and ``(1 + level) / 2`` by the inverse empirical CDF
        (numpy ``method="inverted_cdf"``).
    """
    lev = _check_level(level)
    out: dict[str, list[float]] = {}
    for name, values in samples.items():
        v = np.asarray(values, dtype=np.float64)
        v = v[~np.isnan(v)]
        if v.size == 0:
            out[name] = [float("nan"), float("nan")]
            continue
        low, high = np.quantile(v, [(1.0 - lev) / 2.0, (1.0 + lev) / 2.0], method="inverted_cdf")
        out[name] = [float(low), float(high)]
    return out


def sampled_parameters(p_sleep: ArrayLike, hmm: SleepWakeHmm, epoch_seconds: int, *, lights_off_idx: int = 0,
                       lights_on_idx: int | None = None, protocol: StudyProtocol = DEFAULT_PROTOCOL,
                       n_paths: int = 1000, seed: int = 0, stickiness: float = 1.0,
                       emission_weight: float = 1.0) -> dict[str, NDArray[np.float64]]:
    """Sleep parameters of ``n_paths`` posterior paths of one night.

    Parameters
    ----------
    p_sleep : array-like of shape (n_epochs,)
        Calibrated P(sleep) of each epoch of the recording, NaN = unscored (unscored on every path).
    hmm : SleepWakeHmm
        Fitted chain; ``stickiness`` and ``emission_weight`` as in
        :class:`models.decoding.decoders.HmmDecoder`.
    epoch_seconds : {15, 30, 60}
    lights_off_idx, lights_on_idx, protocol
        As for :func:`models.scoring.parameters.sleep_parameters`.
    n_paths : int, default=1000
    seed : int, default=0
        Seed of the ``numpy.random.Generator`` that draws the paths.

    Returns
    -------
    dict of str to ndarray of float64, shape (n_paths,)
    """
    p = np.asarray(p_sleep, dtype=np.float64)
    chain = hmm.with_stickiness(stickiness)
    paths = sample_paths(chain.emissions(p, emission_weight=emission_weight), chain.transition, chain.initial,
                         n_paths=n_paths, rng=np.random.default_rng(seed))
    return path_parameters(paths, epoch_seconds, lights_off_idx=lights_off_idx, lights_on_idx=lights_on_idx,
                           unscored=np.isnan(p), protocol=protocol)


def sampled_parameters_of_nights(probs: Sequence[ArrayLike], hmm: SleepWakeHmm, epoch_seconds: int, *,
                                 bounds: Sequence[tuple[int, int | None]], seeds: Sequence[int],
                                 protocol: StudyProtocol = DEFAULT_PROTOCOL, n_paths: int = 1000,
                                 stickiness: float = 1.0, emission_weight: float = 1.0
                                 ) -> list[dict[str, NDArray[np.float64]]]:
    """:func:`sampled_parameters` of several nights, their paths drawn side by side (the same values).

    Parameters
    ----------
    probs : sequence of array-like of shape (n_epochs,)
        Calibrated P(sleep) per night.
    hmm, epoch_seconds, protocol, n_paths, stickiness, emission_weight
        As for :func:`sampled_parameters`.
    bounds : sequence of (int, int or None)
        ``(lights_off_idx, lights_on_idx)`` per night.
    seeds : sequence of int
        Seed per night.

    Returns
    -------
    list of dict of str to ndarray of float64, shape (n_paths,)
    """
    ps = [np.asarray(p, dtype=np.float64) for p in probs]
    chain = hmm.with_stickiness(stickiness)
    paths = batch_sample_paths([(chain.emissions(p, emission_weight=emission_weight), chain.transition, chain.initial)
                                for p in ps], n_paths=n_paths, seeds=seeds)
    return [path_parameters(x, epoch_seconds, lights_off_idx=off, lights_on_idx=on, unscored=np.isnan(p),
                            protocol=protocol) for x, p, (off, on) in zip(paths, ps, bounds, strict=True)]


def night_intervals(p_sleep: ArrayLike, hmm: SleepWakeHmm, epoch_seconds: int, *, lights_off_idx: int = 0,
                    lights_on_idx: int | None = None, protocol: StudyProtocol = DEFAULT_PROTOCOL,
                    level: float = DEFAULT_INTERVAL_LEVEL, n_paths: int = 1000, seed: int = 0,
                    stickiness: float = 1.0, emission_weight: float = 1.0,
                    centre: Mapping[str, float | None] | None = None,
                    spread_scale: Mapping[str, float] | None = None) -> NightIntervals:
    """Intervals, medians and review score of one night (arguments as for :func:`sampled_parameters`).

    Parameters
    ----------
    level : float, default=DEFAULT_INTERVAL_LEVEL
        Level of every interval, in (0, 1).
    centre : mapping of str to float or None, default=None
        Decoded value per parameter (None values fall back to the posterior median); with
        ``spread_scale``, the intervals are
        :func:`~models.decoding.interval_scaling.scaled_intervals`.
    spread_scale : mapping of str to float or None, default=None
        Scale per parameter; None (the default) = the posterior's own equal-tailed intervals.

    Returns
    -------
    NightIntervals
    """
    lev = _check_level(level)
    samples = sampled_parameters(p_sleep, hmm, epoch_seconds, lights_off_idx=lights_off_idx,
                                 lights_on_idx=lights_on_idx, protocol=protocol, n_paths=n_paths, seed=seed,
                                 stickiness=stickiness, emission_weight=emission_weight)
    median: dict[str, float] = {}
    for name in PATH_PARAMETER_NAMES:
        v = samples[name][~np.isnan(samples[name])]
        median[name] = float(np.median(v)) if v.size else float("nan")
    error = {name: float(np.nanmean(np.abs(samples[name] - median[name]))) if np.isfinite(median[name])
             else float("nan") for name in _REVIEW_PARAMETERS}
    if spread_scale is None:
        intervals = parameter_intervals(samples, level=lev)
    else:
        p = np.asarray(p_sleep, dtype=np.float64)
        stop = p.size if lights_on_idx is None else int(lights_on_idx)
        centres = {k: float("nan") if v is None else float(v) for k, v in (centre or {}).items()}
        intervals = scaled_intervals(samples, centres, spread_scale, level=lev, epoch_seconds=epoch_seconds,
                                     in_bed_epochs=stop - int(lights_off_idx))
    return NightIntervals(level=lev, intervals=intervals, median=median,
                          expected_abs_error=error, uncertainty_min=float(sum(error.values())), n_paths=int(n_paths))


def interval_coverage(intervals_per_night: Sequence[Mapping[str, Sequence[float]]],
                      truth_per_night: Sequence[Mapping[str, float]], *,
                      level: float = DEFAULT_INTERVAL_LEVEL) -> dict[str, dict[str, float]]:
    """Nominal against observed coverage over held-out nights.

    Parameters
    ----------
    intervals_per_night : sequence of mapping of str to [low, high]
        Per night, e.g. ``NightIntervals.intervals``.
    truth_per_night : sequence of mapping of str to float
        Reference value per parameter and night (e.g. ``sleep_parameters(...).as_dict()``).
    level : float, default=DEFAULT_INTERVAL_LEVEL
        The intervals' nominal level.

    Returns
    -------
    dict of str to dict
        Per parameter of the first night's intervals: ``nominal``, ``observed`` (share of the
        nights with a defined interval and reference value whose value lies in ``[low, high]``)
        and ``n_nights`` (those nights).
    """
    lev = _check_level(level)
    if len(intervals_per_night) != len(truth_per_night):
        raise InvalidHmmError(f"{len(intervals_per_night)} nights of intervals but {len(truth_per_night)} of "
                              "reference values")
    names = list(intervals_per_night[0]) if intervals_per_night else []
    out: dict[str, dict[str, float]] = {}
    for name in names:
        inside = []
        for k, (iv, truth) in enumerate(zip(intervals_per_night, truth_per_night, strict=True)):
            if name not in iv or name not in truth:
                raise InvalidHmmError(f"night {k} has no {name} interval or reference value")
            low, high = (float(b) for b in iv[name])
            value = float(truth[name])
            if np.isfinite(low) and np.isfinite(high) and np.isfinite(value):
                inside.append(low <= value <= high)
        out[name] = {"nominal": lev, "observed": float(np.mean(inside)) if inside else float("nan"),
                     "n_nights": float(len(inside))}
    return out
