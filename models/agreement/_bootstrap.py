"""Participant bootstrap: resample participants (each with all of their nights) with replacement.

A resample is a row of counts ``C[b, i]`` = how often participant ``i`` was drawn in resample
``b`` (multinomial, ``k`` draws of ``k`` participants with equal probability), so any statistic that
is a function of per-participant sums is evaluated for all resamples at once by matrix products.
A participant drawn twice counts as two participants. Intervals are percentile intervals (common
practice; Efron & Tibshirani 1993, from memory).
"""

from __future__ import annotations

import functools
from collections.abc import Mapping
from dataclasses import replace
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..errors import NightbankError
from ..records import json_value
from ..scoring.protocol import StudyProtocol

__all__ = ["InvalidAgreementInputError", "MIN_CI_PARTICIPANTS", "STUDENTIZED_MIN_PARTICIPANTS",
           "ci_method_name", "draw_counts", "effective_protocol", "json_dict",
           "json_safe", "participant_codes", "percentile_interval", "studentized_interval", "weighted_mean_interval"]

#: Fewest participants for a bootstrap interval (2 participants give only 3 distinct resamples).
MIN_CI_PARTICIPANTS = 3
#: fewer participants than this get percentile intervals: with so few, a resample's jackknife SE is
#: often near zero and the studentized interval unstable (our choice, checked by simulation in the tests)
STUDENTIZED_MIN_PARTICIPANTS = 8


def ci_method_name(n_participants: int) -> str:
    """How the participant-bootstrap intervals of ``n_participants`` participants are made."""
    if n_participants >= STUDENTIZED_MIN_PARTICIPANTS:
        return "participant bootstrap, studentized (bootstrap-t, jackknife SE)"
    return f"participant bootstrap, percentile (fewer than {STUDENTIZED_MIN_PARTICIPANTS} participants)"


class InvalidAgreementInputError(NightbankError):
    """Inputs of an agreement statistic do not fit together (lengths, ids, values)."""

    code = "invalid_agreement_input"


def effective_protocol(protocol: StudyProtocol, ci_level: float | None, n_boot: int | None,
                       seed: int | None) -> StudyProtocol:
    """``protocol`` with the given statistics options replacing its own (validated as a protocol)."""
    if not isinstance(protocol, StudyProtocol):
        raise InvalidAgreementInputError(f"protocol must be a StudyProtocol, got {type(protocol).__name__}")
    overrides: dict[str, Any] = {}
    if ci_level is not None:
        overrides["ci_level"] = ci_level
    if n_boot is not None:
        overrides["bootstrap_resamples"] = n_boot
    if seed is not None:
        overrides["seed"] = seed
    return replace(protocol, **overrides) if overrides else protocol


def participant_codes(participant_ids: ArrayLike, n: int) -> tuple[NDArray[np.intp], list[str]]:
    """Integer code per night (order of first appearance) and the participant ids."""
    ids = np.asarray(participant_ids, dtype=object)
    if ids.shape != (n,):
        raise InvalidAgreementInputError(f"participant_ids has shape {ids.shape}, expected ({n},) (one per night)")
    if any(v is None or (isinstance(v, float) and not np.isfinite(v)) for v in ids):
        raise InvalidAgreementInputError("participant_ids must not hold missing values")
    names = [str(v) for v in ids]
    order = list(dict.fromkeys(names))
    index = {name: i for i, name in enumerate(order)}
    return np.fromiter((index[v] for v in names), dtype=np.intp, count=n), order


def draw_counts(k: int, n_boot: int, seed: int) -> NDArray[np.float64]:
    """Resample counts, shape (n_boot, k): row b says how often each participant is in resample b.

    The same arguments give the same draws, so they are made once and shared (read-only): a
    comparison asks for them once per method and parameter.
    """
    return _draws(int(k), int(n_boot), int(seed))


@functools.lru_cache(maxsize=32)
def _draws(k: int, n_boot: int, seed: int) -> NDArray[np.float64]:
    rng = np.random.default_rng(seed)
    counts = rng.multinomial(k, np.full(k, 1.0 / k), size=n_boot).astype(np.float64)
    counts.setflags(write=False)
    return counts


def percentile_interval(values: NDArray[np.float64], ci_level: float) -> tuple[float, float]:
    """Percentile interval of the finite bootstrap values (NaN, NaN when there are none)."""
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return float("nan"), float("nan")
    tail = (1.0 - ci_level) / 2.0
    low, high = np.quantile(finite, [tail, 1.0 - tail])
    return float(low), float(high)


def studentized_interval(estimate: float, se: float, values: NDArray[np.float64], value_se: NDArray[np.float64],
                         ci_level: float, *, n_participants: int) -> tuple[float, float]:
    """Bootstrap-t interval (Efron & Tibshirani 1993, ch. 12; from memory).

    ``t_b = (values_b - estimate) / value_se_b`` over the resamples with a finite SE above
    ``1e-6 * se`` (a resample that repeats one participant has a zero SE up to rounding, whose
    ``t`` would be unbounded); the interval is ``(estimate - t_(1-a/2) se, estimate - t_(a/2) se)``. Falls back to the
    percentile interval when ``se`` is not finite, no resample has a usable SE, or there are fewer
    than :data:`STUDENTIZED_MIN_PARTICIPANTS` participants.
    """
    if n_participants < STUDENTIZED_MIN_PARTICIPANTS:
        return percentile_interval(values, ci_level)
    floor = 1e-6 * se if np.isfinite(se) and se > 0 else 0.0
    ok = np.isfinite(values) & np.isfinite(value_se) & (value_se > floor)
    if not (np.isfinite(estimate) and np.isfinite(se)) or not ok.any():
        return percentile_interval(values, ci_level)
    t = (values[ok] - estimate) / value_se[ok]
    tail = (1.0 - ci_level) / 2.0
    t_low, t_high = np.quantile(t, [tail, 1.0 - tail])
    return float(estimate - t_high * se), float(estimate - t_low * se)


def weighted_mean_interval(values: NDArray[np.float64], counts: NDArray[np.float64],
                           ci_level: float) -> tuple[float, float]:
    """Participant-bootstrap interval of the mean of ``values`` (shape (k,), NaN skipped).

    Bootstrap-t: each resample's mean is studentized by its own standard error
    ``sqrt(sum c_i (x_i - mean)^2 / (K (K - 1)))`` (the jackknife SE of a mean, K draws).
    """
    ok = np.isfinite(values)
    x = values[ok]
    c = counts[:, ok]
    if x.size < MIN_CI_PARTICIPANTS:
        return float("nan"), float("nan")
    draws = c.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        means = (c @ x) / draws
        spread = (c * (x[None, :] - means[:, None]) ** 2).sum(axis=1)
        se_boot = np.sqrt(spread / (draws * (draws - 1.0)))
    se = float(x.std(ddof=1)) / np.sqrt(x.size)
    return studentized_interval(float(x.mean()), se, means, se_boot, ci_level, n_participants=int(x.size))


def json_dict(values: Mapping[str, Any]) -> dict[str, Any]:
    """A mapping made JSON-safe by :func:`json_safe`."""
    return {str(k): json_safe(v) for k, v in values.items()}


def json_safe(value: Any) -> Any:
    """Nested dicts, lists and tuples made JSON-safe (tuples become lists, NaN becomes None)."""
    if isinstance(value, Mapping):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple | np.ndarray):
        return [json_safe(v) for v in value]
    return json_value(value)

