"""The study's parameter agreement entries: Bland-Altman, ICC(A,1) and TOST of each method.

References: statsmodels ``ttost_paired`` on participant means (Schuirmann 1987) and statsmodels
``anova_lm`` two-way mean squares put into the ICC(A,1) formula of McGraw & Wong 1996.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from statsmodels.stats.weightstats import ttost_paired

from models import InvalidAgreementInputError, StudyProtocol, parameter_agreement


def _table(seed=0):
    rng = np.random.default_rng(seed)
    rows = []
    for p in range(8):
        offset = rng.normal(0, 10)
        for n in range(1 + p % 3):
            ref = {"tst_min": rng.uniform(300, 450), "spt_min": rng.uniform(350, 480)}
            rows.append({"participant_id": f"p{p}", "night_id": f"n{n}", "method": "reference"} | ref)
            rows.append({"participant_id": f"p{p}", "night_id": f"n{n}", "method": "rule"}
                        | {k: v + 12 + offset + rng.normal(0, 8) for k, v in ref.items()})
    return pd.DataFrame(rows)


def test_each_entry_holds_bland_altman_icc_and_equivalence():
    frame = _table()
    proto = StudyProtocol(bootstrap_resamples=300, equivalence_margins={"tst_min": 25.0})
    out = parameter_agreement(frame, parameter_names=("tst_min", "spt_min"), protocol=proto)
    assert [(e["method"], e["parameter"]) for e in out] == [("rule", "tst_min"), ("rule", "spt_min")]
    json.dumps(out, allow_nan=False)
    tst = out[0]
    ref = frame[frame.method == "reference"].set_index(["participant_id", "night_id"])
    own = frame[frame.method == "rule"].set_index(["participant_id", "night_id"]).reindex(ref.index)
    # TOST on participant means against the protocol's margin
    means = pd.DataFrame({"m": own["tst_min"], "r": ref["tst_min"]}).groupby(level=0).mean()
    p_value, _, _ = ttost_paired(means["m"].to_numpy(), means["r"].to_numpy(), -25.0, 25.0)
    assert tst["equivalence"]["p_value"] == pytest.approx(p_value) and tst["equivalence"]["n_participants"] == 8
    # ICC(A,1) over nights from statsmodels' two-way ANOVA mean squares
    long = pd.DataFrame({"y": np.concatenate([own["tst_min"], ref["tst_min"]]),
                         "night": np.tile(np.arange(len(ref)), 2), "rater": np.repeat([0, 1], len(ref))})
    ms = sm.stats.anova_lm(smf.ols("y ~ C(night) + C(rater)", data=long).fit())["mean_sq"]
    n, k = len(ref), 2
    msr, msc, mse = ms["C(night)"], ms["C(rater)"], ms["Residual"]
    assert tst["icc"]["icc"] == pytest.approx((msr - mse) / (msr + (k - 1) * mse + k * (msc - mse) / n))
    assert tst["icc"]["targets"] == "nights" and tst["n_nights"] == len(ref)
    assert out[1]["equivalence"] is None  # no margin for SPT


def test_missing_columns_are_named():
    with pytest.raises(InvalidAgreementInputError, match="tst_min"):
        parameter_agreement(_table().drop(columns="tst_min"), parameter_names=("tst_min",))
