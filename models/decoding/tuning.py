"""Choosing the HMM decoder's settings on inner nights.

:func:`tune_decoder` tries every combination of a grid of :class:`~models.decoding.decoders.HmmDecoder`
settings on the given (inner-fold) nights and keeps the one with the smallest parameter error
among those whose pooled balanced accuracy reaches the floor. The error of a setting
(:func:`parameter_objective`) is

``sum over MAE_PARAMETERS of mean |error| / margin + w * sum over BIAS_PARAMETERS of |mean error| / margin``

over the nights (error = decoded minus reference value of a night), each parameter computed by
:func:`models.scoring.parameters.sleep_parameters` under the study protocol on the decoded calls
and on the labels, and scaled by the protocol's equivalence margin so that counts and minutes add
up. The absolute errors reward night-by-night agreement; the signed means (awakenings, WASO and
TST) penalise a decoder that leans to one state on every night, which the absolute errors alone
allow when it trades a few large errors for many small ones of one sign. The weight ``w``
(:data:`BIAS_WEIGHT`) makes a bias of one margin count as much as ``w`` margins of night-by-night
error: a lean repeated on every night adds up in a study's mean, while night-by-night errors
partly cancel there (with ``w = 1`` the chosen settings called too much wake on simulated studies:
mean TST error about -16 min on held-out nights). When no setting reaches the floor, the
setting of highest balanced accuracy is kept and ``floor_met`` is False. Ties keep the earlier
grid point (grid order is the product of the grid's values in the order given).

Each night is decoded once per (method, stickiness, emission weight), all of them side by side
(:mod:`models.decoding._hmm_batch`, the same numbers as one by one): the Viterbi path does not
depend on ``threshold`` (Viterbi grid points differing only in it share one result and the first
of them stands for all), and the marginals are thresholded for every ``threshold`` of the grid.
A stickiness below 1 that would push a switching probability of the chain to 1 or more is left out
of the grid (the trials list only the settings tried).
"""

from __future__ import annotations

import itertools
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..agreement.epoch_metrics import epoch_agreement
from ..scoring.parameters import sleep_parameters
from ..scoring.protocol import DEFAULT_PROTOCOL, StudyProtocol
from ._hmm_batch import batch_marginals, batch_viterbi
from .decoders import HmmDecoder
from .hmm import DEFAULT_PSEUDO_COUNT, InvalidHmmError, SleepWakeHmm, fit_sleep_wake_hmm

__all__ = ["BIAS_PARAMETERS", "BIAS_WEIGHT", "DEFAULT_DECODER_GRID", "MAE_PARAMETERS", "DecoderChoice",
           "parameter_objective", "tune_decoder"]

#: Settings tried by default (grid order: the product in this order).
DEFAULT_DECODER_GRID: Mapping[str, Sequence[Any]] = {
    "method": ("viterbi", "marginal"),
    "stickiness": (0.25, 0.5, 1.0, 2.0),
    "emission_weight": (0.5, 1.0, 2.0, 3.0),
    "threshold": (0.5, 0.35, 0.2, 0.1, 0.05, 0.02),
}
#: Parameters whose mean absolute error enters the objective.
MAE_PARAMETERS: tuple[str, ...] = ("awakenings", "waso_min")
#: Parameters whose mean signed error (bias) enters the objective, as an absolute value.
BIAS_PARAMETERS: tuple[str, ...] = ("awakenings", "waso_min", "tst_min")
#: Weight of the bias terms against the mean absolute errors in the objective (module docstring).
BIAS_WEIGHT = 12.0


@dataclass(frozen=True)
class DecoderChoice:
    """The chosen settings and what every grid point scored.

    Attributes
    ----------
    settings : dict
        Keyword settings of the chosen :class:`HmmDecoder`.
    decoder : HmmDecoder
        The chosen decoder (with the chain it was tuned with).
    objective : float
        Its scaled parameter error (lower is better).
    balanced_accuracy : float
        Its pooled epoch balanced accuracy over the nights.
    floor_met : bool
        Whether any setting reached ``ba_floor``.
    trials : list of dict
        Per grid point: its settings, ``objective``, ``balanced_accuracy`` and the terms of the
        objective in the parameters' units (``<name>_mae`` and ``<name>_bias`` per parameter name,
        e.g. ``waso_min_mae``, ``tst_min_bias``).
    """

    settings: dict[str, Any]
    decoder: HmmDecoder
    objective: float
    balanced_accuracy: float
    floor_met: bool
    trials: list[dict[str, Any]]


def _number(value: float | int | None) -> float:
    return float("nan") if value is None else float(value)


def parameter_objective(decoded: Sequence[Mapping[str, Any]], truth: Sequence[Mapping[str, Any]],
                        margins: Mapping[str, float], *,
                        bias_weight: float = BIAS_WEIGHT) -> tuple[float, dict[str, float]]:
    """The tuning objective of decoded nights against their reference values (module docstring).

    Parameters
    ----------
    decoded, truth : sequence of mapping of str to number or None
        Per night, the sleep parameters of the decoded calls and of the labels (e.g.
        ``sleep_parameters(...).as_dict()``); None = undefined on that night (left out).
    margins : mapping of str to float
        Equivalence margin per parameter, in its unit (``protocol.equivalence_margins``).
    bias_weight : float, default=BIAS_WEIGHT
        Factor on the bias terms (>= 0).

    Returns
    -------
    objective : float
        NaN when a term has no night with both values defined.
    terms : dict of str to float
        ``<name>_mae`` and ``<name>_bias`` in the parameter's unit.
    """
    terms: dict[str, float] = {}
    objective = 0.0
    for name in dict.fromkeys((*MAE_PARAMETERS, *BIAS_PARAMETERS)):
        diffs = np.array([_number(d[name]) - _number(t[name]) for d, t in zip(decoded, truth, strict=True)])
        diffs = diffs[np.isfinite(diffs)]
        terms[f"{name}_mae"] = float(np.abs(diffs).mean()) if diffs.size else float("nan")
        terms[f"{name}_bias"] = float(diffs.mean()) if diffs.size else float("nan")
        if name in MAE_PARAMETERS:
            objective += terms[f"{name}_mae"] / margins[name]
        if name in BIAS_PARAMETERS:
            objective += bias_weight * abs(terms[f"{name}_bias"]) / margins[name]
    return float(objective), terms


def _grid_points(grid: Mapping[str, Sequence[Any]]) -> list[dict[str, Any]]:
    allowed = {"method", "threshold", "stickiness", "emission_weight"}
    unknown = sorted(set(grid) - allowed)
    if unknown or not grid or any(len(v) == 0 for v in grid.values()):
        raise InvalidHmmError(f"grid must map {sorted(allowed)} to non-empty value lists; unknown: {unknown}")
    names = list(grid)
    return [dict(zip(names, values, strict=True)) for values in itertools.product(*(grid[n] for n in names))]


def _runs(decoders: Sequence[HmmDecoder], probs: Sequence[NDArray[np.float64]]
          ) -> dict[tuple[Any, ...], list[NDArray[Any]]]:
    """Per (method, stickiness, emission weight) of ``decoders``: each night's Viterbi path or marginals.

    Every night under every distinct setting is one case of :func:`~models.decoding._hmm_batch.batch_viterbi`
    or :func:`~models.decoding._hmm_batch.batch_marginals` (the same numbers as decoding them one by one).
    """
    keys = {"viterbi": dict[tuple[Any, ...], HmmDecoder](), "marginal": dict[tuple[Any, ...], HmmDecoder]()}
    for d in decoders:
        keys[d.method].setdefault((d.method, d.stickiness, d.emission_weight), d)
    out: dict[tuple[Any, ...], list[NDArray[Any]]] = {}
    for method, batch in (("viterbi", batch_viterbi), ("marginal", batch_marginals)):
        cases = [(d.chain.emissions(p, emission_weight=d.emission_weight), d.chain.transition, d.chain.initial)
                 for d in keys[method].values() for p in probs]
        results: list[NDArray[Any]] = list(batch(cases))
        for i, key in enumerate(keys[method]):
            out[key] = results[i * len(probs):(i + 1) * len(probs)]
    return out


def tune_decoder(p_sleep_per_night: Sequence[ArrayLike], labels_per_night: Sequence[ArrayLike], *,
                 protocol: StudyProtocol = DEFAULT_PROTOCOL, ba_floor: float = 0.6,
                 grid: Mapping[str, Sequence[Any]] = DEFAULT_DECODER_GRID, epoch_seconds: int = 30,
                 in_bed: Sequence[tuple[int, int]] | None = None, hmm: SleepWakeHmm | None = None,
                 pseudo_count: float = DEFAULT_PSEUDO_COUNT, bias_weight: float = BIAS_WEIGHT) -> DecoderChoice:
    """Pick HMM decoder settings on the given (inner) nights.

    Parameters
    ----------
    p_sleep_per_night : sequence of array-like, each of shape (n_epochs,)
        Calibrated P(sleep) per epoch (NaN = unscored).
    labels_per_night : sequence of array-like, each of shape (n_epochs,)
        Reference labels (1 = sleep, 0 = wake, NaN = unscored), same lengths.
    protocol : StudyProtocol, default=DEFAULT_PROTOCOL
        Parameter definitions and the margins that scale the errors.
    ba_floor : float, default=0.6
        Smallest acceptable pooled balanced accuracy, in [0, 1].
    grid : mapping of str to sequence, default=DEFAULT_DECODER_GRID
        Values per :class:`HmmDecoder` setting (``method``, ``threshold``, ``stickiness``,
        ``emission_weight``).
    epoch_seconds : {15, 30, 60}, default=30
    in_bed : sequence of (int, int) or None, default=None
        ``(lights_off_idx, lights_on_idx)`` per night; None = whole recordings.
    hmm : SleepWakeHmm or None, default=None
        The chain; None fits it on ``labels_per_night`` with ``pseudo_count``.
    pseudo_count : float, default=DEFAULT_PSEUDO_COUNT
    bias_weight : float, default=BIAS_WEIGHT
        Factor on the objective's bias terms (:func:`parameter_objective`).

    Returns
    -------
    DecoderChoice

    Raises
    ------
    InvalidHmmError
        For mismatched nights, an empty or unknown grid, a ``ba_floor`` outside [0, 1] or a negative
        ``bias_weight``.
    """
    n_nights = len(p_sleep_per_night)
    if n_nights == 0 or len(labels_per_night) != n_nights or (in_bed is not None and len(in_bed) != n_nights):
        raise InvalidHmmError("p_sleep_per_night, labels_per_night (and in_bed) must list the same nights (>= 1)")
    if not 0.0 <= ba_floor <= 1.0:
        raise InvalidHmmError(f"ba_floor must lie in [0, 1], got {ba_floor!r}")
    if not np.isfinite(bias_weight) or bias_weight < 0:
        raise InvalidHmmError(f"bias_weight must be a finite number >= 0, got {bias_weight!r}")
    probs = [np.asarray(p, dtype=np.float64) for p in p_sleep_per_night]
    labels = [np.asarray(y, dtype=np.float64) for y in labels_per_night]
    for k, (p, y) in enumerate(zip(probs, labels, strict=True)):
        if p.shape != y.shape:
            raise InvalidHmmError(f"night {k}: p_sleep {p.shape} and labels {y.shape} differ in shape")
    bounds = list(in_bed) if in_bed is not None else [(0, p.size) for p in probs]
    chain = hmm if hmm is not None else fit_sleep_wake_hmm(labels, pseudo_count=pseudo_count)
    margins = protocol.equivalence_margins

    def params(x: np.ndarray[Any, Any], k: int) -> dict[str, float | int | None]:
        return sleep_parameters(x, epoch_seconds, lights_off_idx=bounds[k][0], lights_on_idx=bounds[k][1],
                                protocol=protocol).as_dict()

    truth = [params(y, k) for k, y in enumerate(labels)]
    pooled_labels = np.concatenate(labels)
    trials: list[dict[str, Any]] = []
    decoders: list[HmmDecoder] = []
    allowed: list[tuple[dict[str, Any], HmmDecoder]] = []
    for point in _grid_points(grid):
        stickiness = float(point.get("stickiness", 1.0))
        if 0.0 < stickiness < 1.0 and max(chain.transition[0, 1], chain.transition[1, 0]) / stickiness >= 1.0:
            continue  # the chain switches too often for this stickiness (a switching probability >= 1)
        allowed.append((point, HmmDecoder(chain, **point)))
    runs = _runs([d for _, d in allowed], probs)
    seen: set[tuple[Any, ...]] = set()
    for point, decoder in allowed:
        key = (decoder.method, decoder.stickiness, decoder.emission_weight)
        if decoder.method == "viterbi":
            if key in seen:  # the same path as an earlier grid point: its threshold plays no part
                continue
            seen.add(key)
            calls = [np.where(np.isnan(p), np.nan, path.astype(np.float64)) for p, path in zip(probs, runs[key],
                                                                                                strict=True)]
        else:
            calls = [np.where(np.isnan(p), np.nan, (m >= decoder.threshold).astype(np.float64))
                     for p, m in zip(probs, runs[key], strict=True)]
        decoded = [params(c, k) for k, c in enumerate(calls)]
        objective, terms = parameter_objective(decoded, truth, margins, bias_weight=bias_weight)
        ba = epoch_agreement(pooled_labels, np.concatenate(calls))["balanced_accuracy"]
        trials.append(point | {"objective": objective, "balanced_accuracy": float(ba)} | terms)
        decoders.append(decoder)
    if not trials:
        raise InvalidHmmError("no setting of the grid fits the chain (every stickiness is too small)")
    ok = [i for i, t in enumerate(trials) if t["balanced_accuracy"] >= ba_floor and np.isfinite(t["objective"])]
    if ok:
        best = min(ok, key=lambda i: trials[i]["objective"])
    else:
        best = max(range(len(trials)), key=lambda i: np.nan_to_num(trials[i]["balanced_accuracy"], nan=-1.0))
    chosen = trials[best]
    return DecoderChoice(settings={k: chosen[k] for k in grid}, decoder=decoders[best],
                         objective=chosen["objective"], balanced_accuracy=chosen["balanced_accuracy"],
                         floor_met=bool(ok), trials=trials)
