"""Forward-backward marginals and Viterbi paths of many chains at once.

:func:`batch_marginals` and :func:`batch_viterbi` take a list of cases ``(emissions, transition,
initial)`` (nights of different lengths, chains of different stickiness) and return, case by
case, what :func:`models.decoding.hmm.forward_backward` (column 1 of its marginals) and
:func:`models.decoding.hmm.viterbi` return for it: the same recursions with the same arithmetic in
the same order, run for every case side by side (one array element per case and epoch step) instead
of one case after the other, so the numbers are the same to the last bit. A decoder search
evaluates a few dozen settings on every night; side by side, the per-epoch Python work is paid once
per step of the longest night rather than once per step of every night and setting.

Cases are run in blocks of at most :data:`BLOCK_CASES` (memory: a few arrays of
``longest night x block`` floats).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .hmm import InvalidHmmError, _check

__all__ = ["BLOCK_CASES", "BLOCK_LANES", "batch_marginals", "batch_sample_paths", "batch_viterbi"]

#: Largest number of cases run side by side.
BLOCK_CASES = 512
#: Largest number of sampled paths (over all cases) drawn side by side.
BLOCK_LANES = 4096

Case = tuple[ArrayLike, ArrayLike, ArrayLike]


class _Block:
    """Cases of one block, epoch-major: ``e0[t, j]`` is case ``j``'s wake emission at epoch ``t``."""

    def __init__(self, cases: Sequence[tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]]
                 ) -> None:
        self.lengths = np.array([e.shape[0] for e, _, _ in cases])
        n, m = int(self.lengths.max()), len(cases)
        self.e0, self.e1 = np.ones((n, m)), np.ones((n, m))  # past a case's end: uninformative padding
        for j, (e, _, _) in enumerate(cases):
            self.e0[:e.shape[0], j], self.e1[:e.shape[0], j] = e[:, 0], e[:, 1]
        a = np.array([c[1] for c in cases])
        self.a00, self.a01, self.a10, self.a11 = a[:, 0, 0], a[:, 0, 1], a[:, 1, 0], a[:, 1, 1]
        self.pi = np.array([c[2] for c in cases])


def _blocks(cases: Sequence[Case], size: int | None = None) -> tuple[list[int], list[_Block], list[list[int]]]:
    """Checked cases split into blocks; the positions of empty cases; each block's case positions."""
    size = BLOCK_CASES if size is None else size
    checked = [_check(*case) for case in cases]
    empty = [k for k, (e, _, _) in enumerate(checked) if e.shape[0] == 0]
    live = [k for k, (e, _, _) in enumerate(checked) if e.shape[0] > 0]
    groups = [live[i:i + size] for i in range(0, len(live), size)]
    return empty, [_Block([checked[k] for k in g]) for g in groups], groups


def _forward(b: _Block) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Filtered P(wake), P(sleep) and scale factors, each (n, m), as :func:`models.decoding.hmm._forward`."""
    n, m = b.e0.shape
    alpha0, alpha1, scale = np.empty((n, m)), np.empty((n, m)), np.empty((n, m))
    w, s = b.pi[:, 0] * b.e0[0], b.pi[:, 1] * b.e1[0]
    with np.errstate(all="ignore"):  # an impossible case is reported below, by its first bad epoch
        for t in range(n):
            if t:
                w, s = (w * b.a00 + s * b.a10) * b.e0[t], (w * b.a01 + s * b.a11) * b.e1[t]
            c = w + s
            w, s = w / c, s / c
            alpha0[t], alpha1[t], scale[t] = w, s, c
    bad = ~(scale > 0) & (np.arange(n)[:, None] < b.lengths)
    if bad.any():
        t, _ = np.argwhere(bad)[np.argmin(np.argwhere(bad)[:, 1])]
        raise InvalidHmmError(f"the observations are impossible under the chain at epoch {int(t)}")
    return alpha0, alpha1, scale


def batch_marginals(cases: Sequence[Case]) -> list[NDArray[np.float64]]:
    """Posterior P(sleep) per epoch of every case, as ``forward_backward(*case)[0][:, 1]``.

    Parameters
    ----------
    cases : sequence of (emissions, transition, initial)
        As for :func:`models.decoding.hmm.forward_backward`.

    Returns
    -------
    list of ndarray of float64, shape (n_epochs,) each
    """
    out: list[NDArray[np.float64]] = [np.zeros(0)] * len(cases)
    _, blocks, groups = _blocks(cases)
    for b, group in zip(blocks, groups, strict=True):
        alpha0, alpha1, scale = _forward(b)
        n, m = alpha0.shape
        beta0, beta1 = np.ones((n, m)), np.ones((n, m))
        b0, b1 = np.ones(m), np.ones(m)
        for t in range(n - 2, -1, -1):
            x0, x1 = b.e0[t + 1] * b0, b.e1[t + 1] * b1
            c = scale[t + 1]
            live = t < b.lengths - 1  # a case's backward pass starts at its own last epoch
            b0 = np.where(live, (b.a00 * x0 + b.a01 * x1) / c, 1.0)
            b1 = np.where(live, (b.a10 * x0 + b.a11 * x1) / c, 1.0)
            beta0[t], beta1[t] = b0, b1
        post0, post1 = alpha0 * beta0, alpha1 * beta1
        sleep = post1 / (post0 + post1)
        for j, k in enumerate(group):
            out[k] = sleep[:b.lengths[j], j].copy()
    return out


def batch_viterbi(cases: Sequence[Case]) -> list[NDArray[np.int8]]:
    """The most probable path of every case, as ``viterbi(*case)`` (ties to wake).

    Parameters
    ----------
    cases : sequence of (emissions, transition, initial)
        As for :func:`models.decoding.hmm.viterbi`.

    Returns
    -------
    list of ndarray of int8, shape (n_epochs,) each
        1 = sleep, 0 = wake.
    """
    out: list[NDArray[np.int8]] = [np.zeros(0, dtype=np.int8)] * len(cases)
    _, blocks, groups = _blocks(cases)
    for b, group in zip(blocks, groups, strict=True):
        n, m = b.e0.shape
        with np.errstate(divide="ignore"):
            log_e0, log_e1 = np.log(b.e0), np.log(b.e1)
            l00, l01, l10, l11 = np.log(b.a00), np.log(b.a01), np.log(b.a10), np.log(b.a11)
            log_pi = np.log(b.pi)
        back0, back1 = np.zeros((n, m), dtype=bool), np.zeros((n, m), dtype=bool)
        w_at, s_at = np.empty((n, m)), np.empty((n, m))
        w, s = log_pi[:, 0] + log_e0[0], log_pi[:, 1] + log_e1[0]
        w_at[0], s_at[0] = w, s
        for t in range(1, n):
            from_w, from_s = w + l00, s + l10  # into wake
            to_w = np.where(from_w >= from_s, from_w, from_s)
            back0[t] = from_w < from_s
            from_w, from_s = w + l01, s + l11  # into sleep
            to_s = np.where(from_w >= from_s, from_w, from_s)
            back1[t] = from_w < from_s
            w, s = to_w + log_e0[t], to_s + log_e1[t]
            w_at[t], s_at[t] = w, s
        cols = np.arange(m)
        state = s_at[b.lengths - 1, cols] > w_at[b.lengths - 1, cols]
        paths = np.zeros((n, m), dtype=np.int8)
        paths[b.lengths - 1, cols] = state
        for t in range(n - 1, 0, -1):
            state = np.where(t <= b.lengths - 1, np.where(state, back1[t], back0[t]), state)
            paths[t - 1] = state
        for j, k in enumerate(group):
            out[k] = paths[:b.lengths[j], j].copy()
    return out


def batch_sample_paths(cases: Sequence[Case], *, n_paths: int, seeds: Sequence[int]) -> list[NDArray[np.int8]]:
    """Posterior paths of every case, as ``sample_paths(*case, n_paths=n_paths, rng=default_rng(seed))``.

    Each case draws its uniforms from its own generator, in the order
    :func:`models.decoding.hmm.sample_paths` draws them, so its paths are the same; the backward
    steps of all cases' paths are taken side by side.

    Parameters
    ----------
    cases : sequence of (emissions, transition, initial)
    n_paths : int
        Paths per case (>= 1).
    seeds : sequence of int
        One ``numpy.random.default_rng`` seed per case.

    Returns
    -------
    list of ndarray of int8, shape (n_paths, n_epochs) each
    """
    if isinstance(n_paths, bool) or not isinstance(n_paths, int | np.integer) or n_paths < 1:
        raise InvalidHmmError(f"n_paths must be an integer >= 1, got {n_paths!r}")
    if len(seeds) != len(cases):
        raise InvalidHmmError(f"{len(cases)} cases but {len(seeds)} seeds")
    p = int(n_paths)
    out: list[NDArray[np.int8]] = [np.empty((p, 0), dtype=np.int8)] * len(cases)
    _, blocks, groups = _blocks(cases, size=max(1, BLOCK_LANES // p))
    for b, group in zip(blocks, groups, strict=True):
        alpha0, alpha1, _ = _forward(b)
        n, m = alpha0.shape
        # per lane (case j's path i at column j * p + i): state_t = after_wake xor (state_t+1 and switch);
        # past a case's last epoch the state is carried unchanged (switch on, after_wake off)
        after_wake, switch = np.zeros((n, m * p), dtype=bool), np.ones((n, m * p), dtype=bool)
        rows = np.empty((n, m * p), dtype=bool)
        for j, k in enumerate(group):
            length, lanes = int(b.lengths[j]), slice(j * p, (j + 1) * p)
            u = np.random.default_rng(seeds[k]).random((length, p))  # row r: epoch length - 1 - r
            rows[-1, lanes] = u[0] < alpha1[length - 1, j]
            to_sleep0, to_sleep1 = alpha1[:length - 1, j] * b.a10[j], alpha1[:length - 1, j] * b.a11[j]
            total0 = alpha0[:length - 1, j] * b.a00[j] + to_sleep0
            total1 = alpha0[:length - 1, j] * b.a01[j] + to_sleep1
            wake_next = u[:0:-1] * total0[:, None] < to_sleep0[:, None]
            after_wake[:length - 1, lanes] = wake_next
            switch[:length - 1, lanes] = wake_next ^ (u[:0:-1] * total1[:, None] < to_sleep1[:, None])
        for t in range(n - 2, -1, -1):
            row = rows[t]
            np.bitwise_and(rows[t + 1], switch[t], out=row)
            np.bitwise_xor(row, after_wake[t], out=row)
        for j, k in enumerate(group):
            out[k] = np.ascontiguousarray(rows[:b.lengths[j], j * p:(j + 1) * p].T).view(np.int8)
    return out
