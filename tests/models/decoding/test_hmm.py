"""The sleep/wake HMM against brute-force enumeration of every path (the definitions of the
posterior, the most probable path and the marginals; Rabiner 1989), and transition estimates
against counts made by hand."""

from __future__ import annotations

import itertools
import json

import numpy as np
import pytest
from scipy import stats

from models.decoding.hmm import (
    InvalidHmmError,
    SleepWakeHmm,
    fit_sleep_wake_hmm,
    forward_backward,
    sample_paths,
    scaled_likelihoods,
    viterbi,
)


def _random_case(seed: int, n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    stay = rng.uniform(0.55, 0.95, 2)
    a = np.array([[stay[0], 1 - stay[0]], [1 - stay[1], stay[1]]])
    pi = rng.dirichlet([2, 2])
    e = rng.uniform(0.05, 3.0, (n, 2))
    return e, a, pi


def _enumerate(e: np.ndarray, a: np.ndarray, pi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """All 2^n paths, shape (2^n, n), and their joint weight P(path) x prod emissions."""
    n = e.shape[0]
    paths = np.array(list(itertools.product((0, 1), repeat=n)), dtype=np.int8)
    w = pi[paths[:, 0]] * e[0, paths[:, 0]]
    for t in range(1, n):
        w = w * a[paths[:, t - 1], paths[:, t]] * e[t, paths[:, t]]
    return paths, w


@pytest.mark.parametrize("seed,n", [(0, 1), (1, 4), (2, 7), (3, 9), (4, 10), (5, 10), (6, 8)])
def test_viterbi_is_the_argmax_of_all_paths(seed: int, n: int) -> None:
    e, a, pi = _random_case(seed, n)
    paths, w = _enumerate(e, a, pi)
    np.testing.assert_array_equal(viterbi(e, a, pi), paths[np.argmax(w)])


@pytest.mark.parametrize("seed,n", [(10, 1), (11, 5), (12, 9), (13, 10)])
def test_forward_backward_marginals_equal_enumeration(seed: int, n: int) -> None:
    e, a, pi = _random_case(seed, n)
    paths, w = _enumerate(e, a, pi)
    exact_sleep = (w[:, None] * paths).sum(axis=0) / w.sum()
    marginals, loglik = forward_backward(e, a, pi)
    np.testing.assert_allclose(marginals[:, 1], exact_sleep, rtol=1e-10)
    np.testing.assert_allclose(marginals.sum(axis=1), 1.0)
    assert loglik == pytest.approx(np.log(w.sum()), rel=1e-10)


def test_long_night_does_not_underflow() -> None:
    e, a, pi = _random_case(20, 3000)
    marginals, loglik = forward_backward(e * 1e-3, a, pi)  # raw products would be ~1e-9000
    assert np.isfinite(marginals).all() and np.isfinite(loglik)
    assert viterbi(e * 1e-3, a, pi).shape == (3000,)


def test_sampled_paths_follow_the_exact_posterior() -> None:
    # chi-square goodness of fit (scipy.stats.chisquare) of 40,000 draws to the enumerated posterior over 2^6 paths
    e, a, pi = _random_case(30, 6)
    paths, w = _enumerate(e, a, pi)
    drawn = sample_paths(e, a, pi, n_paths=40_000, rng=np.random.default_rng(1))
    codes = drawn.astype(np.int64) @ (1 << np.arange(5, -1, -1))  # same order as itertools.product
    observed = np.bincount(codes, minlength=64)
    expected = w / w.sum() * drawn.shape[0]
    assert stats.chisquare(observed, expected).pvalue > 0.001
    tv = 0.5 * np.abs(observed / drawn.shape[0] - w / w.sum()).sum()
    assert tv < 0.03
    # the check has power here: epochs drawn independently from their marginals (no backward step) fail it
    marginals, _ = forward_backward(e, a, pi)
    independent = (np.random.default_rng(2).random(drawn.shape) < marginals[:, 1]).astype(np.int64)
    assert stats.chisquare(np.bincount(independent @ (1 << np.arange(5, -1, -1)), minlength=64),
                           expected).pvalue < 1e-6
    # seeded: the same generator seed gives the same paths
    again = sample_paths(e, a, pi, n_paths=40_000, rng=np.random.default_rng(1))
    np.testing.assert_array_equal(drawn, again)


def _textbook_backward_sampling(e: np.ndarray, a: np.ndarray, pi: np.ndarray, n_paths: int,
                                rng: np.random.Generator) -> np.ndarray:
    """Forward filtering, backward sampling written out step by step (Frühwirth-Schnatter 1994; Chib 1996):
    filtered distributions by the normalised forward recursion, then the last state from the last filtered
    distribution and each earlier state from P(s_t | x_1..t, s_t+1), one uniform per path and epoch."""
    n = e.shape[0]
    alpha = np.empty((n, 2))
    f = pi * e[0]
    alpha[0] = f / f.sum()
    for t in range(1, n):
        f = (alpha[t - 1] @ a) * e[t]
        alpha[t] = f / f.sum()
    paths = np.empty((n_paths, n), dtype=np.int8)
    paths[:, -1] = rng.random(n_paths) < alpha[-1, 1]
    for t in range(n - 2, -1, -1):
        nxt = paths[:, t + 1]
        to_sleep = alpha[t, 1] * a[1, nxt]
        paths[:, t] = rng.random(n_paths) * (alpha[t, 0] * a[0, nxt] + to_sleep) < to_sleep
    return paths


@pytest.mark.parametrize("seed, n, n_paths", [(40, 1, 7), (41, 2, 1), (42, 300, 50), (43, 1200, 200)])
def test_sampled_paths_are_the_textbook_draws(seed: int, n: int, n_paths: int) -> None:
    # the same uniforms in the same order (last epoch first) give the same paths as the step-by-step sampler;
    # a state only flips where the two differ by a rounding error of the filtered probability
    e, a, pi = _random_case(seed, n)
    drawn = sample_paths(e, a, pi, n_paths=n_paths, rng=np.random.default_rng(seed))
    reference = _textbook_backward_sampling(e, a, pi, n_paths, np.random.default_rng(seed))
    assert drawn.shape == reference.shape and drawn.dtype == np.int8
    assert np.mean(drawn != reference) < 1e-3


def test_unscored_epochs_are_uninformative() -> None:
    p = np.array([0.9, np.nan, np.nan, 0.2, 0.8])
    e = scaled_likelihoods(p, 0.7)
    np.testing.assert_array_equal(e[1:3], 1.0)
    assert e[0, 1] == pytest.approx(0.9 / 0.7) and e[0, 0] == pytest.approx(0.1 / 0.3)
    # marginals at a NaN epoch are the chain's prediction from its neighbours (enumeration)
    a = np.array([[0.8, 0.2], [0.1, 0.9]])
    pi = np.array([0.5, 0.5])
    paths, w = _enumerate(e, a, pi)
    marginals, _ = forward_backward(e, a, pi)
    np.testing.assert_allclose(marginals[:, 1], (w[:, None] * paths).sum(axis=0) / w.sum())


def test_transitions_are_counted_by_hand() -> None:
    # night 1: S S W S S, transitions SS SW WS SS; night 2: W W ? S S, pairs WW, SS (the gap counts nothing)
    nights = [np.array([1, 1, 0, 1, 1.0]), np.array([0, 0, np.nan, 1, 1.0])]
    hmm = fit_sleep_wake_hmm(nights, pseudo_count=0.0)
    # from wake: WS once (night 1), WW once (night 2) -> 1/2, 1/2; from sleep: SS 3 times, SW once -> 1/4, 3/4
    np.testing.assert_allclose(hmm.transition, [[0.5, 0.5], [0.25, 0.75]])
    np.testing.assert_allclose(hmm.initial, [0.5, 0.5])  # first scored epochs: S, W
    assert hmm.prior_sleep == pytest.approx(6 / 9)  # 6 sleep among 9 scored epochs
    smoothed = fit_sleep_wake_hmm(nights, pseudo_count=1.0)  # add-one: (1+1)/(2+2), (3+1)/(4+2)
    np.testing.assert_allclose(smoothed.transition, [[0.5, 0.5], [2 / 6, 4 / 6]])
    assert smoothed.prior_sleep == pytest.approx(7 / 11)


def test_stickiness_scales_switching_and_round_trip() -> None:
    hmm = SleepWakeHmm(transition=np.array([[0.9, 0.1], [0.05, 0.95]]), initial=np.array([0.7, 0.3]),
                       prior_sleep=0.8)
    sticky = hmm.with_stickiness(2.0)
    np.testing.assert_allclose(sticky.transition, [[0.95, 0.05], [0.025, 0.975]])
    assert SleepWakeHmm.from_dict(json.loads(json.dumps(hmm.to_dict()))).to_dict() == hmm.to_dict()
    with pytest.raises(InvalidHmmError, match="stickiness"):
        hmm.with_stickiness(0.05)
    with pytest.raises(InvalidHmmError, match="missing initial"):
        SleepWakeHmm.from_dict({"transition": [[0.5, 0.5], [0.5, 0.5]], "prior_sleep": 0.5})
    with pytest.raises(InvalidHmmError, match="labels must be 0, 1 or NaN"):
        fit_sleep_wake_hmm([np.array([0, 2.0])])
