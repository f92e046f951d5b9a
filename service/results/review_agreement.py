"""Inter-rater figures of a study's reviews: reviewer vs reviewer, and reviewers (and corrections) vs the model.

The model is the scoring a reviewer is shown (:func:`service.results.review_queue.shown_scoring`);
each figure is :func:`models.inter_rater_summary` over the pairs of label arrays, compared on the
epochs both judge, under the study's protocol.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sqlalchemy.orm import Session, sessionmaker

from models import inter_rater_summary

from ..store import db
from ..store.protocols import study_protocol
from ..store.registry import find_study
from ..store.reviews import REVIEWS_PER_NIGHT, study_corrections, study_review_pairs
from .review_queue import shown_scoring
from .reviews import json_safe

__all__ = ["study_agreement"]

_Pair = tuple[NDArray[np.float64], NDArray[np.float64]]


def _calls(body: dict[str, Any]) -> NDArray[np.float64]:
    return np.array([np.nan if v is None else float(v) for v in body["sleep"]], dtype=np.float64)


def study_agreement(factory: sessionmaker[Session], *, study_id: str) -> dict[str, Any]:
    """The answer of ``GET /v1/studies/{study}/reviews/agreement``.

    Raises
    ------
    NotFound
        If the study does not exist.
    """
    with db.session_scope(factory) as session:
        epoch_seconds = find_study(session, study_id).epoch_seconds
        protocol = study_protocol(session, study_id)
        reviewed = study_review_pairs(session, study_id)
        corrected = study_corrections(session, study_id)
    model: dict[tuple[str, str], NDArray[np.float64]] = {}

    def calls(pid: str, nid: str) -> NDArray[np.float64]:
        if (pid, nid) not in model:
            model[(pid, nid)] = _calls(shown_scoring(factory, study_id=study_id, participant_id=pid, night_id=nid))
        return model[(pid, nid)]

    def summary(pairs: Sequence[_Pair]) -> dict[str, Any] | None:
        if not pairs:
            return None
        return json_safe(inter_rater_summary(pairs, epoch_seconds=epoch_seconds, protocol=protocol))

    both = [(pid, nid, found[:REVIEWS_PER_NIGHT]) for pid, nid, found in reviewed.values()
            if len(found) >= REVIEWS_PER_NIGHT]
    between = [(r[0].labels, r[1].labels) for _, _, r in both]
    with_model = [(r.labels, calls(pid, nid)) for pid, nid, found in reviewed.values() for r in found]
    corrections = [(c.labels, calls(pid, nid)) for pid, nid, c in corrected.values()]
    rr = summary(between)
    kappas = [] if rr is None else list(rr.get("kappa_per_night", []))
    nights = [{"participant_id": pid, "night_id": nid, "kappa": kappas[i] if i < len(kappas) else None}
              for i, (pid, nid, _) in enumerate(both)]
    return {"study_id": study_id, "epoch_seconds": int(epoch_seconds),
            "n_reviews": sum(len(found) for _, _, found in reviewed.values()), "n_nights_reviewed": len(both),
            "n_corrections": len(corrected), "reviewer_vs_reviewer": rr, "reviewers_vs_model": summary(with_model),
            "corrections_vs_model": summary(corrections), "nights": nights}
