"""Per-night intervals, review score and posterior P(sleep) of a model's scoring.

The intervals are the model's own (:meth:`models.SleepModel.intervals`: the spread of posterior
sleep/wake paths of the fitted decoding around the decoded night, scaled on the model's inner nights,
at the study protocol's ``interval_level``);
:data:`INTERVAL_PATHS` paths are drawn from :func:`interval_seed` of the night id and the model's content
(:func:`model_key`), so a night scored again, also by the same nights trained again, gets the same numbers.
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from models import HmmDecoder, Night, SleepModel, StudyProtocol, TrainingConfig

__all__ = ["INTERVAL_PARAMETERS", "INTERVAL_PATHS", "at_level", "decoded_extras", "interval_seed", "model_key",
           "probabilities"]

#: Parameters that get a per-night interval (model methods with decoding), in table order.
INTERVAL_PARAMETERS: tuple[str, ...] = ("sol_min", "tst_min", "waso_min", "awakenings", "sleep_efficiency_pct")
#: Posterior paths drawn per night for the intervals (as for the held-out intervals of training).
INTERVAL_PATHS: int = TrainingConfig().interval_paths


def at_level(protocol: StudyProtocol, interval_level: float | None) -> StudyProtocol:
    """``protocol`` with its intervals at ``interval_level`` (None: as it is).

    Raises
    ------
    InvalidProtocolError
        If the level is not a number in (0, 1) (a 422 naming ``interval_level``).
    """
    if interval_level is None:
        return protocol
    return StudyProtocol.from_dict(protocol.to_dict() | {"interval_level": interval_level})


def model_key(kind: str, version: int, training_hashes: Sequence[str]) -> str:
    """What names a model's content for :func:`interval_seed`: its kind, number and training nights' hashes.

    Not the version's random uid: the same nights trained again (same seed, same model) give the same key,
    so the same intervals.
    """
    digest = hashlib.sha256(",".join(sorted(training_hashes)).encode()).hexdigest()[:16]
    return f"{kind}:{version}:{digest}"


def interval_seed(night_id: str, model: str) -> int:
    """Seed of a night's interval paths: the first 8 hex digits of SHA-256 of ``night_id:model``
    (``model`` from :func:`model_key`).

    Examples
    --------
    >>> interval_seed("a1", "v") == interval_seed("a1", "v") != interval_seed("a2", "v")
    True
    """
    return int(hashlib.sha256(f"{night_id}:{model}".encode()).hexdigest()[:8], 16)


def _finite(value: Any) -> float | None:
    number = float(value)
    return number if math.isfinite(number) else None


def probabilities(values: Any) -> list[float | None]:
    """Per-epoch probabilities as JSON values: rounded to 5 decimals, NaN -> None."""
    return [None if math.isnan(v) else v for v in np.round(np.asarray(values, dtype=np.float64), 5).tolist()]


def decoded_extras(model: SleepModel, night: Night, p_sleep: Any, *, protocol: StudyProtocol,
                   seed: int) -> dict[str, Any]:
    """``intervals``, ``interval_level``, ``uncertainty_min`` and ``p_sleep_posterior`` of a model's scoring.

    Parameters
    ----------
    model : SleepModel
    night : Night
    p_sleep : ndarray of float64, shape (n_epochs,)
        The model's (calibrated) P(sleep) of the night, NaN = unscored.
    protocol : StudyProtocol
        Parameter definitions and ``interval_level``.
    seed : int
        Seed of the posterior paths.

    Returns
    -------
    dict
        All None without decoding; ``p_sleep_posterior`` only for the HMM decoder (None at unscored
        epochs); interval ends a parameter has on no path (e.g. SOL without sleep) are None.
    """
    out: dict[str, Any] = {"intervals": None, "interval_level": None, "uncertainty_min": None,
                           "p_sleep_posterior": None}
    decoding = model.decoding_
    if decoding is None:
        return out
    found = model.intervals(p_sleep, night, level=protocol.interval_level, n_paths=INTERVAL_PATHS, seed=seed,
                            protocol=protocol)
    if found is not None:
        out["intervals"] = {name: [_finite(v) for v in found.intervals[name]] for name in INTERVAL_PARAMETERS}
        out["interval_level"] = float(found.level)
        out["uncertainty_min"] = _finite(found.uncertainty_min)
    if isinstance(decoding.decoder, HmmDecoder):
        posterior = decoding.decoder.marginals(p_sleep)
        out["p_sleep_posterior"] = probabilities(np.where(np.isnan(np.asarray(p_sleep, dtype=np.float64)),
                                                           np.nan, posterior))
    return out
