"""The review queue: nights ranked by how much a review is expected to change their parameters.

For each night the evidence terms of :func:`models.review.evidence.evidence_figures` (minutes, the
quality flags a count) are combined into one figure, the **expected absolute change** a review makes
to TST, WASO and SOL together (the expected total absolute error of the deployed scoring), in minutes,
by a log-linear model (:mod:`models.review.error_model`)::

    expected_change_min = base_min * exp(sum(weight[term] * value[term]))

so each term multiplies the expected change (a weight is the log change per minute of the term).
``priority`` is the same figure: the queue is ordered by it, highest first, ties by ``night_id``
(so the order is deterministic). A term's contribution is the minutes it adds, the expected
change with it minus the expected change without it (``expected * (1 - exp(-weight * value))``);
``reasons`` are the sentences of the terms that add at least :data:`REASON_MIN` minutes, largest
contribution first.

Where the weights come from
---------------------------
:data:`DEFAULT_PRIORITY_WEIGHTS` were **fitted on simulated nights** by ``bench/review_queue.py --fit``
(:func:`models.review.error_model.fit_priority_weights`: Poisson quasi-likelihood, log link, weights
>= 0) to each night's true total absolute error of the deployed scoring (|TST err| + |WASO err| +
|SOL err|, minutes) over the 1807 unlabelled nights of 18 simulated cohorts of 8-24 participants,
each with its own seed (none of them a cohort the bench's figure is measured on). They are figures
of the simulator, not of any real study; a study that collects double reviews should refit them on
its own adjudicated nights. Notes:

- ``relabel``, the minutes of in-bed calls the model itself expects to be wrong (from its
  calibrated P(sleep), :func:`models.review.evidence.expected_relabel`), gets the largest weight
  per minute (0.0177: 40 expected minutes double the expected change; off-wrist minutes 0.0136,
  diary minutes 0.0169). On the fit cohorts' nights without a simulated problem its rank
  correlation with the true error (median over cohorts 0.58) is above that of the posterior spread
  ``uncertainty_min`` (0.53) and the interval widths (0.49), which it takes over (both fitted 0);
- the terms were chosen by leaving one fit cohort out at a time (fit on the other 17, share of the
  error in the top fifth of the left-out cohort): with ``relabel`` the log-linear fit captured on
  average 85 % of the attainable gain over a random order (worst cohort 76 %), without it 83 %
  (worst 70 %), the former weights 80 % (worst 52 %); an additive model in minutes (identity link)
  captured 84 % (worst 72 %);
- ``sol_interval``, ``rule_disagreement``, ``unusual`` and ``qc_flags`` (the off-wrist minutes carry
  what the flag says) were fitted 0 and add nothing; their figures are still computed
  (``evidence_figures``), and ``bench/review_queue.py --weights`` measures any other set.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from types import MappingProxyType

import numpy as np

from ..errors import Problem
from .corrections import InvalidReviewError
from .evidence import EVIDENCE_TERMS, NightEvidence, evidence_figures

__all__ = ["DEFAULT_PRIORITY_WEIGHTS", "REASON_MIN", "QueueItem", "expected_change", "rank_nights"]

#: ``base_min`` (the expected change of a night without any evidence, minutes) and the log change of the
#: expected change per unit of each evidence term. See "Where the weights come from" in the module docstring.
DEFAULT_PRIORITY_WEIGHTS: Mapping[str, float] = MappingProxyType({
    "base_min": 17.54,            # minutes: expected change of a night without evidence
    "relabel": 0.01773,           # log change per minute (per flag for qc_flags), as fitted
    "uncertainty": 0.0,
    "sol_interval": 0.0,
    "model_disagreement": 0.00109,
    "rule_disagreement": 0.0,
    "wake_in_bed": 0.00169,
    "nonwear": 0.01362,
    "diary": 0.01686,
    "unusual": 0.0,
    "qc_flags": 0.0,
})
#: A term adds a reason when its contribution reaches this many minutes.
REASON_MIN = 2.0


@dataclass(frozen=True)
class QueueItem:
    """One night in the review queue.

    Attributes
    ----------
    night_id, participant_id : str
    priority : float
        The ordering key (equals ``expected_change_min``).
    expected_change_min : float
        Expected |change| of TST + WASO + SOL a review makes, minutes.
    reasons : list of str
        Readable sentences naming the figures behind the priority, largest first.
    contributions : dict of str to float
        ``base_min``, and the minutes each evidence term adds (the expected change with the term
        minus without it; the terms multiply, so these do not sum to the total).
    """

    night_id: str
    participant_id: str
    priority: float
    expected_change_min: float
    reasons: list[str]
    contributions: dict[str, float] = field(default_factory=dict)


def _check_weights(weights: Mapping[str, float]) -> dict[str, float]:
    known = ("base_min", *EVIDENCE_TERMS)
    problems = [Problem("invalid_review", f"weights.{k}: unknown term (known: {', '.join(known)})",
                        {"field": f"weights.{k}"}) for k in weights if k not in known]
    out = dict(DEFAULT_PRIORITY_WEIGHTS) | {k: v for k, v in weights.items() if k in known}
    for k, v in out.items():
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not v >= 0:
            problems.append(Problem("invalid_review", f"weights.{k}: must be a number >= 0, got {v!r}",
                                    {"field": f"weights.{k}"}))
    if problems:
        raise InvalidReviewError(problems)
    return {k: float(v) for k, v in out.items()}


def _item(e: NightEvidence, w: Mapping[str, float]) -> QueueItem:
    figures = evidence_figures(e)
    logs = {t: w[t] * f.value for t, f in figures.items()}
    total = float(w["base_min"] * np.exp(sum(logs.values())))
    contributions = {"base_min": w["base_min"]} | {t: float(total * -np.expm1(-v)) for t, v in logs.items()}
    shown = sorted((t for t in figures if contributions[t] >= REASON_MIN), key=lambda t: (-contributions[t], t))
    reasons = [figures[t].reason for t in shown] or ["no evidence that a review would change much"]
    return QueueItem(night_id=e.night_id, participant_id=e.participant_id, priority=total,
                     expected_change_min=total, reasons=reasons, contributions=contributions)


def expected_change(evidence: NightEvidence, *, weights: Mapping[str, float] = DEFAULT_PRIORITY_WEIGHTS) -> QueueItem:
    """The queue item of one night (see the module docstring for the figure).

    Parameters
    ----------
    evidence : NightEvidence
    weights : mapping of str to float, default=DEFAULT_PRIORITY_WEIGHTS
        Terms left out keep their default weight.

    Returns
    -------
    QueueItem

    Raises
    ------
    InvalidReviewError
        For an unknown term or a negative weight.
    """
    return _item(evidence, _check_weights(weights))


def rank_nights(evidence: Sequence[NightEvidence], *,
                weights: Mapping[str, float] = DEFAULT_PRIORITY_WEIGHTS) -> list[QueueItem]:
    """Rank nights for review, the night a review is expected to change most first.

    Parameters
    ----------
    evidence : sequence of NightEvidence
        One per night (night ids unique).
    weights : mapping of str to float, default=DEFAULT_PRIORITY_WEIGHTS
        ``base_min`` and the log change per unit of each evidence term (module docstring); terms left out
        keep their default.

    Returns
    -------
    list of QueueItem
        Highest ``priority`` first, ties by ``night_id``.

    Raises
    ------
    InvalidReviewError
        For a repeated night id, an unknown term or a negative weight.
    """
    w = _check_weights(weights)
    seen: set[str] = set()
    for k, e in enumerate(evidence):
        if e.night_id in seen:
            raise InvalidReviewError([Problem("invalid_review", f"evidence[{k}].night_id: {e.night_id!r} repeated",
                                              {"field": f"evidence[{k}].night_id"})])
        seen.add(e.night_id)
    items = [_item(e, w) for e in evidence]
    return sorted(items, key=lambda it: (-it.priority, it.night_id))
