"""Agreement with the reference: epoch metrics, Bland-Altman statistics and the method-versus-reference comparison."""

from __future__ import annotations

from .bland_altman import (
    BLAND_ALTMAN_PARAMETERS,
    REFERENCE,
    BlandAltman,
    bland_altman,
    bland_altman_table,
    matched_nights,
)
from .comparison import (
    ERROR_PARAMETERS,
    PARAMETER_COLUMNS,
    ComparisonTables,
    NightComparison,
    compare_night,
    comparison_tables,
)
from .epoch_metrics import (
    ALWAYS_SLEEP,
    EPOCH_COUNT_NAMES,
    EPOCH_METRIC_NAMES,
    ScoredNight,
    agreement_table,
    always_sleep,
    epoch_agreement,
    roc_auc,
)
from .equivalence import (
    parameter_equivalence,
    tost_paired,
)
from .parameter_agreement import (
    parameter_agreement,
)
from .participant_level import (
    PARTICIPANT_METRICS,
    PairedDifference,
    ParticipantEpochFigures,
    paired_participant_difference,
    participant_epoch_figures,
)
from .plausibility import (
    PlausibilityConfig,
    PlausibilityReport,
    check_reference,
    reference_plausibility,
)
from .reliability import (
    IccResult,
    icc_a1,
)
from .repeated_bland_altman import (
    AGAINST,
    MIN_CI_PARTICIPANTS,
    InvalidAgreementInputError,
    RepeatedBlandAltman,
    repeated_bland_altman,
    repeated_bland_altman_table,
    repeated_limits_of_agreement,
)
from .rule_calibration import (
    CALIBRATED_PARAMETER,
    CALIBRATED_SUFFIX,
    COUNT_SCALE_GRID,
    THRESHOLD_GRID,
    RuleCalibration,
    calibrate_rule,
    calibrate_rules,
    calibrated_method,
)
from .rule_comparison import (
    NightRecord,
    compare_rules_with_reference,
)

__all__ = [
    "AGAINST",
    "ALWAYS_SLEEP",
    "BLAND_ALTMAN_PARAMETERS",
    "BlandAltman",
    "CALIBRATED_PARAMETER",
    "CALIBRATED_SUFFIX",
    "COUNT_SCALE_GRID",
    "ComparisonTables",
    "EPOCH_COUNT_NAMES",
    "EPOCH_METRIC_NAMES",
    "ERROR_PARAMETERS",
    "IccResult",
    "InvalidAgreementInputError",
    "MIN_CI_PARTICIPANTS",
    "NightComparison",
    "NightRecord",
    "PARAMETER_COLUMNS",
    "PARTICIPANT_METRICS",
    "PairedDifference",
    "ParticipantEpochFigures",
    "PlausibilityConfig",
    "PlausibilityReport",
    "REFERENCE",
    "RepeatedBlandAltman",
    "RuleCalibration",
    "ScoredNight",
    "THRESHOLD_GRID",
    "agreement_table",
    "always_sleep",
    "bland_altman",
    "bland_altman_table",
    "calibrate_rule",
    "calibrate_rules",
    "calibrated_method",
    "check_reference",
    "compare_night",
    "compare_rules_with_reference",
    "comparison_tables",
    "epoch_agreement",
    "icc_a1",
    "matched_nights",
    "paired_participant_difference",
    "parameter_agreement",
    "parameter_equivalence",
    "participant_epoch_figures",
    "reference_plausibility",
    "repeated_bland_altman",
    "repeated_bland_altman_table",
    "repeated_limits_of_agreement",
    "roc_auc",
    "tost_paired",
]
