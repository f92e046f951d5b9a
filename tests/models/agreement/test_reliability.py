"""ICC(A,1) against the Shrout & Fleiss 1979 worked example and the McGraw & Wong 1996 formulas.

Shrout & Fleiss 1979 (Psychol Bull 86:420-428) Table 2: 6 targets rated by 4 judges; their
Table 4 gives ICC(2,1) = 0.29 (the McGraw & Wong ICC(A,1)), with F = 11.03 on (5, 15) degrees
of freedom. The 95% interval 0.019 to 0.76 is the one R's psych::ICC prints for these data
(from memory). pingouin is not installed, so it is not used.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from models import InvalidAgreementInputError, icc_a1

SHROUT_FLEISS = [[9, 2, 5, 8], [6, 1, 3, 2], [8, 4, 6, 8], [7, 1, 2, 6], [10, 5, 6, 9], [6, 2, 4, 7]]


def test_shrout_fleiss_worked_example():
    r = icc_a1(SHROUT_FLEISS)
    assert round(r.icc, 2) == 0.29  # Shrout & Fleiss 1979, Table 4, ICC(2,1)
    assert round(r.f_value, 2) == 11.03 and (r.n_targets, r.n_raters) == (6, 4)
    assert r.p_value == pytest.approx(stats.f.sf(r.f_value, 5, 15))
    assert r.ci == pytest.approx((0.019, 0.76), abs=0.006)  # psych::ICC, from memory
    # mean squares of the two-way ANOVA (Shrout & Fleiss 1979 Table 3; by hand: target sums
    # 24, 12, 26, 16, 30, 19 give BMS = (2913/4 - 127^2/24) / 5 = 11.24; judge sums 46, 15, 26, 40
    # give JMS = (4617/6 - 127^2/24) / 3 = 32.49)
    assert (r.ms_rows, r.ms_columns, r.ms_error) == pytest.approx((11.24, 32.49, 1.02), abs=0.01)


def test_a_constant_offset_lowers_absolute_agreement_but_not_correlation():
    rng = np.random.default_rng(1)
    truth = rng.normal(400, 40, 30)
    method = truth + rng.normal(0, 10, 30)
    same = icc_a1(np.column_stack([method, truth]))
    shifted = icc_a1(np.column_stack([method + 40, truth]))
    assert stats.pearsonr(method + 40, truth)[0] == pytest.approx(stats.pearsonr(method, truth)[0])
    assert shifted.icc < same.icc - 0.2
    assert same.ci[0] < same.icc < same.ci[1]


def test_icc_interval_covers_the_true_value_in_a_seeded_simulation():
    # two random raters: target SD 2, rater SD 0.5, error SD 1 -> ICC(A,1) = 4 / (4 + 0.25 + 1)
    # (McGraw & Wong 1996, case 2A: sigma_targets^2 / (sigma_targets^2 + sigma_raters^2 + sigma_error^2))
    rng = np.random.default_rng(3)
    hits, reps = 0, 300
    for _ in range(reps):
        targets = rng.normal(0, 2, 25)
        raters = rng.normal(0, 0.5, 2)
        ratings = targets[:, None] + raters[None, :] + rng.normal(0, 1, (25, 2))
        true = 4.0 / (4.0 + 0.25 + 1.0)
        r = icc_a1(ratings)
        hits += r.ci[0] <= true <= r.ci[1]
    assert hits / reps >= 0.90


def test_incomplete_rows_are_dropped_and_degenerate_input_is_nan():
    data = np.array(SHROUT_FLEISS, dtype=float)
    with_gap = np.vstack([data, [np.nan, 1, 2, 3]])
    assert icc_a1(with_gap).icc == pytest.approx(icc_a1(data).icc)
    assert math.isnan(icc_a1([[1, 2]]).icc)
    assert math.isnan(icc_a1([[3, 3], [3, 3], [3, 3]]).icc)  # no variation at all
    json.dumps(icc_a1([[3, 3], [3, 3]]).to_dict(), allow_nan=False)
    with pytest.raises(InvalidAgreementInputError, match="n_raters"):
        icc_a1([1, 2, 3])
    with pytest.raises(InvalidAgreementInputError, match="ci_level"):
        icc_a1(SHROUT_FLEISS, ci_level=95)
