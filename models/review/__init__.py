"""Review of scored nights: the review queue, reviewers' corrections and agreement between raters."""

from __future__ import annotations

from .corrections import (
    InvalidReviewError,
    judged_span,
    labels_from_review,
    review_discrepancy,
    review_parameters,
    runs_of,
)
from .error_model import (
    evidence_matrix,
    fit_priority_weights,
)
from .evidence import (
    DIARY_TOLERANCE_MIN,
    EVIDENCE_TERMS,
    REVIEW_PARAMETERS,
    EvidenceFigure,
    NightEvidence,
    evidence_figures,
    expected_relabel,
)
from .inter_rater import (
    INTER_RATER_PARAMETERS,
    inter_rater_summary,
)
from .priority import (
    DEFAULT_PRIORITY_WEIGHTS,
    REASON_MIN,
    QueueItem,
    expected_change,
    rank_nights,
)

__all__ = [
    "DEFAULT_PRIORITY_WEIGHTS",
    "DIARY_TOLERANCE_MIN",
    "EVIDENCE_TERMS",
    "EvidenceFigure",
    "INTER_RATER_PARAMETERS",
    "InvalidReviewError",
    "NightEvidence",
    "QueueItem",
    "REASON_MIN",
    "REVIEW_PARAMETERS",
    "evidence_figures",
    "evidence_matrix",
    "expected_change",
    "expected_relabel",
    "fit_priority_weights",
    "inter_rater_summary",
    "judged_span",
    "labels_from_review",
    "rank_nights",
    "review_discrepancy",
    "review_parameters",
    "runs_of",
]
