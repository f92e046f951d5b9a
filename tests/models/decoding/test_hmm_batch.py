"""Side-by-side HMM passes against the one-case functions (themselves checked against enumeration of every
path in test_hmm.py): the same numbers, bit for bit, for nights of different lengths and chains."""

from __future__ import annotations

import numpy as np
import pytest

import models.decoding._hmm_batch as hmm_batch
from models.decoding._hmm_batch import batch_marginals, batch_sample_paths, batch_viterbi
from models.decoding.hmm import InvalidHmmError, forward_backward, sample_paths, viterbi


def _cases(seed: int, n_cases: int) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    rng = np.random.default_rng(seed)
    cases = []
    for _ in range(n_cases):
        n = int(rng.choice([0, 1, 2, int(rng.integers(3, 1200))], p=[0.05, 0.1, 0.1, 0.75]))
        stay = rng.uniform(0.55, 0.999, 2)
        a = np.array([[stay[0], 1 - stay[0]], [1 - stay[1], stay[1]]])
        e = rng.uniform(0.01, 3.0, (n, 2)) ** rng.uniform(0.25, 2.0)
        if n > 4:
            e[rng.integers(0, n, n // 5)] = 1.0  # unscored epochs
            e[rng.integers(0, n, 3), 0] = 0.0  # a state ruled out at a few epochs (log -inf in Viterbi)
        cases.append((e, a, rng.dirichlet([2, 2])))
    return cases


@pytest.mark.parametrize("seed, n_cases, block", [(0, 1, 512), (1, 40, 512), (2, 37, 8)])
def test_batch_passes_equal_the_one_case_passes(seed: int, n_cases: int, block: int,
                                                monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(hmm_batch, "BLOCK_CASES", block)  # several blocks, and a last short one
    cases = _cases(seed, n_cases)
    marginals, paths = batch_marginals(cases), batch_viterbi(cases)
    assert len(marginals) == len(paths) == n_cases
    for case, m, path in zip(cases, marginals, paths, strict=True):
        expected = forward_backward(*case)[0][:, 1] if case[0].shape[0] else np.zeros(0)
        assert m.dtype == np.float64 and np.array_equal(m, expected)
        assert path.dtype == np.int8 and np.array_equal(path, viterbi(*case))


def test_impossible_observations_are_reported() -> None:
    e = np.array([[1.0, 1.0], [0.0, 1.0], [1.0, 1.0]])
    a = np.array([[1.0, 0.0], [0.0, 1.0]])  # stuck in wake: epoch 1 (sleep only) is impossible
    with pytest.raises(InvalidHmmError, match="epoch 1"):
        batch_marginals([_cases(3, 1)[0], (e, a, np.array([1.0, 0.0]))])
    with pytest.raises(InvalidHmmError, match="epoch 1"):
        forward_backward(e, a, np.array([1.0, 0.0]))  # the one-case pass says the same


@pytest.mark.parametrize("seed, n_cases, n_paths, lanes", [(4, 1, 1, 4096), (5, 30, 50, 4096), (6, 23, 7, 20)])
def test_batch_sampling_equals_one_case_sampling(seed: int, n_cases: int, n_paths: int, lanes: int,
                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(hmm_batch, "BLOCK_LANES", lanes)
    cases = _cases(seed, n_cases)
    seeds = [seed * 100 + k for k in range(n_cases)]
    drawn = batch_sample_paths(cases, n_paths=n_paths, seeds=seeds)
    for case, s, paths in zip(cases, seeds, drawn, strict=True):
        expected = sample_paths(*case, n_paths=n_paths, rng=np.random.default_rng(s))
        assert paths.dtype == np.int8 and paths.flags.c_contiguous and np.array_equal(paths, expected)
