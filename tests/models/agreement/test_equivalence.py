"""Paired equivalence tests (TOST, Schuirmann 1987) against statsmodels ``ttost_paired``."""

from __future__ import annotations

import json

import numpy as np
import pytest
from statsmodels.stats.weightstats import ttost_paired

from models import DEFAULT_PROTOCOL, InvalidAgreementInputError, StudyProtocol, parameter_equivalence, tost_paired


@pytest.mark.parametrize(("shift", "margin"), [(2.0, 15.0), (12.0, 15.0), (-20.0, 15.0), (3.0, (-5.0, 20.0))])
def test_tost_matches_statsmodels(shift, margin):
    rng = np.random.default_rng(4)
    reference = rng.normal(400, 40, 20)
    method = reference + shift + rng.normal(0, 12, 20)
    low, high = (-margin, margin) if not isinstance(margin, tuple) else margin
    p_value, (t1, p1, df1), (t2, p2, df2) = ttost_paired(method, reference, low, high)
    r = tost_paired(method, reference, margin=margin)
    assert r["p_value"] == pytest.approx(p_value)
    assert (r["t_lower"], r["p_lower"], r["t_upper"], r["p_upper"]) == pytest.approx((t1, p1, t2, p2))
    assert r["df"] == df1 == df2
    assert r["equivalent"] == (p_value < 0.05)
    # equivalent exactly when the 90% interval lies inside the margin (Schuirmann 1987)
    assert r["equivalent"] == (low < r["ci"][0] and r["ci"][1] < high)


def test_parameter_equivalence_uses_participant_means_and_the_protocol_margin():
    rng = np.random.default_rng(5)
    ids = np.repeat([f"p{i}" for i in range(12)], [1, 2, 3, 4] * 3)
    reference = rng.normal(400, 40, ids.size)
    method = reference + 4 + rng.normal(0, 10, ids.size)
    method[0] = np.nan  # p0's only night has no value: p0 is left out
    proto = StudyProtocol(equivalence_margins={"tst_min": 10.0}, ci_level=0.9)
    r = parameter_equivalence(method, reference, ids, parameter="tst_min", protocol=proto)
    keep = ~np.isnan(method)
    order = list(dict.fromkeys(ids[keep]))
    m = np.array([method[keep][ids[keep] == p].mean() for p in order])
    ref = np.array([reference[keep][ids[keep] == p].mean() for p in order])
    p_value, _, _ = ttost_paired(m, ref, -10.0, 10.0)
    assert r["p_value"] == pytest.approx(p_value)
    assert (r["n_participants"], r["n_nights"], r["margin"], r["alpha"]) == (11, ids.size - 1, 10.0,
                                                                           pytest.approx(0.1))
    json.dumps(r, allow_nan=False)


def test_bad_inputs_are_refused():
    with pytest.raises(InvalidAgreementInputError, match="margin"):
        tost_paired([1.0, 2.0], [1.0, 2.0], margin=(3.0, -3.0))
    with pytest.raises(InvalidAgreementInputError, match="same length"):
        tost_paired([1.0, 2.0], [1.0], margin=1.0)
    with pytest.raises(InvalidAgreementInputError, match="no equivalence margin"):
        parameter_equivalence([1.0], [1.0], ["a"], parameter="spt_min", protocol=DEFAULT_PROTOCOL)
    few = tost_paired([1.0], [2.0], margin=1.0)
    assert few["equivalent"] is False and np.isnan(few["p_value"])
