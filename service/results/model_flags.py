"""Which models ``auto`` may choose: a model no better than always-sleep, or below the study's floor, is
flagged, shown as such and never chosen by ``auto``.

The figures are the held-out means stored with each version (nested validation). Always-sleep
calls every epoch sleep: sensitivity 1 and specificity 0, so its balanced accuracy is exactly 0.5
and its Cohen's kappa 0 (from the definitions of both); a model at or below either is no better.
The study's floor (set with the protocol, ``model_floor``) is a balanced accuracy the study asks
of every model it deploys.
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy.orm import Session

from ..store import versions
from ..store.protocols import protocol_info
from ..store.snapshots import ParticipantInfo, StudyInfo

__all__ = ["ALWAYS_SLEEP_BALANCED_ACCURACY", "FALLBACK_RULE", "AutoChoice", "auto_choice", "model_flag"]

ALWAYS_SLEEP_BALANCED_ACCURACY = 0.5
#: what ``auto`` scores with when every trained model is flagged (the classical default rule)
FALLBACK_RULE = "cole-kripke"


def model_flag(version: versions.VersionInfo | None, *, floor: float | None) -> str | None:
    """Why ``version`` must not be chosen by ``auto``, or None (also None without held-out figures)."""
    if version is None:
        return None
    metrics = version.metadata.metrics.by_metric
    ba = getattr(metrics.get("balanced_accuracy"), "mean", None)
    kappa = getattr(metrics.get("kappa"), "mean", None)
    if ba is not None and ba <= ALWAYS_SLEEP_BALANCED_ACCURACY:
        return f"held-out balanced accuracy {ba:.3f} is no better than always-sleep (0.5)"
    if kappa is not None and kappa <= 0:
        return f"held-out kappa {kappa:.3f} is no better than always-sleep (0)"
    if ba is not None and floor is not None and ba < floor:
        return f"held-out balanced accuracy {ba:.3f} is below the study's floor of {floor:.3f}"
    return None


@dataclass(frozen=True)
class AutoChoice:
    """What ``auto`` scores a participant with: ``method`` (a model method or :data:`FALLBACK_RULE`), the
    version (None for the rule), and the models passed over with why."""

    method: str
    version: versions.VersionInfo | None
    passed_over: dict[str, str]


def auto_choice(session: Session, *, study: StudyInfo, participant: ParticipantInfo) -> AutoChoice | None:
    """The participant's stored choice, unless flagged; then pooled + offset, unless flagged; then the rule.

    Returns None when no model is trained at all (the caller reports that).
    """
    floor = protocol_info(session, study).model_floor
    personal = versions.active_version(session, study=study, participant=participant)
    pooled = versions.active_version(session, study=study, participant=None)
    if personal is None and pooled is None:
        return None
    chosen = participant.chosen_method
    order = ([chosen] if chosen in ("personal", "pooled", "pooled+offset") else []) + ["pooled+offset"]
    passed: dict[str, str] = {}
    for method in dict.fromkeys(order):
        version = personal if method == "personal" else pooled
        if version is None:
            continue
        reason = model_flag(version, floor=floor)
        if reason is None:
            return AutoChoice(method, version, passed)
        passed[method] = reason
    return AutoChoice(FALLBACK_RULE, None, passed)
