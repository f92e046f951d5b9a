"""Bland-Altman statistics against a hand-computed example and statsmodels; the rule report.

Bland & Altman 1986 (limits = bias -/+ 1.96 SD) and 1999 (CI of the bias with t(n-1) SD/sqrt(n);
approximate SE of a limit sqrt(3 SD^2 / n); log-ratio analysis back-transformed into ratios).
"""

from __future__ import annotations

import math
import warnings

import matplotlib
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from sklearn.metrics import balanced_accuracy_score
from statsmodels.graphics.agreement import mean_diff_plot

from models.agreement.bland_altman import BLAND_ALTMAN_PARAMETERS, REFERENCE, bland_altman, bland_altman_table
from models.agreement.epoch_metrics import ALWAYS_SLEEP, EPOCH_METRIC_NAMES, epoch_agreement
from models.agreement.rule_comparison import NightRecord, compare_rules_with_reference
from models.scoring.parameters import PARAMETER_NAMES, sleep_parameters
from models.scoring.rescoring import InvalidSleepVectorError
from models.scoring.rules import METHOD_IDS, score_with_rule

matplotlib.use("Agg")


def test_bland_altman_hand_computed_example():
    method, reference = [10.0, 12.0, 15.0, 20.0], [8.0, 13.0, 12.0, 15.0]
    # d = 2, -1, 3, 5: bias 9/4 = 2.25; squared deviations 0.0625 + 10.5625 + 0.5625 + 7.5625 = 18.75
    # SD = sqrt(18.75 / 3) = 2.5; limits 2.25 -/+ 1.96 * 2.5 = -2.65, 7.15
    t3 = 3.182  # t(0.975, 3) from a printed t table
    half_bias = t3 * 2.5 / 2  # t SD / sqrt(n)
    half_limit = t3 * math.sqrt(3 * 2.5**2 / 4)  # t sqrt(3 SD^2 / n)
    r = bland_altman(method, reference)
    assert (r.n, r.bias, r.sd, r.loa_lower, r.loa_upper, r.mae) == pytest.approx((4, 2.25, 2.5, -2.65, 7.15, 2.75))
    got = (r.bias_ci_lower, r.bias_ci_upper, r.loa_lower_ci_lower, r.loa_lower_ci_upper,
           r.loa_upper_ci_lower, r.loa_upper_ci_upper)
    expected = (2.25 - half_bias, 2.25 + half_bias, -2.65 - half_limit, -2.65 + half_limit,
                7.15 - half_limit, 7.15 + half_limit)
    assert got == pytest.approx(expected, abs=2e-3)  # the table's t is rounded to 3 decimals
    # log ratios ln(10/8), ln(12/13), ln(15/12), ln(20/15)
    logs = [math.log(10 / 8), math.log(12 / 13), math.log(15 / 12), math.log(20 / 15)]
    mean_log = sum(logs) / 4
    sd_log = math.sqrt(sum((v - mean_log) ** 2 for v in logs) / 3)
    assert r.n_log == 4
    assert (r.ratio_bias, r.ratio_loa_lower, r.ratio_loa_upper) == pytest.approx(
        (math.exp(mean_log), math.exp(mean_log - 1.96 * sd_log), math.exp(mean_log + 1.96 * sd_log)))


def test_bland_altman_matches_statsmodels_mean_diff_plot():
    rng = np.random.default_rng(9)
    reference = rng.normal(400, 40, 30)
    method = reference + 20 + rng.normal(0, 15, 30)
    fig = mean_diff_plot(method, reference, sd_limit=1.96)
    lines = sorted(line.get_ydata()[0] for line in fig.axes[0].lines)  # lower limit, mean, upper limit
    r = bland_altman(method, reference)
    assert r.bias == pytest.approx(lines[1])
    # statsmodels draws mean -/+ 1.96 * np.std(d) (ddof=0); Bland & Altman use the sample SD (ddof=1)
    sd_population = (lines[2] - lines[0]) / (2 * 1.96)
    assert r.sd * math.sqrt(29 / 30) == pytest.approx(sd_population)
    matplotlib.pyplot.close(fig)


def test_proportional_bias_matches_statsmodels_ols():
    rng = np.random.default_rng(4)
    reference = rng.uniform(300, 480, 25)
    method = 1.1 * reference - 20 + rng.normal(0, 10, 25)
    r = bland_altman(method, reference)
    means, diffs = (method + reference) / 2, method - reference
    fit = sm.OLS(diffs, sm.add_constant(means)).fit()
    assert (r.intercept, r.slope, r.slope_p_value) == pytest.approx(
        (fit.params[0], fit.params[1], fit.pvalues[1]))


def test_log_ratio_leaves_out_non_positive_pairs_and_nan_pairs_are_dropped():
    r = bland_altman([0.0, 4.0, 9.0, np.nan, 6.0], [5.0, 2.0, 3.0, 7.0, 3.0])
    assert r.n == 4 and r.n_log == 3  # the NaN pair is dropped everywhere, the zero only from the logs
    assert r.ratio_bias == pytest.approx(math.exp((math.log(2) + math.log(3) + math.log(2)) / 3))


def test_too_few_pairs_give_nan_without_warnings():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        empty, one, two = bland_altman([], []), bland_altman([3.0], [1.0]), bland_altman([3.0, 4.0], [1.0, 1.0])
    assert empty.n == 0 and math.isnan(empty.bias) and math.isnan(empty.mae)
    assert one.bias == 2.0 and one.mae == 2.0 and math.isnan(one.sd) and math.isnan(one.loa_upper)
    assert two.sd == pytest.approx(math.sqrt(0.5)) and math.isnan(two.slope)


def test_constant_means_give_no_regression():
    r = bland_altman([2.0, 2.0, 2.0], [2.0, 2.0, 2.0])
    assert r.bias == 0.0 and r.sd == 0.0 and math.isnan(r.slope)


def test_mismatched_lengths():
    with pytest.raises(InvalidSleepVectorError):
        bland_altman([1.0, 2.0], [1.0])


def test_bland_altman_table_matches_nights_on_ids():
    params = pd.DataFrame({
        "participant_id": ["a", "a", "b", "b", "a", "b"],
        "night_id": ["1", "2", "1", "1", "2", "2"],  # "b/2" has no reference row; rows are in any order
        "method": [REFERENCE, REFERENCE, REFERENCE, "m", "m", "m"],
        "tst_min": [400.0, 380.0, 420.0, 430.0, 400.0, 999.0],
    })
    table = bland_altman_table(params, parameter_names=["tst_min"])
    row = table.set_index(["method", "parameter"]).loc[("m", "tst_min")]
    assert row["n"] == 2 and row["bias"] == pytest.approx(15.0)  # (430-420 + 400-380) / 2


def _records(seed=0, n_epochs=400):
    rng = np.random.default_rng(seed)
    records = []
    for participant in ("p1", "p2"):
        for night in ("n1", "n2"):
            reference = np.ones(n_epochs)
            reference[:40] = 0
            reference[rng.integers(40, n_epochs, 30)] = 0
            reference[-20:] = 0
            reference[100:104] = np.nan
            counts = np.where(reference == 0, rng.poisson(150, n_epochs), rng.poisson(2, n_epochs)).astype(float)
            records.append(NightRecord(participant, night, reference, counts, 30, lights_off_idx=10,
                                       lights_on_idx=n_epochs - 5))
    return records


def test_compare_rules_with_reference_tables():
    records = _records()
    report = compare_rules_with_reference(records)
    methods = [ALWAYS_SLEEP, *METHOD_IDS, *(f"{m}:calibrated" for m in METHOD_IDS)]  # published, then calibrated
    epoch = report.epoch_metrics
    assert list(dict.fromkeys(epoch.method)) == methods
    assert set(epoch.level) == {"night", "participant", "pooled"}
    assert len(epoch[epoch.level == "night"]) == 4 * len(methods)
    assert list(report.parameters.columns[3:3 + len(PARAMETER_NAMES)]) == list(PARAMETER_NAMES)
    assert list(dict.fromkeys(report.parameters.method)) == [REFERENCE, *methods]
    assert set(report.bland_altman.method) == set(methods)
    assert list(dict.fromkeys(report.bland_altman.parameter)) == list(BLAND_ALTMAN_PARAMETERS)


def test_compare_rules_uses_in_bed_epochs_of_whole_night_scoring():
    records = _records(seed=1)
    report = compare_rules_with_reference(records, methods=["sadeh"])
    night = records[0]
    bed = slice(night.lights_off_idx, night.lights_on_idx)
    scored = score_with_rule(night.counts, 30, "sadeh")  # the rule sees the whole recording
    expected = epoch_agreement(night.reference[bed], scored.sleep[bed], score=scored.score[bed])
    row = report.epoch_metrics.query("level == 'night' and method == 'sadeh'").iloc[0]
    for name in EPOCH_METRIC_NAMES:
        assert row[name] == pytest.approx(expected[name]), name
    assert row["excluded_epochs"] == 4


def test_compare_rules_parameters_mask_the_reference_unscored_epochs():
    records = _records(seed=2)
    report = compare_rules_with_reference(records, methods=["count-threshold"],
                                          parameter_options={"waso_end": "final_awakening"})
    night = records[0]
    unscored = np.isnan(night.reference)
    sleep = score_with_rule(night.counts, 30, "count-threshold").sleep
    kwargs = {"lights_off_idx": night.lights_off_idx, "lights_on_idx": night.lights_on_idx,
              "waso_end": "final_awakening"}
    expected_rule = sleep_parameters(np.where(unscored, np.nan, sleep), 30, **kwargs)
    expected_ref = sleep_parameters(night.reference, 30, **kwargs)
    rows = report.parameters.set_index(["participant_id", "night_id", "method"])
    assert rows.loc[("p1", "n1", "count-threshold"), "tst_min"] == expected_rule.tst_min
    assert rows.loc[("p1", "n1", "count-threshold"), "unscored_epochs"] == 4
    assert rows.loc[("p1", "n1", REFERENCE), "waso_min"] == expected_ref.waso_min
    params = report.parameters
    diffs = (params[params.method == "count-threshold"]["tst_min"].to_numpy()
             - params[params.method == REFERENCE]["tst_min"].to_numpy())
    ba = report.bland_altman.set_index(["method", "parameter"]).loc[("count-threshold", "tst_min")]
    assert ba["bias"] == pytest.approx(diffs.mean()) and ba["n"] == 4


def test_compare_rules_passes_rule_options_and_count_scale():
    records = _records(seed=3)
    strict = compare_rules_with_reference(records, methods=["count-threshold"],
                                          rule_options={"count-threshold": {"threshold": 1.0}})
    scaled = compare_rules_with_reference(records, methods=["count-threshold"], count_scale=20.0)
    default = compare_rules_with_reference(records, methods=["count-threshold"])
    pooled = "level == 'pooled' and method == 'count-threshold'"
    sensitivity = {name: report.epoch_metrics.query(pooled).sensitivity.item()
                   for name, report in (("strict", strict), ("scaled", scaled), ("default", default))}
    assert sensitivity["strict"] < sensitivity["default"] and sensitivity["scaled"] < sensitivity["default"]


def test_compare_rules_rejects_mismatched_lengths():
    night = NightRecord("p", "n", np.ones(10), np.zeros(9), 30)
    with pytest.raises(InvalidSleepVectorError):
        compare_rules_with_reference([night])


def test_compare_rules_leaves_epochs_without_counts_out_of_every_method():
    records = _records(seed=3)
    night = records[0]
    counts = night.counts.copy()
    counts[200:230] = np.nan  # 30 epochs without counts, in bed
    gapped = NightRecord(night.participant_id, night.night_id, night.reference, counts, 30,
                         lights_off_idx=night.lights_off_idx, lights_on_idx=night.lights_on_idx)
    report = compare_rules_with_reference([gapped], methods=["cole-kripke", "sadeh+webster"])
    rows = report.epoch_metrics.query("level == 'night'").set_index("method")
    bed = slice(night.lights_off_idx, night.lights_on_idx)
    present = ~np.isnan(counts[bed]) & ~np.isnan(night.reference[bed])
    assert (rows["n_epochs"] == present.sum()).all() and (rows["unscored_epochs"] == 30).all()
    assert (rows["excluded_epochs"] == 34).all()  # 4 unscored by the reference, 30 without counts
    # scikit-learn on the epochs both sides scored (sleep is the positive class)
    scored = score_with_rule(counts, 30, "cole-kripke")
    y, p = night.reference[bed][present].astype(int), scored.sleep[bed][present].astype(int)
    assert rows.loc["cole-kripke", "balanced_accuracy"] == pytest.approx(balanced_accuracy_score(y, p))
    params = report.parameters.set_index("method")
    assert (params["unscored_epochs"] == 34).all()  # the same epochs on every side, the reference included
    # TST of each side: its sleep epochs among the compared epochs x 0.5 min (AASM, Iber et al. 2007, from memory)
    assert params.loc[REFERENCE, "tst_min"] == (night.reference[bed][present] == 1).sum() * 0.5
    assert params.loc["cole-kripke", "tst_min"] == (scored.sleep[bed][present] == 1).sum() * 0.5
