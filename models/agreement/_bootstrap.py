"""Participant bootstrap: resample participants (each with all of their nights) with replacement.

A resample is a row of counts ``C[b, i]`` = how often participant ``i`` was drawn in resample
``b`` (multinomial, ``k`` draws of ``k`` participants with equal probability), so any statistic that
is a function of per-participant sums is evaluated for all resamples at once by matrix products.
A participant drawn twice counts as two participants. Intervals are percentile intervals (common
practice; Efron & Tibshirani 1993, from memory).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import replace
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..errors import NightbankError
from ..records import json_value
from ..scoring.protocol import StudyProtocol

__all__ = ["InvalidAgreementInputError", "draw_counts", "effective_protocol", "json_dict", "json_safe",
           "participant_codes", "percentile_interval", "weighted_mean_interval"]


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
    """Resample counts, shape (n_boot, k): row b says how often each participant is in resample b."""
    rng = np.random.default_rng(seed)
    return rng.multinomial(k, np.full(k, 1.0 / k), size=n_boot).astype(np.float64)


def percentile_interval(values: NDArray[np.float64], ci_level: float) -> tuple[float, float]:
    """Percentile interval of the finite bootstrap values (NaN, NaN when there are none)."""
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return float("nan"), float("nan")
    tail = (1.0 - ci_level) / 2.0
    low, high = np.quantile(finite, [tail, 1.0 - tail])
    return float(low), float(high)


def weighted_mean_interval(values: NDArray[np.float64], counts: NDArray[np.float64],
                           ci_level: float) -> tuple[float, float]:
    """Percentile interval of the participant mean of ``values`` (shape (k,), NaN skipped)."""
    ok = np.isfinite(values)
    sums = counts @ np.where(ok, values, 0.0)
    weights = counts @ ok.astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        means = np.where(weights > 0, sums / np.where(weights > 0, weights, 1.0), np.nan)
    return percentile_interval(means, ci_level)


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
