"""Sample, permutation and spectral entropy of every window against antropy 0.2.3.

antropy takes ~20 s to import (numba compiles eagerly), so it is imported once per module.
"""

from __future__ import annotations

import itertools
import math
import warnings

import numpy as np
import pytest

from models.features.entropies import permutation_entropy, sample_entropy, spectral_entropy
from models.features.windows import CentredWindows

X30 = np.array([0, 0, 3, 12, 0, 0, 0, 45, 80, 2, 0, 0, 0, 0, 7, 0, 0, 1, 0, 0, 150, 90, 10, 0, 0, 0, 0, 0, 0, 4],
               dtype=float)  # feature-references.md §2


def _x181() -> np.ndarray:
    rng = np.random.default_rng(7)  # feature-references.md §2
    x = rng.poisson(3, 181).astype(float)
    x[::10] *= 20
    return x


def _log_counts(n: int, seed: int) -> np.ndarray:
    """log1p of sleep-like counts: long zero runs (ties), small counts, bursts."""
    rng = np.random.default_rng(seed)
    x = rng.poisson(2, n) * (rng.random(n) < 0.3) + rng.poisson(90, n) * (rng.random(n) < 0.04)
    x[n // 3:n // 3 + 40] = 0  # an all-zero stretch
    return np.log1p(x.astype(float))


@pytest.fixture(scope="module")
def ant():
    import antropy  # reference library, test-only (antropy 0.2.3)

    return antropy


def _windows(x: np.ndarray, h: int):
    for i in range(x.size):
        yield i, x[max(0, i - h):i + h + 1]


# ---- sample entropy ----------------------------------------------------------------------

@pytest.mark.parametrize(("x", "expected"), [(X30, 0.4811769298), (_x181(), 0.3466975942)])
def test_sample_entropy_check_values(x, expected):
    # feature-references.md §2: ant.sample_entropy(x) with r = 0.2 * SD(ddof=0)
    got = sample_entropy(x, (x.size,), tolerance=0.2 * np.std(x))[0, 0]
    assert got == pytest.approx(expected, rel=1e-9)


def test_sample_entropy_match_is_strictly_below_tolerance():
    # feature-references.md §2: x181 with a whole-number r = 2: strict "<" gives 1.100987023,
    # "<=" would give 0.6494616128 (antropy numba path and nolds both use strict "<")
    x = _x181()
    assert sample_entropy(x, (x.size,), tolerance=2.0)[0, 0] == pytest.approx(1.100987023, rel=1e-9)


@pytest.mark.parametrize("h", [10, 30])
def test_sample_entropy_equals_antropy_on_every_window(ant, h):
    x = _log_counts(160, h)
    got = sample_entropy(x, (h,), tolerance=0.2)[:, 0]
    for i, w in _windows(x, h):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # antropy warns for B = 0 / A = 0
            ref = ant.sample_entropy(w, order=2, tolerance=0.2)
        if np.isinf(ref):  # A = 0: capped at ln(T(T-1)/2) with T = N - m templates
            t = w.size - 2
            ref = math.log(t * (t - 1) / 2)
        np.testing.assert_allclose(got[i], ref, rtol=1e-12, err_msg=f"epoch {i}")


def test_sample_entropy_several_sizes_in_one_call(ant):
    x = _log_counts(120, 5)
    both = sample_entropy(x, (10, 30), tolerance=0.3)
    np.testing.assert_array_equal(both[:, 0], sample_entropy(x, (10,), tolerance=0.3)[:, 0])
    np.testing.assert_array_equal(both[:, 1], sample_entropy(x, (30,), tolerance=0.3)[:, 0])


def _sampen_brute_force(w: np.ndarray, m: int, r: float) -> float:
    """Richman & Moorman counting over the first N - m templates, skipping templates with NaN."""
    n = w.size
    starts = [i for i in range(n - m) if not np.isnan(w[i:i + m + 1]).any()]
    b = a = 0
    for i, j in itertools.combinations(starts, 2):
        if np.max(np.abs(w[i:i + m] - w[j:j + m])) < r:
            b += 1
            a += abs(w[i + m] - w[j + m]) < r
    if b == 0:
        return np.nan
    return math.log(b / a) if a else math.log(len(starts) * (len(starts) - 1) / 2)


def test_sample_entropy_skips_templates_with_missing_epochs():
    x = _log_counts(90, 11)
    x[[20, 21, 50, 70]] = np.nan
    got = sample_entropy(x, (12,), tolerance=0.25)[:, 0]
    for i, w in _windows(x, 12):
        np.testing.assert_allclose(got[i], _sampen_brute_force(w, 2, 0.25), rtol=1e-12, err_msg=f"epoch {i}")


@pytest.mark.filterwarnings("error")
def test_sample_entropy_still_window_is_zero():
    # all templates match (distance 0 < r): A = B, SampEn = 0 (antropy gives 0 too with a fixed r)
    got = sample_entropy(np.zeros(60), (10, 20), tolerance=0.2)
    assert np.all(got == 0.0)


# ---- permutation entropy -----------------------------------------------------------------

@pytest.mark.parametrize(("x", "order", "expected"), [
    # feature-references.md §2: ant.perm_entropy(x, order, 1, normalize=True)
    (X30, 3, 0.7306428649), (X30, 4, 0.6551024946), (X30, 5, 0.5713457774),
    (_x181(), 3, 0.9850006631), (_x181(), 4, 0.974227734), (_x181(), 5, 0.9247039218),
])
def test_permutation_entropy_check_values(x, order, expected):
    assert permutation_entropy(x, (x.size,), order=order)[0, 0] == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize(("h", "order"), [(10, 3), (30, 3), (30, 4)])
def test_permutation_entropy_equals_antropy_on_every_window(ant, h, order):
    x = _log_counts(150, h + order)  # many ties: zero runs rank earlier positions lower
    got = permutation_entropy(x, (h,), order=order)[:, 0]
    for i, w in _windows(x, h):
        ref = ant.perm_entropy(w, order=order, delay=1, normalize=True)
        np.testing.assert_allclose(got[i], ref, rtol=1e-12, atol=1e-15, err_msg=f"epoch {i}")


def test_permutation_entropy_skips_patterns_with_missing_epochs(ant):
    x = _log_counts(80, 3)
    x[40] = np.nan
    got = permutation_entropy(x, (x.size,), order=3)[0, 0]
    # reference: patterns of both NaN-free stretches, counted together (antropy's tie rule)
    pats = [tuple(np.argsort(x[t:t + 3], kind="stable")) for t in range(78) if not np.isnan(x[t:t + 3]).any()]
    p = np.array(list({k: pats.count(k) for k in set(pats)}.values())) / len(pats)
    assert got == pytest.approx(-(p * np.log2(p)).sum() / np.log2(6), rel=1e-12)


@pytest.mark.filterwarnings("error")
def test_permutation_entropy_still_window_is_zero(ant):
    assert np.all(permutation_entropy(np.zeros(50), (10,))[:, 0] == 0.0)
    assert ant.perm_entropy(np.zeros(21), normalize=True) == 0.0  # antropy: all "increasing"


# ---- spectral entropy --------------------------------------------------------------------

@pytest.mark.parametrize(("x", "expected"), [(X30, 0.8103837102), (_x181(), 0.6585540863)])
def test_spectral_entropy_check_values(x, expected):
    # feature-references.md §2: ant.spectral_entropy(x, sf=1, normalize=True) (= tsf.entropy)
    assert spectral_entropy(CentredWindows(x, x.size))[0] == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize("h", [10, 30, 45])
def test_spectral_entropy_equals_antropy_on_every_window(ant, h):
    # full windows (odd length) and truncated ones (odd and even lengths, Nyquist bin not doubled)
    x = _log_counts(170, h)
    got = spectral_entropy(CentredWindows(x, h))
    for i, w in _windows(x, h):
        if w.min() == w.max():
            assert got[i] == 0.0
            continue
        ref = ant.spectral_entropy(w, sf=1, method="fft", normalize=True)
        np.testing.assert_allclose(got[i], ref, rtol=1e-9, atol=1e-12, err_msg=f"epoch {i}")


def test_spectral_entropy_fills_missing_epochs_with_the_window_mean(ant):
    x = _log_counts(61, 8)
    x[[10, 33]] = np.nan
    got = spectral_entropy(CentredWindows(x, 30))[30]
    filled = np.where(np.isnan(x), np.nanmean(x), x)
    assert got == pytest.approx(ant.spectral_entropy(filled, sf=1, normalize=True), rel=1e-9)


@pytest.mark.filterwarnings("error")
def test_spectral_entropy_still_window_is_zero():
    got = spectral_entropy(CentredWindows(np.full(80, np.log1p(3.0)), 30))
    assert np.all(got == 0.0)
