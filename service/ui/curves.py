"""Held-out ROC curves of one participant, per method.

Models are judged only on their held-out predictions, stored with the active versions
(:func:`service.store.versions.load_held_out`): the personal model's nested leave-one-night-out
predictions, the pooled model's leave-participants-out predictions (with and without offset).
The classical rules are not fitted to anyone, so every labelled night counts as held out for
them; their continuous scores (higher = more likely sleep) come from
:func:`models.score_with_rule`. Each curve pools the scored in-bed epochs of the method's nights
(sleep = positive class) and is computed with :func:`sklearn.metrics.roc_curve`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from sklearn.metrics import roc_auc_score, roc_curve
from sqlalchemy.orm import Session, sessionmaker

from models import COMPARED_RULES, MODEL_METHODS, TrainingConfig, score_with_rule

from ..store import registry, versions
from ..store.db import session_scope

__all__ = ["RocCurve", "held_out_roc"]


@dataclass(frozen=True, eq=False)
class RocCurve:
    """One method's ROC curve over its held-out epochs.

    Attributes
    ----------
    method : str
    fpr, tpr : ndarray of shape (n_points,)
        False-positive rate (wake called sleep) and true-positive rate (sleep called sleep).
    auc : float
        Area under the curve.
    n_nights, n_epochs : int
        Nights and scored in-bed epochs pooled into the curve.
    """

    method: str
    fpr: NDArray[np.float64]
    tpr: NDArray[np.float64]
    auc: float
    n_nights: int
    n_epochs: int


def _curve(method: str, parts: list[tuple[NDArray[np.float64], NDArray[np.float64]]]) -> RocCurve | None:
    if not parts:
        return None
    reference = np.concatenate([r for r, _ in parts])
    score = np.concatenate([s for _, s in parts])
    keep = np.isfinite(reference) & np.isfinite(score)
    y, s = reference[keep].astype(int), score[keep]
    if np.unique(y).size < 2:
        return None
    fpr, tpr, _ = roc_curve(y, s, pos_label=1)
    return RocCurve(method=method, fpr=fpr, tpr=tpr, auc=float(roc_auc_score(y, s)), n_nights=len(parts),
                    n_epochs=int(keep.sum()))


def held_out_roc(factory: sessionmaker[Session], *, study_id: str, participant_id: str) -> list[RocCurve]:
    """ROC curves of every method with held-out scores for the participant (models first, then rules).

    Returns an empty list when the participant has no labelled night.
    """
    with session_scope(factory) as session:
        study = registry.find_study(session, study_id)
        participant = registry.find_participant(session, study, participant_id)
        held = []
        for owner in (participant, None):
            active = versions.active_version(session, study=study, participant=owner)
            if active is not None:
                held += [h for h in versions.load_held_out(session, active) if h.participant_id == participant_id]
        nights = registry.load_nights(session, participant=participant, labelled_only=True)
    by_method: dict[str, list[tuple[NDArray[np.float64], NDArray[np.float64]]]] = {}
    for h in held:
        if h.method in MODEL_METHODS and h.reference is not None:
            bed = slice(*h.in_bed)
            by_method.setdefault(h.method, []).append((h.reference[bed], h.p_sleep[bed]))
    movement_time = TrainingConfig().movement_time
    for night in nights:
        reference = night.reference_sleep(movement_time=movement_time)
        if reference is None:
            continue
        bed = slice(*night.in_bed)
        for method in COMPARED_RULES:
            score = score_with_rule(night.counts, night.epoch_seconds, method).score
            assert score is not None  # every compared rule has a continuous score
            by_method.setdefault(method, []).append((reference[bed], score[bed]))
    curves = [_curve(m, by_method.get(m, [])) for m in (*MODEL_METHODS, *COMPARED_RULES)]
    return [c for c in curves if c is not None]
