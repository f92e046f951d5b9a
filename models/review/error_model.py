"""Fitting the review queue's weights: the expected absolute parameter error of a night from its evidence.

The queue's figure (:mod:`models.review.priority`) is a log-linear model of a night's expected total
absolute error of TST, WASO and SOL, in minutes::

    expected_change_min = base_min * exp(sum(weight[term] * value[term]))

:func:`fit_priority_weights` fits it to nights with known errors by maximum Poisson
quasi-likelihood (the mean of ``mu - y log mu`` over nights, ``mu`` the expected error): a
generalised linear model with log link (McCullagh & Nelder 1989, from memory), which fits the
*mean* absolute error, so a few nights with very large errors (a device taken off) set the scale
of their own terms without swamping the small multiplicative effects of the others, as they do in
least squares on minutes. Weights are kept >= 0 (evidence never lowers the expected error; bounded
L-BFGS-B, deterministic from a fixed start), a term that is the same on every night gets 0, and
the terms are scaled to unit SD for the fit only.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
from numpy.typing import NDArray
from scipy.optimize import minimize

from ..errors import Problem
from .corrections import InvalidReviewError
from .evidence import EVIDENCE_TERMS, NightEvidence, evidence_figures

__all__ = ["evidence_matrix", "fit_priority_weights"]


def evidence_matrix(evidence: Sequence[NightEvidence]) -> NDArray[np.float64]:
    """The evidence terms of each night, 0 where a term does not apply.

    Returns
    -------
    ndarray of float64, shape (n_nights, len(EVIDENCE_TERMS))
        Columns in the order of :data:`models.review.evidence.EVIDENCE_TERMS` (minutes; ``qc_flags`` a count).
    """
    out = np.zeros((len(evidence), len(EVIDENCE_TERMS)))
    for i, e in enumerate(evidence):
        figures = evidence_figures(e)
        for j, term in enumerate(EVIDENCE_TERMS):
            if term in figures:
                out[i, j] = figures[term].value
    return out


def fit_priority_weights(evidence: Sequence[NightEvidence], errors_min: Mapping[str, float]) -> dict[str, float]:
    """Weights of the log-linear expected error, fitted to nights whose errors are known.

    Parameters
    ----------
    evidence : sequence of NightEvidence
        At least 2 nights.
    errors_min : mapping of str to float
        Night id -> the night's true total absolute error (|TST| + |WASO| + |SOL| error), minutes >= 0.

    Returns
    -------
    dict of str to float
        ``base_min`` (expected error of a night without evidence, minutes) and one weight >= 0 per
        name of :data:`EVIDENCE_TERMS` (log change of the expected error per unit of the term).

    Raises
    ------
    InvalidReviewError
        With fewer than 2 nights, a night without its error, or an error that is negative or not
        finite, or all errors 0.
    """
    problems = [Problem("invalid_review", f"errors_min: no error for night {e.night_id!r}",
                        {"field": f"errors_min.{e.night_id}"}) for e in evidence if e.night_id not in errors_min]
    y = np.array([float(errors_min.get(e.night_id, 0.0)) for e in evidence])
    if len(evidence) < 2:
        problems.append(Problem("invalid_review", "evidence: at least 2 nights are needed", {"field": "evidence"}))
    if not np.all(np.isfinite(y)) or np.any(y < 0) or not np.any(y > 0):
        problems.append(Problem("invalid_review", "errors_min: errors must be finite minutes >= 0, not all 0",
                                {"field": "errors_min"}))
    if problems:
        raise InvalidReviewError(problems)
    x = evidence_matrix(evidence)
    scale = x.std(axis=0)
    constant = scale <= 0  # the same on every night: no information beyond the base, weight 0
    scale[constant] = 1.0
    design = np.column_stack([np.ones(len(y)), x / scale])

    def loss(beta: NDArray[np.float64]) -> tuple[float, NDArray[np.float64]]:
        eta = design @ beta
        mu = np.exp(eta)
        return float(np.mean(mu - y * eta)), design.T @ (mu - y) / len(y)

    start = np.concatenate([[np.log(y.mean())], np.zeros(x.shape[1])])
    bounds = [(None, None)] + [(0.0, 0.0) if c else (0.0, None) for c in constant]
    found = minimize(loss, start, jac=True, method="L-BFGS-B", bounds=bounds,
                     options={"maxiter": 2000, "ftol": 1e-12, "gtol": 1e-9})
    beta = found.x
    weights = {t: float(b / s) for t, b, s in zip(EVIDENCE_TERMS, beta[1:], scale, strict=True)}
    return {"base_min": float(np.exp(beta[0]))} | weights
