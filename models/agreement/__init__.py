"""Agreement with the reference: epoch metrics, Bland-Altman statistics and the method-versus-reference comparison."""

from __future__ import annotations

from .bland_altman import (
    BLAND_ALTMAN_PARAMETERS,
    BlandAltman,
    NightRecord,
    REFERENCE,
    RuleComparison,
    bland_altman,
    bland_altman_table,
    compare_rules_with_reference,
)
from .epoch_metrics import (
    ALWAYS_SLEEP,
    EPOCH_METRIC_NAMES,
    ScoredNight,
    agreement_table,
    always_sleep,
    epoch_agreement,
)

__all__ = [
    "ALWAYS_SLEEP",
    "BLAND_ALTMAN_PARAMETERS",
    "BlandAltman",
    "EPOCH_METRIC_NAMES",
    "NightRecord",
    "REFERENCE",
    "RuleComparison",
    "ScoredNight",
    "agreement_table",
    "always_sleep",
    "bland_altman",
    "bland_altman_table",
    "compare_rules_with_reference",
    "epoch_agreement",
]
