"""Fitting a model's decoding: calibration, decoder and interval settings from inner-fold nights.

:func:`fit_night_decoding` turns a model's raw per-epoch P(sleep) on its *inner validation*
nights (never a held-out night) into a :class:`NightDecoding`:

1. **calibration** (``"isotonic"``, ``"platt"`` or ``"none"``) fitted on the pooled inner
   validation epochs (:mod:`models.decoding.calibration`), with the Brier score before and after
   and the reliability curve of the calibrated probabilities (10 equal-width bins);
2. **chain**: the two-state sleep/wake chain counted from the *training* nights' labels
   (:func:`~models.decoding.hmm.fit_sleep_wake_hmm`);
3. **threshold decoder**: Youden's J threshold (balanced accuracy, under ``min_sensitivity``) on
   the calibrated inner predictions (:func:`models.learning.threshold.youden_threshold`'s rule,
   computed here with scikit-learn's ``roc_curve``); its pooled inner balanced accuracy minus
   :data:`DEFAULT_BA_MARGIN` is the default balanced-accuracy floor of the next step;
4. **HMM decoder**: :func:`~models.decoding.tuning.tune_decoder` over :data:`DEFAULT_DECODER_GRID`
   on the calibrated inner nights: the settings with the smallest inner objective
   (:func:`~models.decoding.tuning.parameter_objective`: awakenings and WASO mean absolute
   errors plus :data:`~models.decoding.tuning.BIAS_WEIGHT` times the absolute mean signed errors
   of awakenings, WASO and TST, each scaled by its equivalence margin) among those meeting the
   floor;
5. **interval settings**: paths for the per-night intervals are drawn from the chain with the
   tuned HMM stickiness and its emission weight multiplied by a factor of
   :data:`INTERVAL_WEIGHT_FACTORS` (a factor < 1 tempers the epoch evidence, which the chain
   treats as independent although the classifier's errors are not). For each factor, the
   intervals are centred on the chosen decoder's values of the night and their sides scaled per
   parameter by the split-conformal scale of the inner nights
   (:mod:`models.decoding.interval_scaling`), so that they cover about the nominal share of the
   inner nights; the factor kept minimises the mean interval score of TST and WASO of those
   scaled intervals at the nominal level (Gneiting & Raftery 2007, "Strictly proper scoring
   rules, prediction, and estimation", section 6.2, from memory: ``width + (2 / alpha) *
   distance outside``, a proper score of central intervals), ties to the earlier (larger) factor.

``decoder`` picks which of steps 3 and 4 makes the calls; both are computed so that the model
card can show them side by side. Everything is deterministic given ``seed``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from sklearn.metrics import roc_curve

from ..agreement.epoch_metrics import epoch_agreement
from ..scoring.parameters import sleep_parameters
from ..scoring.protocol import DEFAULT_PROTOCOL, StudyProtocol
from .calibration import (
    CALIBRATORS,
    InvalidCalibrationError,
    IsotonicCalibrator,
    PlattCalibrator,
    brier_score,
    calibrator_from_dict,
    reliability_curve,
)
from .decoders import HmmDecoder, ThresholdDecoder, make_decoder
from .hmm import InvalidHmmError, SleepWakeHmm, fit_sleep_wake_hmm
from .interval_scaling import covered, inner_scales, scaled_intervals
from .intervals import DEFAULT_INTERVAL_LEVEL, NightIntervals, night_intervals, sampled_parameters_of_nights
from .tuning import DEFAULT_DECODER_GRID, parameter_objective, tune_decoder

__all__ = ["CALIBRATION_CHOICES", "DECODER_CHOICES", "DEFAULT_BA_MARGIN", "INTERVAL_WEIGHT_FACTORS",
           "NightDecoding", "fit_night_decoding"]

#: Decoders a model can make its calls with ("threshold" = each epoch on its own, kept for comparison).
DECODER_CHOICES: tuple[str, ...] = ("hmm", "threshold")
#: Calibrations of the raw probabilities ("none" keeps them as they are).
CALIBRATION_CHOICES: tuple[str, ...] = ("isotonic", "platt", "none")
#: Default floor of the HMM tuning = threshold decoder's inner balanced accuracy minus this (chosen on simulated
#: development studies: a tighter floor keeps the decoder calling too much wake).
DEFAULT_BA_MARGIN = 0.03
#: Factors on the tuned emission weight tried for the interval paths (largest first).
INTERVAL_WEIGHT_FACTORS: tuple[float, ...] = (1.0, 0.5, 0.25, 0.12, 0.06, 0.03)
_TUNING_PATHS = 100
_INTERVAL_PARAMETERS = ("tst_min", "waso_min")


def _clean(value: Any) -> Any:
    """JSON-safe copy: non-finite floats become None, numpy scalars plain numbers (recursively)."""
    if isinstance(value, Mapping):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_clean(v) for v in value]
    if isinstance(value, np.ndarray):
        return [_clean(v) for v in value.tolist()]
    if isinstance(value, bool | np.bool_):
        return bool(value)
    if isinstance(value, int | np.integer):
        return int(value)
    if isinstance(value, float | np.floating):
        return float(value) if np.isfinite(value) else None
    return value


@dataclass(frozen=True, eq=False)
class NightDecoding:
    """Fitted state turning a model's raw P(sleep) into calibrated P(sleep), calls and intervals.

    Attributes
    ----------
    calibrator : PlattCalibrator, IsotonicCalibrator or None
        None = probabilities used as they are.
    decoder : ThresholdDecoder or HmmDecoder
        Makes the calls from calibrated probabilities.
    chain : SleepWakeHmm
        Counted from the training nights' labels; the interval paths are drawn from it.
    info : dict
        JSON-able record of the fit: ``calibration`` (method, Brier raw/calibrated, reliability
        curve), ``decoder`` (name, settings, inner ``objective``, ``balanced_accuracy``,
        ``floor_met``), ``threshold_decoder`` and ``hmm_decoder`` (both candidates),
        ``intervals`` (``stickiness``, ``emission_weight`` of the interval paths, and, from
        this version on, ``centre`` = ``"decoded"`` with ``spread_scale`` per parameter and the
        ``inner_coverage`` of TST and WASO; a stored decoding without ``spread_scale`` keeps the
        posterior's own intervals) and ``n_inner_nights``.
    """

    calibrator: PlattCalibrator | IsotonicCalibrator | None
    decoder: ThresholdDecoder | HmmDecoder
    chain: SleepWakeHmm
    info: dict[str, Any]

    def calibrate(self, p_raw: ArrayLike) -> NDArray[np.float64]:
        """Calibrated P(sleep), shape (n_epochs,); NaN stays NaN."""
        p = np.asarray(p_raw, dtype=np.float64)
        return p.copy() if self.calibrator is None else self.calibrator.transform(p)

    def decode(self, p_calibrated: ArrayLike) -> NDArray[np.float64]:
        """Calls of shape (n_epochs,): 1 sleep, 0 wake, NaN unscored."""
        return self.decoder.decode(p_calibrated)

    def intervals(self, p_calibrated: ArrayLike, *, epoch_seconds: int, lights_off_idx: int = 0,
                  lights_on_idx: int | None = None, level: float = DEFAULT_INTERVAL_LEVEL, n_paths: int = 200,
                  seed: int = 0, protocol: StudyProtocol = DEFAULT_PROTOCOL) -> NightIntervals:
        """Per-night intervals from ``n_paths`` posterior paths (:func:`~models.decoding.intervals.night_intervals`).

        With fitted spread scales (``info["intervals"]["spread_scale"]``) they are centred on the
        parameters of :meth:`decode`'s calls and scaled (:mod:`models.decoding.interval_scaling`).

        Parameters
        ----------
        p_calibrated : array-like of shape (n_epochs,)
            Output of :meth:`calibrate` for the whole recording.
        epoch_seconds : int
        lights_off_idx, lights_on_idx : int, int or None
            In-bed interval; None = end of the recording.
        level : float, default=0.9
        n_paths : int, default=200
        seed : int, default=0
        protocol : StudyProtocol, default=DEFAULT_PROTOCOL
        """
        settings = self.info["intervals"]
        scale = settings.get("spread_scale")
        centre = None
        if scale is not None:
            p = np.asarray(p_calibrated, dtype=np.float64)
            stop = p.size if lights_on_idx is None else lights_on_idx
            centre = _parameters(self.decode(p), epoch_seconds, (lights_off_idx, stop), protocol)
            scale = {str(k): float(v) for k, v in scale.items()}
        return night_intervals(p_calibrated, self.chain, epoch_seconds, lights_off_idx=lights_off_idx,
                               lights_on_idx=lights_on_idx, protocol=protocol, level=level, n_paths=n_paths,
                               seed=seed, stickiness=float(settings["stickiness"]),
                               emission_weight=float(settings["emission_weight"]), centre=centre,
                               spread_scale=scale)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able form (floats written by ``json`` read back bit-identically)."""
        return {"calibrator": None if self.calibrator is None else self.calibrator.to_dict(),
                "decoder": self.decoder.settings(), "chain": self.chain.to_dict(), "info": self.info}

    @classmethod
    def from_dict(cls, values: Mapping[str, Any]) -> NightDecoding:
        """Inverse of :meth:`to_dict`.

        Raises
        ------
        InvalidHmmError, InvalidCalibrationError
            For a missing or invalid part (named).
        """
        if not isinstance(values, Mapping) or any(k not in values for k in ("calibrator", "decoder", "chain", "info")):
            raise InvalidHmmError("decoding must be an object with calibrator, decoder, chain and info")
        chain = SleepWakeHmm.from_dict(values["chain"])
        settings = dict(values["decoder"]) if isinstance(values["decoder"], Mapping) else {}
        name = settings.pop("decoder", None)
        decoder = make_decoder(str(name), hmm=chain if name == "hmm" else None, **settings)
        info = values["info"]
        if not isinstance(info, Mapping) or not isinstance(info.get("intervals"), Mapping):
            raise InvalidHmmError("decoding.info must hold the interval settings (intervals)")
        calibrator = None if values["calibrator"] is None else calibrator_from_dict(values["calibrator"])
        return cls(calibrator=calibrator, decoder=decoder, chain=chain, info=dict(info))


def _youden(y: NDArray[np.float64], p: NDArray[np.float64], min_sensitivity: float) -> float:
    """Youden's J threshold under a sensitivity floor (highest threshold among equal J), kept inside (0, 1)."""
    if np.unique(y).size < 2:
        return 0.5
    fpr, tpr, thresholds = roc_curve(y, p)
    j = np.where(tpr >= min_sensitivity, tpr - fpr, -np.inf)[1:]
    return float(np.clip(thresholds[1:][int(np.argmax(j))], 1e-6, 1.0 - 1e-6))


def _parameters(x: NDArray[np.float64], epoch_seconds: int, bounds: tuple[int, int],
                protocol: StudyProtocol) -> dict[str, float | int | None]:
    return sleep_parameters(x, epoch_seconds, lights_off_idx=bounds[0], lights_on_idx=bounds[1],
                            protocol=protocol).as_dict()


def _number(value: float | int | None) -> float:
    return float("nan") if value is None else float(value)


def _interval_score(intervals: Mapping[str, Sequence[float]], truth: Mapping[str, Any], level: float) -> float:
    alpha = 1.0 - level
    score = 0.0
    for name in _INTERVAL_PARAMETERS:
        low, high = intervals[name]
        ref = truth[name]
        if not (np.isfinite(low) and np.isfinite(high)) or ref is None or not np.isfinite(ref):
            continue
        score += (high - low) + (2.0 / alpha) * (max(low - ref, 0.0) + max(ref - high, 0.0))
    return float(score)


def _interval_settings(probs: Sequence[NDArray[np.float64]], truth: Sequence[Mapping[str, Any]],
                       centres: Sequence[Mapping[str, Any]], chain: SleepWakeHmm, stickiness: float, weight: float, *,
                       epoch_seconds: int, bounds: Sequence[tuple[int, int]], protocol: StudyProtocol,
                       seed: int) -> dict[str, Any]:
    """Weight factor and conformal spread scales of the interval paths (module docstring, step 5)."""
    level = DEFAULT_INTERVAL_LEVEL
    spans = [b[1] - b[0] for b in bounds]
    scores, fits = [], []
    for factor in INTERVAL_WEIGHT_FACTORS:
        samples = sampled_parameters_of_nights(probs, chain, epoch_seconds, bounds=bounds, protocol=protocol,
                                               n_paths=_TUNING_PATHS, seeds=[seed + k for k in range(len(probs))],
                                               stickiness=stickiness, emission_weight=weight * factor)
        scale = inner_scales(samples, centres, truth, level=level, epoch_seconds=epoch_seconds, in_bed_epochs=spans)
        intervals = [scaled_intervals(s, {n: _number(c.get(n)) for n in s}, scale, level=level,
                                      epoch_seconds=epoch_seconds, in_bed_epochs=spans[k])
                     for k, (s, c) in enumerate(zip(samples, centres, strict=True))]
        scores.append(float(np.mean([_interval_score(iv, truth[k], level) for k, iv in enumerate(intervals)])))
        inside = [covered(iv, truth[k]) for k, iv in enumerate(intervals)]
        coverage = {n: float(np.nanmean(v)) if np.isfinite(v := np.array([c[n] for c in inside])).any() else None
                    for n in _INTERVAL_PARAMETERS}
        fits.append((factor, scale, coverage))
    best = int(np.argmin(scores))
    factor, scale, coverage = fits[best]
    return {"stickiness": stickiness, "emission_weight": weight * factor, "weight_factor": factor,
            "interval_scores": dict(zip((str(f) for f in INTERVAL_WEIGHT_FACTORS), scores, strict=True)),
            "centre": "decoded", "spread_scale": scale, "inner_coverage": coverage}


def _fit_calibrator(method: str, p: NDArray[np.float64],
                    y: NDArray[np.float64]) -> tuple[PlattCalibrator | IsotonicCalibrator | None, str]:
    if method == "none":
        return None, "none"
    try:
        return CALIBRATORS[method]().fit(p, y), method
    except InvalidCalibrationError:  # one class only in the inner nights: keep the probabilities
        return None, "none"


def fit_night_decoding(val_p_raw: Sequence[ArrayLike], val_labels: Sequence[ArrayLike],
                       train_labels: Sequence[ArrayLike], *, epoch_seconds: int, decoder: str = "hmm",
                       calibration: str = "isotonic", protocol: StudyProtocol = DEFAULT_PROTOCOL,
                       ba_floor: float | None = None, seed: int = 0,
                       in_bed: Sequence[tuple[int, int]] | None = None,
                       min_sensitivity: float = 0.0) -> NightDecoding:
    """Fit calibration, chain, decoder and interval settings (module docstring) on inner nights.

    Parameters
    ----------
    val_p_raw : sequence of array-like, each of shape (n_epochs,)
        Raw P(sleep) of each inner validation night (NaN = not predicted / unscored).
    val_labels : sequence of array-like, each of shape (n_epochs,)
        Reference of the same nights (1 sleep, 0 wake, NaN unscored or not to be used).
    train_labels : sequence of array-like
        Reference of the nights the model trained on (the chain is counted from them).
    epoch_seconds : int
    decoder : {"hmm", "threshold"}, default="hmm"
        Which decoder makes the calls (:data:`DECODER_CHOICES`).
    calibration : {"isotonic", "platt", "none"}, default="isotonic"
        Falls back to "none" (recorded in ``info``) when the inner epochs hold one class only.
    protocol : StudyProtocol, default=DEFAULT_PROTOCOL
        Parameter definitions and margins of the tuning objective.
    ba_floor : float or None, default=None
        Balanced-accuracy floor of the HMM tuning; None = the threshold decoder's inner balanced
        accuracy minus :data:`DEFAULT_BA_MARGIN`.
    seed : int, default=0
        Seed of the paths drawn to choose the interval settings.
    in_bed : sequence of (int, int) or None, default=None
        ``(lights_off_idx, lights_on_idx)`` per inner night; None = whole arrays.
    min_sensitivity : float, default=0.0
        Sensitivity floor of the threshold decoder's Youden threshold.

    Returns
    -------
    NightDecoding

    Raises
    ------
    InvalidHmmError
        For an unknown decoder or calibration, no inner night, or mismatched shapes.
    """
    if decoder not in DECODER_CHOICES or calibration not in CALIBRATION_CHOICES:
        raise InvalidHmmError(f"decoder must be one of {DECODER_CHOICES} and calibration one of "
                              f"{CALIBRATION_CHOICES}; got {decoder!r}, {calibration!r}")
    raw = [np.asarray(p, dtype=np.float64) for p in val_p_raw]
    labels = [np.asarray(y, dtype=np.float64) for y in val_labels]
    if not raw or len(labels) != len(raw) or any(p.shape != y.shape for p, y in zip(raw, labels, strict=True)):
        raise InvalidHmmError("val_p_raw and val_labels must list the same inner nights (>= 1), equally long")
    bounds = list(in_bed) if in_bed is not None else [(0, p.size) for p in raw]
    p_all, y_all = np.concatenate(raw), np.concatenate(labels)
    calibrator, method = _fit_calibrator(calibration, p_all, y_all)
    probs = raw if calibrator is None else [calibrator.transform(p) for p in raw]
    c_all = np.concatenate(probs)
    curve = reliability_curve(y_all, c_all, n_bins=10)
    keep = ~np.isnan(c_all) & ~np.isnan(y_all)
    chain = fit_sleep_wake_hmm(train_labels)

    threshold = ThresholdDecoder(_youden(y_all[keep], c_all[keep], min_sensitivity))
    truth = [_parameters(y, epoch_seconds, bounds[k], protocol) for k, y in enumerate(labels)]
    threshold_calls = [threshold.decode(p) for p in probs]
    threshold_ba = float(epoch_agreement(y_all, np.concatenate(threshold_calls))["balanced_accuracy"])
    floor = float(np.clip(threshold_ba - DEFAULT_BA_MARGIN if ba_floor is None else ba_floor, 0.0, 1.0))
    if not np.isfinite(floor):
        floor = 0.0
    choice = tune_decoder(probs, labels, protocol=protocol, ba_floor=floor, grid=DEFAULT_DECODER_GRID,
                          epoch_seconds=epoch_seconds, in_bed=bounds, hmm=chain)
    threshold_params = [_parameters(c, epoch_seconds, bounds[k], protocol) for k, c in enumerate(threshold_calls)]
    threshold_info = {"decoder": "threshold", "threshold": threshold.threshold, "balanced_accuracy": threshold_ba,
                      "objective": parameter_objective(threshold_params, truth, protocol.equivalence_margins)[0],
                      "floor_met": True}
    hmm_info = {"decoder": "hmm", **choice.settings, "objective": choice.objective,
                "balanced_accuracy": choice.balanced_accuracy, "floor_met": choice.floor_met, "ba_floor": floor}
    stickiness, weight = float(choice.settings["stickiness"]), float(choice.settings["emission_weight"])
    chosen: ThresholdDecoder | HmmDecoder = choice.decoder if decoder == "hmm" else threshold
    centres = threshold_params if decoder == "threshold" else [
        _parameters(chosen.decode(p), epoch_seconds, bounds[k], protocol) for k, p in enumerate(probs)]
    intervals = _interval_settings(probs, truth, centres, chain, stickiness, weight, epoch_seconds=epoch_seconds,
                                   bounds=bounds, protocol=protocol, seed=seed)
    info = {
        "calibration": {"method": method, "brier_raw": brier_score(y_all, p_all),
                        "brier_calibrated": brier_score(y_all, c_all),
                        "reliability": {"predicted": curve.mean_predicted, "observed": curve.observed_frequency,
                                        "count": curve.counts}},
        "decoder": hmm_info if decoder == "hmm" else threshold_info,
        "threshold_decoder": threshold_info, "hmm_decoder": hmm_info,
        "intervals": intervals,
        "n_inner_nights": len(raw),
    }
    return NightDecoding(calibrator=calibrator, decoder=chosen, chain=chain, info=_clean(info))
