"""Two-state sleep/wake hidden Markov model over epochs (state 0 = wake, 1 = sleep).

Transitions are counted from training labels (:func:`fit_sleep_wake_hmm`). The emission of an
epoch comes from the calibrated classifier by the *scaled-likelihood* trick of hybrid HMMs
(Bourlard & Morgan 1994, Connectionist Speech Recognition): by Bayes' rule
``p(x | s) = p(s | x) p(x) / p(s)``, and ``p(x)`` is the same for both states, so
``p(s | x) / p(s)`` is proportional to the likelihood and serves as the emission; ``p(s)`` is
the class prior the classifier was trained under (the sleep share of the training labels). An
unscored epoch (NaN probability) has emission 1 for both states: it carries no evidence and the
chain carries the state across it.

Algorithms (Rabiner 1989, "A tutorial on hidden Markov models", for the first two):

- :func:`forward_backward`: per-epoch posterior marginals, scaled forward and backward passes;
- :func:`viterbi`: the most probable path, in log space;
- :func:`sample_paths`: forward filtering, backward sampling of whole paths from the posterior
  (Frühwirth-Schnatter 1994; Carter & Kohn 1994), many paths at once, from a seeded generator.

Shapes: ``emissions`` (n_epochs, 2), ``transition`` (2, 2) with rows "from" and columns "to",
``initial`` (2,).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..errors import NightbankError

__all__ = ["DEFAULT_PSEUDO_COUNT", "InvalidHmmError", "SleepWakeHmm", "fit_sleep_wake_hmm", "forward_backward",
           "sample_paths", "scaled_likelihoods", "viterbi"]

#: Added to every transition count, initial-state count and class count (add-one or Laplace
#: smoothing, common practice): no transition is impossible because the training nights lacked it.
DEFAULT_PSEUDO_COUNT = 1.0
#: Calibrated probabilities are kept inside [_FLOOR, 1 - _FLOOR] so no epoch rules a state out.
_FLOOR = 1e-6


class InvalidHmmError(NightbankError):
    """HMM input (labels, probabilities, settings or a stored model) is invalid."""

    code = "invalid_hmm"


@dataclass(frozen=True, eq=False)
class SleepWakeHmm:
    """A fitted two-state chain.

    Attributes
    ----------
    transition : ndarray of float64, shape (2, 2)
        ``transition[i, j]`` = P(state j at t + 1 | state i at t); rows sum to 1.
    initial : ndarray of float64, shape (2,)
        Distribution of the first epoch's state.
    prior_sleep : float
        Sleep share of the training labels, P(s = sleep): the divisor of the scaled likelihood.
    """

    transition: NDArray[np.float64]
    initial: NDArray[np.float64]
    prior_sleep: float

    def __post_init__(self) -> None:
        a = np.asarray(self.transition, dtype=np.float64)
        pi = np.asarray(self.initial, dtype=np.float64)
        ok = (a.shape == (2, 2) and pi.shape == (2,) and np.isfinite(a).all() and np.isfinite(pi).all()
              and (a > 0).all() and (pi >= 0).all() and np.allclose(a.sum(axis=1), 1.0)
              and np.isclose(pi.sum(), 1.0) and 0.0 < float(self.prior_sleep) < 1.0)
        if not ok:
            raise InvalidHmmError("an HMM needs a (2, 2) transition matrix of positive rows summing to 1, an initial "
                                  "distribution of 2 values summing to 1 and 0 < prior_sleep < 1")
        object.__setattr__(self, "transition", a)
        object.__setattr__(self, "initial", pi)
        object.__setattr__(self, "prior_sleep", float(self.prior_sleep))

    def with_stickiness(self, stickiness: float) -> SleepWakeHmm:
        """The chain with its switching probabilities divided by ``stickiness`` (> 0).

        ``stickiness`` > 1 makes state changes rarer (fewer, longer bouts), < 1 more frequent;
        1 is the fitted chain. The diagonal takes up the rest of each row.

        Raises
        ------
        InvalidHmmError
            If ``stickiness`` is not positive or makes a switching probability reach 1.
        """
        if not np.isfinite(stickiness) or stickiness <= 0:
            raise InvalidHmmError(f"stickiness must be a finite number > 0, got {stickiness!r}")
        switch = np.array([self.transition[0, 1], self.transition[1, 0]]) / stickiness
        if (switch >= 1.0).any():
            raise InvalidHmmError(f"stickiness {stickiness} is too small: a switching probability reaches 1")
        a = np.array([[1.0 - switch[0], switch[0]], [switch[1], 1.0 - switch[1]]])
        return SleepWakeHmm(transition=a, initial=self.initial, prior_sleep=self.prior_sleep)

    def emissions(self, p_sleep: ArrayLike, *, emission_weight: float = 1.0) -> NDArray[np.float64]:
        """Scaled likelihoods of ``p_sleep`` under this chain's prior (see :func:`scaled_likelihoods`)."""
        return scaled_likelihoods(p_sleep, self.prior_sleep, emission_weight=emission_weight)

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe numbers."""
        return {"transition": self.transition.tolist(), "initial": self.initial.tolist(),
                "prior_sleep": self.prior_sleep}

    @classmethod
    def from_dict(cls, values: Mapping[str, Any]) -> SleepWakeHmm:
        """The chain :meth:`to_dict` gave; :class:`InvalidHmmError` names a missing or bad field."""
        if not isinstance(values, Mapping):
            raise InvalidHmmError("hmm must be an object with transition, initial and prior_sleep")
        missing = [k for k in ("transition", "initial", "prior_sleep") if k not in values]
        if missing:
            raise InvalidHmmError(f"hmm is missing {', '.join(missing)}")
        try:
            return cls(transition=np.asarray(values["transition"], dtype=np.float64),
                       initial=np.asarray(values["initial"], dtype=np.float64),
                       prior_sleep=float(values["prior_sleep"]))
        except (TypeError, ValueError) as exc:
            if isinstance(exc, InvalidHmmError):
                raise
            raise InvalidHmmError(f"hmm fields must be numbers: {exc}") from None


def _labels(labels: ArrayLike, where: str) -> NDArray[np.float64]:
    y = np.asarray(labels, dtype=np.float64)
    if y.ndim != 1:
        raise InvalidHmmError(f"{where}: labels must be 1-D, got shape {y.shape}")
    bad = np.flatnonzero(~np.isnan(y) & (y != 0) & (y != 1))
    if bad.size:
        raise InvalidHmmError(f"{where}: labels must be 0, 1 or NaN; first bad epochs: {bad[:5].tolist()}")
    return y


def fit_sleep_wake_hmm(labels_per_night: Iterable[ArrayLike], *,
                       pseudo_count: float = DEFAULT_PSEUDO_COUNT) -> SleepWakeHmm:
    """Count transitions, first states and classes in training labels.

    Parameters
    ----------
    labels_per_night : iterable of array-like, each of shape (n_epochs,)
        Reference labels per night (1 = sleep, 0 = wake, NaN = unscored). A pair of consecutive
        epochs counts only when both are scored (no transition is counted across a gap); the
        first scored epoch of each night counts towards ``initial``.
    pseudo_count : float, default=DEFAULT_PSEUDO_COUNT
        Added to each of the four transition counts, the two initial-state counts and the two
        class counts (>= 0; 0 gives the maximum-likelihood estimate).

    Returns
    -------
    SleepWakeHmm

    Raises
    ------
    InvalidHmmError
        For bad labels (naming the night) or counts that leave a row or the prior undefined.
    """
    if not np.isfinite(pseudo_count) or pseudo_count < 0:
        raise InvalidHmmError(f"pseudo_count must be a finite number >= 0, got {pseudo_count!r}")
    pairs = np.zeros((2, 2))
    first = np.zeros(2)
    classes = np.zeros(2)
    for k, labels in enumerate(labels_per_night):
        y = _labels(labels, f"night {k}")
        scored = y[~np.isnan(y)].astype(np.intp)
        classes += np.bincount(scored, minlength=2)
        if scored.size:
            first[scored[0]] += 1
        both = ~np.isnan(y[:-1]) & ~np.isnan(y[1:])
        np.add.at(pairs, (y[:-1][both].astype(np.intp), y[1:][both].astype(np.intp)), 1.0)
    pairs += pseudo_count
    first += pseudo_count
    classes += pseudo_count
    if (pairs.sum(axis=1) == 0).any() or first.sum() == 0 or (classes == 0).any() or (pairs == 0).any():
        raise InvalidHmmError("the labels hold too few epochs of each state to estimate the chain "
                              "(use a pseudo_count > 0)")
    return SleepWakeHmm(transition=pairs / pairs.sum(axis=1, keepdims=True), initial=first / first.sum(),
                        prior_sleep=float(classes[1] / classes.sum()))


def scaled_likelihoods(p_sleep: ArrayLike, prior_sleep: float, *, emission_weight: float = 1.0) -> NDArray[np.float64]:
    """Emission of each epoch for (wake, sleep): ``[(1 - p) / (1 - prior), p / prior] ** emission_weight``.

    Parameters
    ----------
    p_sleep : array-like of shape (n_epochs,)
        Calibrated P(sleep | epoch), NaN = unscored (emission 1 for both states). Kept inside
        [1e-6, 1 - 1e-6] so that no single epoch rules a state out.
    prior_sleep : float
        Class prior of the classifier's training data, in (0, 1).
    emission_weight : float, default=1.0
        Exponent on the emissions (> 0): below 1 trusts the classifier less relative to the
        chain, above 1 more (the "acoustic scale" of hybrid recognisers; from memory).

    Returns
    -------
    emissions : ndarray of float64, shape (n_epochs, 2)
    """
    p = np.asarray(p_sleep, dtype=np.float64)
    if p.ndim != 1:
        raise InvalidHmmError(f"p_sleep must be 1-D, got shape {p.shape}")
    if np.any(~np.isnan(p) & ((p < 0) | (p > 1))):
        raise InvalidHmmError("p_sleep must lie in [0, 1] (or be NaN)")
    if not 0 < prior_sleep < 1 or not np.isfinite(emission_weight) or emission_weight <= 0:
        raise InvalidHmmError("prior_sleep must lie in (0, 1) and emission_weight be > 0")
    q = np.clip(p, _FLOOR, 1.0 - _FLOOR)
    e = np.column_stack([(1.0 - q) / (1.0 - prior_sleep), q / prior_sleep]) ** emission_weight
    e[np.isnan(p)] = 1.0
    return np.asarray(e)


def _check(emissions: ArrayLike, transition: ArrayLike, initial: ArrayLike
           ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    e = np.asarray(emissions, dtype=np.float64)
    a = np.asarray(transition, dtype=np.float64)
    pi = np.asarray(initial, dtype=np.float64)
    if e.ndim != 2 or e.shape[1] != 2 or a.shape != (2, 2) or pi.shape != (2,):
        raise InvalidHmmError(f"emissions must be (n_epochs, 2), transition (2, 2), initial (2,); got "
                              f"{e.shape}, {a.shape}, {pi.shape}")
    if not (np.isfinite(e).all() and (e >= 0).all() and (e.sum(axis=1) > 0).all()):
        raise InvalidHmmError("emissions must be finite, >= 0 and not both 0 in any epoch")
    return e, a, pi


def _forward(e: NDArray[np.float64], a: NDArray[np.float64], pi: NDArray[np.float64]
             ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Filtered distributions alpha_t = P(s_t | x_1..t), shape (n, 2), and the scale factors c_t."""
    n = e.shape[0]
    alpha: list[tuple[float, float]] = []
    scale: list[float] = []
    a00, a01, a10, a11 = float(a[0, 0]), float(a[0, 1]), float(a[1, 0]), float(a[1, 1])
    emit = e.tolist()  # plain floats: faster than 2-element numpy operations and numpy scalar indexing
    w0, s0 = float(pi[0] * e[0, 0]), float(pi[1] * e[0, 1])
    for t in range(n):
        if t:
            e0, e1 = emit[t]
            w0, s0 = (w0 * a00 + s0 * a10) * e0, (w0 * a01 + s0 * a11) * e1
        c = w0 + s0
        if not c > 0:
            raise InvalidHmmError(f"the observations are impossible under the chain at epoch {t}")
        w0, s0 = w0 / c, s0 / c
        alpha.append((w0, s0))
        scale.append(c)
    return np.array(alpha, dtype=np.float64).reshape(n, 2), np.array(scale, dtype=np.float64)


def forward_backward(emissions: ArrayLike, transition: ArrayLike, initial: ArrayLike
                     ) -> tuple[NDArray[np.float64], float]:
    """Posterior marginals P(s_t | all epochs) by the scaled forward-backward passes.

    Parameters
    ----------
    emissions : array-like of shape (n_epochs, 2)
        Emission (likelihood up to a per-epoch factor) of wake and sleep.
    transition : array-like of shape (2, 2)
    initial : array-like of shape (2,)

    Returns
    -------
    marginals : ndarray of float64, shape (n_epochs, 2)
        Rows sum to 1; column 1 is P(sleep).
    log_likelihood : float
        Log of the sum over all paths of (path probability x emissions).
    """
    e, a, pi = _check(emissions, transition, initial)
    n = e.shape[0]
    if n == 0:
        return np.zeros((0, 2)), 0.0
    alpha, scale = _forward(e, a, pi)
    a00, a01, a10, a11 = float(a[0, 0]), float(a[0, 1]), float(a[1, 0]), float(a[1, 1])
    emit, scales = e.tolist(), scale.tolist()
    beta: list[tuple[float, float]] = [(1.0, 1.0)]  # from the last epoch backwards
    b0, b1 = 1.0, 1.0
    for t in range(n - 2, -1, -1):
        e0, e1 = emit[t + 1]
        x0, x1 = e0 * b0, e1 * b1
        c = scales[t + 1]
        b0, b1 = (a00 * x0 + a01 * x1) / c, (a10 * x0 + a11 * x1) / c
        beta.append((b0, b1))
    post = alpha * np.array(beta[::-1], dtype=np.float64).reshape(n, 2)
    return post / post.sum(axis=1, keepdims=True), float(np.log(scale).sum())


def viterbi(emissions: ArrayLike, transition: ArrayLike, initial: ArrayLike) -> NDArray[np.int8]:
    """The most probable state path (log space; ties go to the lower state, wake).

    Parameters
    ----------
    emissions, transition, initial
        As for :func:`forward_backward`.

    Returns
    -------
    path : ndarray of int8, shape (n_epochs,)
        1 = sleep, 0 = wake.
    """
    e, a, pi = _check(emissions, transition, initial)
    n = e.shape[0]
    if n == 0:
        return np.zeros(0, dtype=np.int8)
    with np.errstate(divide="ignore"):
        log_e, log_a, log_pi = np.log(e), np.log(a), np.log(pi)
    back: list[tuple[int, int]] = [(0, 0)]  # back[t][j]: best state at t - 1 on the way to j at t
    l00, l01, l10, l11 = (float(v) for v in log_a.ravel())
    w, s = float(log_pi[0] + log_e[0, 0]), float(log_pi[1] + log_e[0, 1])
    emit = log_e.tolist()
    for t in range(1, n):  # plain floats and lists: faster than 2-element numpy operations
        from_w, from_s = w + l00, s + l10  # into wake
        to_w = from_w if from_w >= from_s else from_s
        back_w = int(from_w < from_s)
        from_w, from_s = w + l01, s + l11  # into sleep
        to_s = from_w if from_w >= from_s else from_s
        back.append((back_w, int(from_w < from_s)))
        w, s = to_w + emit[t][0], to_s + emit[t][1]
    state = int(s > w)
    path = [state]
    for t in range(n - 1, 0, -1):
        state = back[t][state]
        path.append(state)
    return np.array(path[::-1], dtype=np.int8)


def sample_paths(emissions: ArrayLike, transition: ArrayLike, initial: ArrayLike, *, n_paths: int,
                 rng: np.random.Generator) -> NDArray[np.int8]:
    """Draw whole state paths from the posterior by forward filtering, backward sampling.

    Parameters
    ----------
    emissions, transition, initial
        As for :func:`forward_backward`.
    n_paths : int
        Number of paths (>= 1).
    rng : numpy.random.Generator
        Source of randomness (seed it for reproducible paths).

    Returns
    -------
    paths : ndarray of int8, shape (n_paths, n_epochs)
        Independent draws; 1 = sleep, 0 = wake.
    """
    e, a, pi = _check(emissions, transition, initial)
    if isinstance(n_paths, bool) or not isinstance(n_paths, int | np.integer) or n_paths < 1:
        raise InvalidHmmError(f"n_paths must be an integer >= 1, got {n_paths!r}")
    n = e.shape[0]
    paths = np.empty((int(n_paths), n), dtype=np.int8)
    if n == 0:
        return paths
    alpha, _ = _forward(e, a, pi)
    # one uniform per path and epoch, drawn from the last epoch backwards (row k: epoch n - 1 - k)
    u = rng.random((n, int(n_paths)))
    # P(s_t = sleep | x_1..t, s_t+1 = j) is to_sleep[t, j] / total[t, j]; a path is asleep at t when
    # its uniform times total falls below to_sleep. Both outcomes (next epoch awake or asleep) at once:
    to_sleep = alpha[:-1, 1:2] * a[1]
    total = alpha[:-1, 0:1] * a[0] + to_sleep
    after_wake = u[:0:-1] * total[:, 0:1] < to_sleep[:, 0:1]  # shape (n - 1, n_paths), epoch order
    switch = after_wake ^ (u[:0:-1] * total[:, 1:2] < to_sleep[:, 1:2])  # where the next state matters
    rows = np.empty((n, int(n_paths)), dtype=bool)  # epoch by epoch; one pass back, row by row
    rows[-1] = u[0] < alpha[-1, 1]
    for t in range(n - 2, -1, -1):  # state_t = after_wake xor (state_t+1 and switch)
        row = rows[t]
        np.bitwise_and(rows[t + 1], switch[t], out=row)
        np.bitwise_xor(row, after_wake[t], out=row)
    paths[:] = rows.T
    return paths
