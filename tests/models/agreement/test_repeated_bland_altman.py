"""Repeated-measures Bland-Altman against a hand computation, statsmodels and a seeded simulation.

Sources: Bland & Altman 2007 (J Biopharm Stat 17:571-582), true value varying: one-way ANOVA of
the differences by participant, sd_between^2 = (MS_between - MS_within) / D with
D = (n^2 - sum m_i^2) / ((k - 1) n), limits bias -/+ 1.96 sqrt(sd_between^2 + sd_within^2);
Bland & Altman 1999 (Stat Methods Med Res 8:135-160) regression method, limits
b0 + b1 A -/+ 1.96 sqrt(pi/2) (c0 + c1 A) (from memory); statsmodels 0.15 (anova_lm, MixedLM,
OLS, mean_diff_plot) as the reference library.
"""

from __future__ import annotations

import json
import math

import matplotlib
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from statsmodels.graphics.agreement import mean_diff_plot

from models import (
    InvalidAgreementInputError,
    InvalidProtocolError,
    StudyProtocol,
    bland_altman,
    repeated_bland_altman,
    repeated_bland_altman_table,
    repeated_limits_of_agreement,
)

matplotlib.use("Agg")

CONTRACT_KEYS = {"method", "parameter", "n_participants", "n_nights", "bias", "bias_ci", "loa_lower", "loa_upper",
                 "loa_lower_ci", "loa_upper_ci", "proportional_bias", "protocol"}


def test_limits_match_a_hand_computation_of_the_anova_formulas():
    # participant A: d = 1, 3; B: d = 2, 4, 6; C: d = 0  (k = 3, n = 6, m = 2, 3, 1)
    d = [1.0, 3.0, 2.0, 4.0, 6.0, 0.0]
    ids = ["A", "A", "B", "B", "B", "C"]
    # by hand: grand mean 16/6; participant means 2, 4, 0
    # SS_within = (1-2)^2 + (3-2)^2 + (2-4)^2 + 0 + (6-4)^2 + 0 = 10, MS_within = 10 / (6 - 3)
    # SS_between = 2 (2 - 8/3)^2 + 3 (4 - 8/3)^2 + 1 (0 - 8/3)^2 = 40/3, MS_between = 20/3
    # D = (36 - (4 + 9 + 1)) / (2 * 6) = 22/12; sd_between^2 = (20/3 - 10/3) / (22/12) = 20/11
    ms_within, ms_between, divisor = 10.0 / 3.0, 20.0 / 3.0, 22.0 / 12.0
    var_between = (ms_between - ms_within) / divisor
    sd_total = math.sqrt(var_between + ms_within)
    bias = 16.0 / 6.0
    r = repeated_limits_of_agreement(d, ids, n_boot=200)
    assert (r["n_participants"], r["n_nights"]) == (3, 6)
    assert r["bias"] == pytest.approx(bias)
    assert r["sd_within"] == pytest.approx(math.sqrt(ms_within))
    assert r["sd_between"] == pytest.approx(math.sqrt(20.0 / 11.0))
    assert (r["loa_lower"], r["loa_upper"]) == pytest.approx((bias - 1.96 * sd_total, bias + 1.96 * sd_total))
    # the mean squares are those of statsmodels' one-way ANOVA by participant
    frame = pd.DataFrame({"d": d, "p": ids})
    table = sm.stats.anova_lm(smf.ols("d ~ C(p)", data=frame).fit())
    assert table["mean_sq"].iloc[0] == pytest.approx(ms_between)
    assert table["mean_sq"].iloc[1] == pytest.approx(ms_within)


def test_equal_nights_make_the_divisor_the_number_of_nights():
    # with m nights each, D = m (Bland & Altman 2007): sd_between^2 = (MS_b - MS_w) / m
    rng = np.random.default_rng(2)
    ids = np.repeat(np.arange(8), 3)
    d = rng.normal(0, 1, 8)[ids] * 3 + rng.normal(0, 1, ids.size)
    frame = pd.DataFrame({"d": d, "p": ids})
    ms = sm.stats.anova_lm(smf.ols("d ~ C(p)", data=frame).fit())["mean_sq"]
    r = repeated_limits_of_agreement(d, ids, n_boot=200)
    assert r["sd_between"] ** 2 == pytest.approx((ms.iloc[0] - ms.iloc[1]) / 3)


def test_one_night_per_participant_equals_the_classical_analysis_and_mean_diff_plot():
    rng = np.random.default_rng(9)
    reference = rng.normal(400, 40, 30)
    method = reference + 20 + rng.normal(0, 15, 30)
    ids = [f"p{i}" for i in range(30)]
    r = repeated_bland_altman(method, reference, ids, method_name="rule", parameter="tst_min")
    fig = mean_diff_plot(method, reference, sd_limit=1.96)
    lower, mean, upper = sorted(line.get_ydata()[0] for line in fig.axes[0].lines)
    matplotlib.pyplot.close(fig)
    assert r.bias == pytest.approx(mean)
    # statsmodels draws mean -/+ 1.96 np.std(d) (ddof=0); Bland & Altman use ddof=1
    scale = math.sqrt(30 / 29)
    assert (r.loa_lower, r.loa_upper) == pytest.approx((mean + (lower - mean) * scale, mean + (upper - mean) * scale))
    classic = bland_altman(method, reference)
    assert (r.loa_lower, r.loa_upper, r.sd_total) == pytest.approx((classic.loa_lower, classic.loa_upper, classic.sd))
    assert r.sd_within == 0.0 and (r.n_participants, r.n_nights) == (30, 30)
    # one night each: the proportional-bias model is ordinary least squares on the pair mean
    fit = sm.OLS(method - reference, sm.add_constant((method + reference) / 2)).fit()
    assert r.proportional_bias["slope"] == pytest.approx(fit.params[1])
    assert r.proportional_bias["p_value"] == pytest.approx(fit.pvalues[1])
    assert r.proportional_bias["model"].startswith("ordinary least squares")


@pytest.mark.parametrize(("sd_between", "sd_within"), [(8.0, 10.0), (12.0, 4.0), (2.0, 10.0)])
def test_participant_bootstrap_covers_the_true_bias_and_limits(sd_between, sd_within):
    # seeded simulation: 15 participants, 2-5 nights, random participant offset and night noise
    # around a bias of 5; true limits 5 -/+ 1.96 sqrt(sd_between^2 + sd_within^2)
    rng = np.random.default_rng(20261203)
    true_sd = math.sqrt(sd_between**2 + sd_within**2)
    truth = {"bias": 5.0, "loa_lower": 5.0 - 1.96 * true_sd, "loa_upper": 5.0 + 1.96 * true_sd}
    hits = dict.fromkeys(truth, 0)
    replications = 300
    for rep in range(replications):
        nights = rng.integers(2, 6, 15)
        ids = np.repeat(np.arange(15), nights)
        d = 5.0 + rng.normal(0, sd_between, 15)[ids] + rng.normal(0, sd_within, ids.size)
        r = repeated_limits_of_agreement(d, ids, ci_level=0.95, n_boot=1000, seed=rep)
        for name, value in truth.items():
            low, high = r[f"{name}_ci" if name != "bias" else "bias_ci"]
            hits[name] += low <= value <= high
    coverage = {name: hits[name] / replications for name in truth}
    assert min(coverage.values()) >= 0.90, coverage


def test_a_constant_added_to_every_difference_moves_every_figure_by_it():
    # location equivariance of the mean and of the variance components (Bland & Altman 2007)
    rng = np.random.default_rng(6)
    ids = np.repeat(np.arange(9), [1, 2, 3, 4, 2, 3, 1, 2, 5])
    d = rng.normal(0, 1, 9)[ids] * 4 + rng.normal(0, 3, ids.size)
    a = repeated_limits_of_agreement(d, ids, n_boot=500)
    b = repeated_limits_of_agreement(d + 30.0, ids, n_boot=500)
    for name in ("bias", "loa_lower", "loa_upper"):
        assert b[name] == pytest.approx(a[name] + 30.0)
        assert b[f"{name}_ci" if name != "bias" else "bias_ci"] == pytest.approx(
            tuple(v + 30.0 for v in a[f"{name}_ci" if name != "bias" else "bias_ci"]))
    assert (b["sd_within"], b["sd_between"]) == pytest.approx((a["sd_within"], a["sd_between"]))
    # the order of the nights does not matter to the point figures
    order = rng.permutation(ids.size)
    c = repeated_limits_of_agreement(d[order], ids[order], n_boot=500)
    assert (c["bias"], c["loa_lower"], c["loa_upper"]) == pytest.approx((a["bias"], a["loa_lower"], a["loa_upper"]))


def test_bootstrap_is_seeded():
    rng = np.random.default_rng(5)
    ids = np.repeat(np.arange(10), 3)
    d = rng.normal(0, 1, 10)[ids] + rng.normal(0, 1, 30)
    a = repeated_limits_of_agreement(d, ids, seed=1)
    assert a == repeated_limits_of_agreement(d, ids, seed=1)
    assert a["bias_ci"] != repeated_limits_of_agreement(d, ids, seed=2)["bias_ci"]


def _nested(rng, k=20, slope=0.0, spread_slope=0.0):
    nights = rng.integers(2, 5, k)
    ids = np.repeat(np.arange(k), nights)
    reference = rng.uniform(300, 480, ids.size)
    noise = rng.normal(0, 1, ids.size) * (8.0 + spread_slope * (reference - 300))
    method = reference + 10 + slope * (reference - 390) + rng.normal(0, 6, k)[ids] + noise
    return method, reference, ids


def test_proportional_bias_matches_statsmodels_mixedlm_with_a_random_intercept():
    method, reference, ids = _nested(np.random.default_rng(11), slope=0.2)
    r = repeated_bland_altman(method, reference, ids)
    frame = pd.DataFrame({"d": method - reference, "a": (method + reference) / 2, "p": ids})
    fit = smf.mixedlm("d ~ a", frame, groups=frame["p"]).fit(reml=True)
    assert r.proportional_bias["slope"] == pytest.approx(fit.fe_params["a"], rel=1e-6)
    low, high = fit.conf_int(alpha=0.05).loc["a"]
    assert r.proportional_bias["slope_ci"] == pytest.approx((low, high), rel=1e-6)
    assert r.proportional_bias["p_value"] < 0.05 and r.proportional_bias["model"].startswith("random intercept")
    # the true slope of d on the pair mean is 0.2 / (1 + 0.2 / 2) (d = 0.2 (r - 390) + ..., a = r + d / 2)
    assert low <= 0.2 / 1.1 <= high
    limits = r.regression_limits
    assert limits is not None and "proportional_bias" in limits["reasons"]
    assert limits["multiplier"] == pytest.approx(1.96 * math.sqrt(math.pi / 2))  # 2.46, Bland & Altman 1999


def test_without_between_participant_variance_the_slope_is_least_squares_with_clustered_errors():
    rng = np.random.default_rng(18)
    ids = np.repeat(np.arange(12), 3)
    reference = rng.uniform(300, 480, ids.size)
    d = 0.1 * (reference - 390) + rng.normal(0, 5, ids.size)
    d -= (pd.Series(d).groupby(ids).transform("mean").to_numpy() - d.mean())  # equal participant means
    r = repeated_bland_altman(reference + d, reference, ids, against="reference")
    assert r.sd_between == 0.0
    fit = sm.OLS(d, sm.add_constant(reference)).fit(cov_type="cluster", cov_kwds={"groups": ids})
    assert (r.proportional_bias["slope"], r.proportional_bias["p_value"]) == pytest.approx(
        (fit.params[1], fit.pvalues[1]))
    assert r.proportional_bias["model"] == "ordinary least squares, participant-clustered standard errors"


def test_against_reference_regresses_on_the_reference_value():
    method, reference, ids = _nested(np.random.default_rng(12), slope=0.2)
    r = repeated_bland_altman(method, reference, ids, against="reference")
    frame = pd.DataFrame({"d": method - reference, "a": reference, "p": ids})
    fit = smf.mixedlm("d ~ a", frame, groups=frame["p"]).fit(reml=True)
    assert r.proportional_bias["slope"] == pytest.approx(fit.fe_params["a"], rel=1e-6)
    assert r.against == "reference" and r.proportional_bias["against"] == "reference"
    assert low_le(r.proportional_bias["slope_ci"], 0.2)


def low_le(interval, value):
    return interval[0] <= value <= interval[1]


def test_uniform_differences_have_no_regression_limits():
    method, reference, ids = _nested(np.random.default_rng(13))
    r = repeated_bland_altman(method, reference, ids)
    assert r.proportional_bias["p_value"] > 0.05 and r.regression_limits is None


def test_regression_limits_follow_a_spread_that_grows_with_magnitude():
    method, reference, ids = _nested(np.random.default_rng(14), k=40, spread_slope=0.25)
    r = repeated_bland_altman(method, reference, ids)
    limits = r.regression_limits
    assert limits is not None and "non_constant_spread" in limits["reasons"]
    assert limits["abs_residual_slope"] > 0
    a, d = (method + reference) / 2, method - reference
    lower = limits["lower_intercept"] + limits["lower_slope"] * a
    upper = limits["upper_intercept"] + limits["upper_slope"] * a
    inside = np.mean((d >= lower) & (d <= upper))
    assert 0.90 <= inside <= 0.99  # about 95% of the nights between the 95% regression limits
    # the constant limits are too wide at low magnitude and too narrow at high magnitude
    low_half, high_half = a < np.median(a), a >= np.median(a)
    assert np.mean((d[high_half] < r.loa_lower) | (d[high_half] > r.loa_upper)) > \
        np.mean((d[low_half] < r.loa_lower) | (d[low_half] > r.loa_upper))


def test_to_dict_is_json_safe_and_holds_the_contract_keys():
    method, reference, ids = _nested(np.random.default_rng(15))
    method[0] = np.nan  # a night without a value is left out
    protocol = StudyProtocol(ci_level=0.9, bootstrap_resamples=500, seed=3)
    r = repeated_bland_altman(method, reference, ids, method_name="cole-kripke", parameter="tst_min",
                              protocol=protocol)
    out = json.loads(json.dumps(r.to_dict(), allow_nan=False))
    assert CONTRACT_KEYS <= set(out)
    assert out["n_nights"] == ids.size - 1 and out["protocol"] == protocol.to_dict()
    assert out["method"] == "cole-kripke" and len(out["bias_ci"]) == 2
    assert {"slope", "slope_ci", "p_value", "model"} <= set(out["proportional_bias"])


def test_differences_only_give_limits_without_proportional_bias():
    method, reference, ids = _nested(np.random.default_rng(16))
    both = repeated_bland_altman(method, reference, ids)
    only = repeated_bland_altman(method - reference, None, ids)
    assert (only.bias, only.loa_lower, only.loa_upper, only.bias_ci) == (
        both.bias, both.loa_lower, both.loa_upper, both.bias_ci)
    assert math.isnan(only.proportional_bias["slope"]) and only.regression_limits is None
    assert json.dumps(only.to_dict(), allow_nan=False)


def test_a_single_participant_has_a_bias_but_no_limits():
    r = repeated_bland_altman([1.0, 2.0, 4.0], [0.0, 0.0, 0.0], ["a", "a", "a"])
    assert r.bias == pytest.approx(7 / 3) and math.isnan(r.loa_lower) and math.isnan(r.bias_ci[0])
    json.dumps(r.to_dict(), allow_nan=False)


def test_two_participants_have_limits_but_no_bootstrap_intervals():
    # a bootstrap of 2 participants has only 3 distinct resamples: no interval is reported
    r = repeated_bland_altman([1.0, 2.0, 3.0, 5.0], [1.0, 2.0, 3.0, 4.0], ["a", "a", "b", "b"])
    assert math.isfinite(r.loa_lower) and math.isnan(r.bias_ci[0]) and math.isnan(r.loa_upper_ci[1])


def test_bad_inputs_are_refused_with_their_reason():
    with pytest.raises(InvalidAgreementInputError, match="same length"):
        repeated_bland_altman([1.0, 2.0], [1.0], ["a", "b"])
    with pytest.raises(InvalidAgreementInputError, match="participant_ids"):
        repeated_bland_altman([1.0, 2.0], [1.0, 3.0], ["a"])
    with pytest.raises(InvalidAgreementInputError, match="missing"):
        repeated_bland_altman([1.0, 2.0], [1.0, 3.0], ["a", None])
    with pytest.raises(InvalidAgreementInputError, match="against"):
        repeated_bland_altman([1.0, 2.0], [1.0, 3.0], ["a", "b"], against="median")
    with pytest.raises(InvalidProtocolError) as info:
        repeated_bland_altman([1.0, 2.0], [1.0, 3.0], ["a", "b"], n_boot=5)
    assert info.value.problems[0].location == {"field": "bootstrap_resamples"}


def test_table_compares_every_method_and_parameter_on_matched_nights():
    rng = np.random.default_rng(17)
    rows = []
    for p in range(6):
        for n in range(3):
            ref = {"tst_min": rng.uniform(300, 450), "waso_min": rng.uniform(10, 90)}
            rows.append({"participant_id": f"p{p}", "night_id": f"n{n}", "method": "reference"} | ref)
            for name, shift in (("rule-a", 15.0), ("rule-b", -5.0)):
                rows.append({"participant_id": f"p{p}", "night_id": f"n{n}", "method": name}
                            | {k: v + shift + rng.normal(0, 5) for k, v in ref.items()})
    frame = pd.DataFrame(rows).sample(frac=1.0, random_state=0)  # row order must not matter
    out = repeated_bland_altman_table(frame, parameter_names=("tst_min", "waso_min"))
    assert [(r.method, r.parameter) for r in out] == [
        (m, p) for m in dict.fromkeys(frame["method"]) if m != "reference" for p in ("tst_min", "waso_min")]
    first = out[0]
    ref = frame[frame["method"] == "reference"].set_index(["participant_id", "night_id"])
    own = frame[frame["method"] == first.method].set_index(["participant_id", "night_id"]).reindex(ref.index)
    direct = repeated_bland_altman(own[first.parameter], ref[first.parameter],
                                   ref.index.get_level_values(0).to_numpy())
    assert (first.bias, first.loa_lower, first.n_participants, first.n_nights) == pytest.approx(
        (direct.bias, direct.loa_lower, 6, 18))
    with pytest.raises(InvalidAgreementInputError, match="columns"):
        repeated_bland_altman_table(frame.drop(columns="night_id"))


def test_study_protocol_flows_from_night_comparisons_to_the_repeated_analysis():
    # nights compared with a protocol (WASO to the final awakening) give parameter tables whose
    # repeated-measures analysis matches the per-night differences of the comparison
    from models import compare_night, comparison_tables, score_with_rule, sleep_parameters

    rng = np.random.default_rng(21)
    proto = StudyProtocol(waso_end="final_awakening", bootstrap_resamples=300)
    nights, references = [], []
    for p in range(5):
        for j in range(2):
            reference = (rng.random(480) > 0.15).astype(np.float64)
            reference[-11] = 1.0
            reference[-10:] = 0.0  # 5 min awake before lights-on
            references.append(reference)
            counts = np.where(reference == 1, rng.poisson(20, 480), rng.poisson(250, 480)).astype(np.float64)
            rule = score_with_rule(counts, 30, "cole-kripke")
            nights.append(compare_night(reference, {"cole-kripke": (rule.sleep, rule.score)}, epoch_seconds=30,
                                        parameter_options={"protocol": proto}, participant_id=f"p{p}",
                                        night_id=f"n{j}"))
    tables = comparison_tables(nights)
    out = {(r.method, r.parameter): r for r in repeated_bland_altman_table(tables.parameters, protocol=proto)}
    waso = out[("cole-kripke", "waso_min")]
    errors = tables.parameter_errors["waso_min_error"].to_numpy()
    assert waso.bias == pytest.approx(errors.mean()) and waso.n_nights == 10 and waso.n_participants == 5
    assert waso.protocol["waso_end"] == "final_awakening"
    # the protocol's WASO leaves out the 10 wake epochs after the last sleep epoch (5 min)
    assert nights[0].reference_parameters.waso_min == pytest.approx(
        sleep_parameters(references[0], 30).waso_min - 5.0)


def test_few_participants_give_bounded_intervals():
    # With 3 participants a resample that repeats one participant has a jackknife SE that is zero up to
    # rounding; its studentized value must not stretch the interval without bound. A bootstrap interval
    # lies within the range the data could produce: here every interval stays within 10 SDs of the data
    # (a generous bound, common practice for a sanity check).
    for seed in range(20):
        rng = np.random.default_rng(seed)
        ids = np.repeat(["a", "b", "c"], 3)
        d = rng.normal(0, 5, 9) + np.repeat(rng.normal(0, 3, 3), 3)
        r = repeated_limits_of_agreement(d, ids)
        bound = abs(d).max() + 10 * d.std(ddof=1)
        for key in ("bias_ci", "loa_lower_ci", "loa_upper_ci"):
            low, high = r[key]
            assert -bound <= low <= high <= bound, (seed, key, r[key])
