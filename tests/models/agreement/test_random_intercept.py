"""The closed-form REML random-intercept line against statsmodels 0.15 ``MixedLM`` (REML).

Source of every check value: statsmodels ``MixedLM(y, [1, x], groups).fit(reml=True)``. Its default
gradient optimisers (BFGS, then L-BFGS, then CG) sometimes stop short of the maximum on differences of
sleep parameters (a ``ConvergenceWarning``, or a retry that ends early), so the reference here is the
same statsmodels model maximised by its derivative-free Powell search, started from its own default;
the tolerance (relative 1e-5) is that search's precision on these data (seen: <= 3e-6). Data are
seeded simulations (invented).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import statsmodels.api as sm

from models.agreement._bias_regression import MIXED_MODEL, bias_regressions
from models.agreement._random_intercept import random_intercept_line

#: (seed, participants, nights range, between SD, within SD, slope)
CASES = [(0, 25, (8, 14), 4.0, 12.0, 0.05), (2, 25, (8, 14), 4.0, 12.0, 0.05), (6, 25, (8, 14), 4.0, 12.0, 0.05),
         (7, 12, (2, 6), 10.0, 5.0, -0.2), (8, 40, (1, 4), 6.0, 6.0, 0.0), (9, 6, (5, 5), 3.0, 9.0, 0.3)]


def _data(seed: int, k: int, nights: tuple[int, int], between: float, within: float, slope: float):
    rng = np.random.default_rng(seed)
    ids = np.repeat(np.arange(k), rng.integers(nights[0], nights[1] + 1, k))
    reference = rng.uniform(20, 120, ids.size)
    d = 3 + slope * (reference - 60) + rng.normal(0, between, k)[ids] + rng.normal(0, within, ids.size)
    return d, reference + d / 2, ids


def _statsmodels(d, a, ids, **options):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return sm.MixedLM(d, sm.add_constant(a), groups=ids).fit(reml=True, **options)


@pytest.mark.parametrize("case", CASES)
def test_matches_statsmodels_mixedlm_at_the_reml_maximum(case):
    d, a, ids = _data(*case)
    ours = random_intercept_line(d, a, ids, 0.05)
    fit = _statsmodels(d, a, ids, method=["powell"], maxiter=20000)
    assert fit.converged and ours["converged"]
    assert ours["intercept"] == pytest.approx(fit.fe_params[0], rel=1e-5, abs=1e-9)
    assert ours["slope"] == pytest.approx(fit.fe_params[1], rel=1e-5, abs=1e-9)
    low, high = fit.conf_int(alpha=0.05)[1]
    assert ours["slope_ci"] == pytest.approx((low, high), rel=1e-5, abs=1e-9)
    assert ours["p_value"] == pytest.approx(fit.pvalues[1], rel=1e-4, abs=1e-9)
    assert ours["scale"] == pytest.approx(fit.scale, rel=1e-5)
    assert ours["variance_ratio"] == pytest.approx(float(np.asarray(fit.cov_re)[0, 0]) / fit.scale, rel=1e-4,
                                                   abs=1e-7)


@pytest.mark.parametrize("case", CASES)
def test_statsmodels_started_at_this_estimate_stays_there_and_its_default_fit_is_no_more_likely(case):
    d, a, ids = _data(*case)
    ours = random_intercept_line(d, a, ids, 0.05)
    started = _statsmodels(d, a, ids, start_params=np.array([np.sqrt(ours["variance_ratio"])]))
    assert started.converged
    assert (ours["slope"], *ours["slope_ci"], ours["p_value"]) == pytest.approx(
        (started.fe_params[1], *started.conf_int(alpha=0.05)[1], started.pvalues[1]), rel=1e-7, abs=1e-12)
    default = _statsmodels(d, a, ids)
    assert started.llf >= default.llf - 1e-8  # the REML log-likelihood statsmodels itself reports


def test_no_between_group_variance_gives_the_least_squares_line():
    # differences whose group means are all equal: the REML variance ratio is 0 and the line is least
    # squares (numpy.polyfit as the check)
    rng = np.random.default_rng(4)
    ids = np.repeat(np.arange(10), 4)
    a = rng.uniform(0, 100, ids.size)
    d = 0.1 * a + rng.normal(0, 3, ids.size)
    d -= np.bincount(ids, weights=d)[ids] / 4 - d.mean()
    ours = random_intercept_line(d, a, ids, 0.05)
    assert ours["variance_ratio"] == 0.0 and ours["converged"]
    slope, intercept = np.polyfit(a, d, 1)
    assert (ours["slope"], ours["intercept"]) == pytest.approx((slope, intercept), rel=1e-9)


def test_a_difference_that_is_a_line_in_the_magnitude_is_refused_as_singular():
    ids = np.repeat(np.arange(5), 2)
    a = np.arange(10.0)
    with pytest.raises(np.linalg.LinAlgError):
        random_intercept_line(2.0 - 0.5 * a, a, ids, 0.05)
    proportional, limits = bias_regressions(2.0 - 0.5 * a, a, ids, ci_level=0.95, loa_z=1.96, against="mean")
    assert proportional["model"].startswith("not estimated (model fit failed") and limits is None


def test_bias_regression_uses_the_random_intercept_fit():
    d, a, ids = _data(*CASES[0])
    proportional, _ = bias_regressions(d, a, ids, ci_level=0.95, loa_z=1.96, against="mean")
    fit = _statsmodels(d, a, ids, method=["powell"], maxiter=20000)
    assert proportional["model"] == MIXED_MODEL and proportional["converged"]
    assert proportional["slope"] == pytest.approx(fit.fe_params[1], rel=1e-5)
