"""Participant offset: a shrunk shift of the pooled model's log-odds, learned from few labelled nights.

Model
-----
For participant ``j`` and a labelled in-bed epoch ``e`` with reference ``y_e`` (1 = sleep), let
``m_e`` be the log-odds of a pooled model that never saw participant ``j``, and ``c`` that
model's *baseline*: the unpenalised class-balanced intercept of its validation participants
(the people its threshold was chosen on). The participant's offset is::

    b_j(lambda) = argmax_b  sum_e w_e [ y_e z_e - log(1 + exp(z_e)) ]  -  lambda b^2 / 2,
                  z_e = m_e + c + b,    w_e = n / (2 n_{y_e})

i.e. the posterior mode of ``b_j ~ Normal(0, 1 / lambda)`` in a logistic model with the margin
as a fixed offset (an L2-penalised logistic intercept), solved by damped Newton steps.
The class-balanced weights ``w`` (``n`` scored epochs, ``n_1`` sleep, ``n_0`` wake) make the
estimate ignore how much of the night the participant slept and measure only how far their
epochs' log-odds sit from the population's: unpenalised, ``b_j = c_j - c`` with ``c_j`` the
participant's own balanced intercept. A participant whose wake looks like sleep to the pooled
model gets ``b_j < 0`` and more wake calls at the same threshold (a prevalence-driven shift
would move a balanced-accuracy threshold the wrong way). Near the optimum
``b_j ~ sum_e w_e (y_e - p_e) / (sum_e w_e p_e (1 - p_e) + lambda)``: with few labelled epochs
the information term is small next to ``lambda`` and the offset shrinks toward 0; without
labelled epochs (or with only one class) it is exactly 0. The offset is applied as an additive
term on the margin, ``p = expit(m + b_j)``.

The penalty is chosen across participants (empirical Bayes by cross-validation): for every
participant with two or more labelled nights and each of those nights ``k``, the offset is
fitted on the participant's other nights and scored by the class-balanced Bernoulli
log-likelihood of night ``k``; ``lambda`` maximises the sum over participants and nights.
Epochs within a night are autocorrelated, so the per-epoch likelihood overstates the
information in a night; the cross-validated ``lambda`` absorbs that.

In this module ``margin`` always means the pooled log-odds *plus the baseline* ``c``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import expit

from ..errors import NightbankError
from ..features.source import FeatureSource
from ..nights.night import Night
from .classifier import SleepModel
from .config import DEFAULT_SHRINKAGE_GRID, TrainingConfig
from .descriptors import participant_descriptors

__all__ = ["ShrinkageChoice", "choose_shrinkage", "estimate_offset", "offset_log_likelihood", "participant_offset"]

_MAX_STEP = 4.0
_BOUND = 30.0


def _clean(margin: ArrayLike, reference: ArrayLike) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    m = np.asarray(margin, dtype=np.float64).ravel()
    y = np.asarray(reference, dtype=np.float64).ravel()
    if m.shape != y.shape:
        raise NightbankError(f"margin ({m.size}) and reference ({y.size}) differ in length",
                             code="invalid_offset_input")
    keep = ~np.isnan(y)
    if not np.isfinite(m[keep]).all():
        raise NightbankError("margin must be finite on scored epochs", code="invalid_offset_input")
    return m[keep], y[keep]


def _best(log_likelihood: NDArray[np.float64]) -> int:
    """Index of the best grid value; ties go to the larger penalty."""
    return int(np.flatnonzero(log_likelihood == log_likelihood.max())[-1])


def _balance_weights(y: NDArray[np.float64]) -> NDArray[np.float64] | None:
    """``n / (2 n_class)`` per epoch; None unless both classes are present."""
    n_sleep = float(np.sum(y == 1))
    n_wake = float(y.size - n_sleep)
    if n_sleep == 0 or n_wake == 0:
        return None
    return np.where(y == 1, y.size / (2 * n_sleep), y.size / (2 * n_wake))


def _solve(m: NDArray[np.float64], y: NDArray[np.float64], penalties: NDArray[np.float64]) -> NDArray[np.float64]:
    """Penalised balanced offsets for several penalties at once (vectorised damped Newton)."""
    b = np.zeros(penalties.size)
    w = _balance_weights(y)
    if w is None:
        return b
    surplus = float(np.sum(w * y))
    for _ in range(100):
        p = expit(m[:, None] + b[None, :])
        grad = surplus - w @ p - penalties * b
        hess = w @ (p * (1.0 - p)) + penalties
        step = np.clip(grad / np.maximum(hess, 1e-12), -_MAX_STEP, _MAX_STEP)
        b = np.clip(b + step, -_BOUND, _BOUND)
        if np.max(np.abs(step)) < 1e-10:
            break
    return b


def _log_likelihood(m: NDArray[np.float64], y: NDArray[np.float64], b: NDArray[np.float64]) -> NDArray[np.float64]:
    """Class-balanced log-likelihood for each offset in ``b`` (0 with one class)."""
    w = _balance_weights(y)
    if w is None:
        return np.zeros(b.size)
    z = m[:, None] + b[None, :]
    return w @ (y[:, None] * z - np.logaddexp(0.0, z))


def estimate_offset(margin: ArrayLike, reference: ArrayLike, *, shrinkage: float) -> float:
    """Penalised class-balanced log-odds offset of one participant (see the module docstring).

    Parameters
    ----------
    margin : array-like of shape (n_epochs,)
        Pooled log-odds of sleep of the participant's labelled epochs, plus the model's
        baseline (:attr:`SleepModel.offset_baseline_`).
    reference : array-like of shape (n_epochs,)
        Reference labels, 1 = sleep, 0 = wake, NaN = excluded.
    shrinkage : float
        Penalty ``lambda >= 0``; 0 gives the unpenalised estimate (bounded to +/-30 log-odds).

    Returns
    -------
    offset : float
        Log-odds shift; 0.0 unless both sleep and wake epochs are scored.

    Raises
    ------
    NightbankError
        With code ``invalid_offset_input`` for mismatched lengths, a non-finite margin or a
        negative penalty.

    Examples
    --------
    Balanced weights make three sleep epochs weigh as much as one wake epoch, so with a zero
    margin the unpenalised offset is 0:

    >>> estimate_offset([0.0, 0.0, 0.0, 0.0], [1, 1, 1, 0], shrinkage=0.0)
    0.0
    """
    if not shrinkage >= 0:
        raise NightbankError(f"shrinkage must be >= 0, got {shrinkage!r}", code="invalid_offset_input")
    m, y = _clean(margin, reference)
    return float(_solve(m, y, np.array([float(shrinkage)]))[0]) + 0.0


def offset_log_likelihood(margin: ArrayLike, reference: ArrayLike, *, offset: float = 0.0) -> float:
    """Class-balanced Bernoulli log-likelihood under ``p = expit(margin + offset)`` (natural log).

    Parameters
    ----------
    margin : array-like of shape (n_epochs,)
        Log-odds of sleep plus the model's baseline.
    reference : array-like of shape (n_epochs,)
        1 = sleep, 0 = wake, NaN = excluded.
    offset : float, default=0.0

    Returns
    -------
    float
        ``sum_e w_e [y_e z_e - log(1 + exp(z_e))]`` over scored epochs (<= 0; 0 with one class).
    """
    m, y = _clean(margin, reference)
    return float(_log_likelihood(m, y, np.array([float(offset)]))[0])


@dataclass(frozen=True)
class ShrinkageChoice:
    """Result of :func:`choose_shrinkage`.

    Attributes
    ----------
    shrinkage : float
        The chosen penalty ``lambda``.
    grid : tuple of float
        Candidate penalties.
    log_likelihood : tuple of float
        Held-out class-balanced log-likelihood summed over participants, one per grid value.
    per_participant : dict of str to tuple of float
        Each contributing participant's held-out log-likelihood per grid value (participants
        with fewer than two labelled nights do not contribute).
    """

    shrinkage: float
    grid: tuple[float, ...]
    log_likelihood: tuple[float, ...]
    per_participant: dict[str, tuple[float, ...]] = field(repr=False)

    def excluding(self, participant_id: str, *, linked: Sequence[str] = ()) -> float:
        """The penalty chosen without ``participant_id``'s nights (for honest evaluation).

        Parameters
        ----------
        participant_id : str
        linked : sequence of str, default=()
            Participants whose nights are left out as well (those sharing a night with
            ``participant_id``, :func:`models.learning.splits.participant_groups`).

        Returns
        -------
        float
        """
        left_out = [self.per_participant[p] for p in dict.fromkeys([participant_id, *linked])
                    if p in self.per_participant]
        if not left_out:
            return self.shrinkage
        if len(self.per_participant) <= len(left_out):
            return self.grid[-1]
        return self.grid[_best(np.asarray(self.log_likelihood) - np.sum(left_out, axis=0))]

    def to_dict(self) -> dict[str, object]:
        """JSON-able form."""
        return {"shrinkage": self.shrinkage, "grid": list(self.grid), "log_likelihood": list(self.log_likelihood)}


def choose_shrinkage(nights: Mapping[str, Sequence[tuple[ArrayLike, ArrayLike]]], *,
                     grid: Sequence[float] = DEFAULT_SHRINKAGE_GRID) -> ShrinkageChoice:
    """Choose the offset penalty by leave-one-night-out log-likelihood across participants.

    Parameters
    ----------
    nights : mapping of str to sequence of (margin, reference)
        Per participant, one ``(margin, reference)`` pair per labelled night, each of shape
        (n_epochs,): held-out pooled log-odds plus baseline, and reference labels (1 sleep,
        0 wake, NaN excluded) of the night's in-bed epochs.
    grid : sequence of float, default=DEFAULT_SHRINKAGE_GRID
        Candidate penalties (> 0), ascending.

    Returns
    -------
    ShrinkageChoice
        Ties go to the larger penalty (more shrinkage). Without any participant having two
        labelled nights, the largest penalty is returned.
    """
    penalties = np.asarray(sorted(float(g) for g in grid))
    if penalties.size == 0 or penalties[0] <= 0:
        raise NightbankError("the shrinkage grid needs positive values", code="invalid_offset_input")
    per: dict[str, tuple[float, ...]] = {}
    for pid, pairs in nights.items():
        cleaned = [_clean(m, y) for m, y in pairs]
        cleaned = [(m, y) for m, y in cleaned if m.size]
        if len(cleaned) < 2:
            continue
        total = np.zeros(penalties.size)
        for k, (m_k, y_k) in enumerate(cleaned):
            m_rest = np.concatenate([m for i, (m, _) in enumerate(cleaned) if i != k])
            y_rest = np.concatenate([y for i, (_, y) in enumerate(cleaned) if i != k])
            total += _log_likelihood(m_k, y_k, _solve(m_rest, y_rest, penalties))
        per[pid] = tuple(float(v) for v in total)
    if not per:
        ll = np.zeros(penalties.size)
        return ShrinkageChoice(float(penalties[-1]), tuple(penalties.tolist()), tuple(ll.tolist()), {})
    ll = np.sum([np.asarray(v) for v in per.values()], axis=0)
    return ShrinkageChoice(float(penalties[_best(ll)]), tuple(penalties.tolist()), tuple(float(v) for v in ll), per)


def participant_offset(model: SleepModel, nights: Sequence[Night], *, shrinkage: float,
                       config: TrainingConfig = TrainingConfig(), descriptors: Mapping[str, float] | None = None,
                       feature_cache: FeatureSource | None = None) -> float:
    """Offset of a participant the pooled ``model`` never saw, from their labelled nights.

    Parameters
    ----------
    model : SleepModel
        A pooled model.
    nights : sequence of Night
        The participant's nights; labelled in-bed epochs with counts are used (missing epochs
        have no margin), all nights give the descriptors when ``descriptors`` is None.
    shrinkage : float
        Penalty, e.g. :attr:`PooledResult.shrinkage`.
    config : TrainingConfig, default=TrainingConfig()
        Only ``movement_time`` is used (reference binarisation).
    descriptors : mapping, default=None
        The participant's descriptors (:func:`~models.learning.descriptors.participant_descriptors`).
    feature_cache : FeatureSource, default=None
        Where night features are looked up (:mod:`models.features.source`); None computes them.

    Returns
    -------
    float
        Log-odds offset (0.0 without labelled epochs).
    """
    descriptors = descriptors or participant_descriptors(list(nights))
    margins, refs = [], []
    for night in nights:
        ref = night.reference_sleep(movement_time=config.movement_time)
        if ref is None:
            continue
        bed = slice(*night.in_bed)
        margin = model.decision_function(night, descriptors=descriptors, feature_cache=feature_cache)
        margins.append(np.nan_to_num(margin[bed], nan=0.0) + model.offset_baseline_)
        refs.append(np.where(night.missing[bed], np.nan, ref[bed]))  # missing epochs are not predicted
    if not margins:
        return 0.0
    return estimate_offset(np.concatenate(margins), np.concatenate(refs), shrinkage=shrinkage)
