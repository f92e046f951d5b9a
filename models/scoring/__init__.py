"""Classical count rules, Webster rescoring and the sleep parameters of a scored night."""

from __future__ import annotations

from .parameters import (
    PARAMETER_NAMES,
    InvalidInBedIntervalError,
    SleepParameters,
    WasoEnd,
    sleep_parameters,
)
from .rescoring import (
    WEBSTER_AFTER_WAKE_MIN,
    WEBSTER_ISLAND_MIN,
    InvalidSleepVectorError,
    UnsupportedEpochLengthError,
    as_sleep_vector,
    check_epoch_seconds,
    run_lengths,
    webster_rescore,
)
from .rules import (
    COLE_KRIPKE_COEFFICIENTS,
    COUNT_THRESHOLD_WEIGHTS,
    METHOD_IDS,
    RULES,
    ColeKripke,
    CountRule,
    CountThreshold,
    InvalidRuleOptionError,
    RuleScoring,
    Sadeh,
    UnknownMethodError,
    continuous_scores,
    score_with_rule,
)

__all__ = [
    "COLE_KRIPKE_COEFFICIENTS",
    "COUNT_THRESHOLD_WEIGHTS",
    "ColeKripke",
    "CountRule",
    "CountThreshold",
    "InvalidInBedIntervalError",
    "InvalidRuleOptionError",
    "InvalidSleepVectorError",
    "METHOD_IDS",
    "PARAMETER_NAMES",
    "RULES",
    "RuleScoring",
    "Sadeh",
    "SleepParameters",
    "UnknownMethodError",
    "UnsupportedEpochLengthError",
    "WEBSTER_AFTER_WAKE_MIN",
    "WEBSTER_ISLAND_MIN",
    "WasoEnd",
    "as_sleep_vector",
    "check_epoch_seconds",
    "continuous_scores",
    "run_lengths",
    "score_with_rule",
    "sleep_parameters",
    "webster_rescore",
]
