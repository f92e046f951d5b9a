"""Calibrated epoch probabilities decoded into sleep/wake paths, with per-night parameter intervals."""

from __future__ import annotations

from .calibration import (
    CALIBRATORS,
    Calibrator,
    InvalidCalibrationError,
    IsotonicCalibrator,
    PlattCalibrator,
    ReliabilityCurve,
    brier_score,
    calibrator_from_dict,
    reliability_curve,
)
from .decoders import (
    DECODERS,
    Decoder,
    HmmDecoder,
    ThresholdDecoder,
    make_decoder,
)
from .fitting import (
    CALIBRATION_CHOICES,
    DECODER_CHOICES,
    DEFAULT_BA_MARGIN,
    INTERVAL_WEIGHT_FACTORS,
    NightDecoding,
    fit_night_decoding,
)
from .hmm import (
    DEFAULT_PSEUDO_COUNT,
    InvalidHmmError,
    SleepWakeHmm,
    fit_sleep_wake_hmm,
    forward_backward,
    sample_paths,
    scaled_likelihoods,
    viterbi,
)
from .intervals import (
    DEFAULT_INTERVAL_LEVEL,
    NightIntervals,
    interval_coverage,
    night_intervals,
    parameter_intervals,
    sampled_parameters,
)
from .path_parameters import (
    PATH_PARAMETER_NAMES,
    path_parameters,
)
from .tuning import (
    DEFAULT_DECODER_GRID,
    DecoderChoice,
    tune_decoder,
)

__all__ = [
    "CALIBRATION_CHOICES",
    "CALIBRATORS",
    "Calibrator",
    "DECODERS",
    "DECODER_CHOICES",
    "DEFAULT_BA_MARGIN",
    "DEFAULT_DECODER_GRID",
    "DEFAULT_INTERVAL_LEVEL",
    "DEFAULT_PSEUDO_COUNT",
    "Decoder",
    "DecoderChoice",
    "HmmDecoder",
    "INTERVAL_WEIGHT_FACTORS",
    "InvalidCalibrationError",
    "InvalidHmmError",
    "IsotonicCalibrator",
    "NightDecoding",
    "NightIntervals",
    "PATH_PARAMETER_NAMES",
    "PlattCalibrator",
    "ReliabilityCurve",
    "SleepWakeHmm",
    "ThresholdDecoder",
    "brier_score",
    "calibrator_from_dict",
    "fit_night_decoding",
    "fit_sleep_wake_hmm",
    "forward_backward",
    "interval_coverage",
    "make_decoder",
    "night_intervals",
    "parameter_intervals",
    "path_parameters",
    "reliability_curve",
    "sample_paths",
    "sampled_parameters",
    "scaled_likelihoods",
    "tune_decoder",
    "viterbi",
]
