"""Epoch-by-epoch agreement against the published formulas and scikit-learn's own functions.

Formulas: published-methods section 4a (sleep = positive class; PABAK = 2 p_o - 1 from
Menghini et al. 2021's glossary; kappa = (p_o - p_e) / (1 - p_e); MCC as Matthews 1975).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
import pytest
from sklearn import metrics as skm

from models.agreement.epoch_metrics import (
    ALWAYS_SLEEP,
    EPOCH_METRIC_NAMES,
    ScoredNight,
    agreement_table,
    always_sleep,
    epoch_agreement,
)
from models.scoring.rescoring import InvalidSleepVectorError


def _counts(y, p):
    y, p = np.asarray(y), np.asarray(p)
    return (int(np.sum((y == 1) & (p == 1))), int(np.sum((y == 0) & (p == 0))),
            int(np.sum((y == 0) & (p == 1))), int(np.sum((y == 1) & (p == 0))))


def _formulas(y, p):
    """The formulas of published-methods 4a, written out on the confusion counts."""
    tp, tn, fp, fn = _counts(y, p)
    n = tp + tn + fp + fn
    p_o = (tp + tn) / n
    p_e = ((tp + fp) * (tp + fn) + (tn + fn) * (tn + fp)) / n**2
    sens, spec = tp / (tp + fn), tn / (tn + fp)
    return {
        "sensitivity": sens, "specificity": spec, "ppv": tp / (tp + fp), "npv": tn / (tn + fn),
        "accuracy": p_o, "balanced_accuracy": (sens + spec) / 2,
        "f1_sleep": 2 * tp / (2 * tp + fp + fn), "f1_wake": 2 * tn / (2 * tn + fn + fp),
        "kappa": (p_o - p_e) / (1 - p_e), "pabak": 2 * p_o - 1,
        "mcc": (tp * tn - fp * fn) / math.sqrt((tp + fp) * (tp + fn) * (tn + fp) * (tn + fn)),
    }


def _sklearn(y, p, score):
    """The same metrics from scikit-learn's individual functions."""
    return {
        "sensitivity": skm.recall_score(y, p, pos_label=1), "specificity": skm.recall_score(y, p, pos_label=0),
        "ppv": skm.precision_score(y, p, pos_label=1), "npv": skm.precision_score(y, p, pos_label=0),
        "accuracy": skm.accuracy_score(y, p), "balanced_accuracy": skm.balanced_accuracy_score(y, p),
        "f1_sleep": skm.f1_score(y, p, pos_label=1), "f1_wake": skm.f1_score(y, p, pos_label=0),
        "kappa": skm.cohen_kappa_score(y, p), "mcc": skm.matthews_corrcoef(y, p),
        "auc": skm.roc_auc_score(y, score),
    }


@pytest.mark.parametrize("seed", range(5))
def test_random_inputs_match_formulas_and_sklearn(seed):
    rng = np.random.default_rng(seed)
    y = (rng.random(400) < 0.8).astype(int)
    score = y + rng.normal(0, 0.8, 400)
    p = (score > 0.5).astype(int)
    got = epoch_agreement(y, p, score=score)
    for name, value in _formulas(y, p).items():
        assert got[name] == pytest.approx(value), name
    for name, value in _sklearn(y, p, score).items():
        assert got[name] == pytest.approx(value), name
    assert got["n_epochs"] == 400 and got["excluded_epochs"] == 0


def test_worked_example():
    # TP=2, TN=1, FP=1, FN=0: sens 1, spec 1/2, ppv 2/3, p_o 3/4, PABAK 2*3/4 - 1 = 1/2
    # p_e = (3*2 + 1*2)/16 = 1/2 -> kappa = (3/4 - 1/2)/(1/2) = 1/2
    got = epoch_agreement([1, 1, 0, 0], [1, 1, 1, 0])
    assert (got["sensitivity"], got["specificity"], got["ppv"], got["pabak"], got["kappa"]) == pytest.approx(
        (1.0, 0.5, 2 / 3, 0.5, 0.5))


def _no_warning_agreement(y, p, score=None):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        return epoch_agreement(y, p, score=score)


def _nan_names(result):
    return {k for k in EPOCH_METRIC_NAMES if math.isnan(result[k])}


def test_all_sleep_reference_and_prediction():
    got = _no_warning_agreement([1] * 6, [1] * 6, score=np.arange(6.0))
    assert got["sensitivity"] == got["ppv"] == got["accuracy"] == got["f1_sleep"] == 1.0
    assert got["pabak"] == 1.0
    assert _nan_names(got) == {"specificity", "npv", "balanced_accuracy", "f1_wake", "kappa", "mcc", "auc"}


def test_all_wake_reference_and_prediction():
    got = _no_warning_agreement([0] * 6, [0] * 6)
    assert got["specificity"] == got["npv"] == got["f1_wake"] == got["accuracy"] == got["pabak"] == 1.0
    assert _nan_names(got) == {"sensitivity", "ppv", "balanced_accuracy", "f1_sleep", "kappa", "mcc", "auc"}


def test_prediction_missing_one_class_is_the_always_sleep_baseline():
    y = np.array([1, 1, 1, 0, 1, 0, 1, 1])
    got = _no_warning_agreement(y, always_sleep(y))
    # Roberts et al. 2020: always "sleep" has sensitivity 1, specificity 0, balanced accuracy 0.5
    assert (got["sensitivity"], got["specificity"], got["balanced_accuracy"]) == (1.0, 0.0, 0.5)
    assert got["ppv"] == pytest.approx(6 / 8) and got["accuracy"] == pytest.approx(6 / 8)
    assert got["kappa"] == pytest.approx(skm.cohen_kappa_score(y, always_sleep(y))) == 0.0
    assert got["pabak"] == pytest.approx(2 * 6 / 8 - 1)
    assert got["f1_wake"] == 0.0  # 2TN/(2TN+FN+FP) = 0/2
    assert _nan_names(got) == {"npv", "mcc", "auc"}  # sklearn would give MCC 0; undefined -> NaN here


def test_prediction_of_the_wrong_single_class():
    got = _no_warning_agreement([1, 1, 1], [0, 0, 0])
    assert got["sensitivity"] == 0.0 and got["accuracy"] == 0.0 and got["pabak"] == -1.0
    assert got["kappa"] == pytest.approx(0.0)  # p_o = 0, p_e = 0


def test_nan_reference_epochs_are_excluded_and_counted():
    y = np.array([1, np.nan, 0, 1, np.nan, 1])
    p = np.array([1, 0, 0, 0, 1, 1])
    s = np.array([0.9, np.nan, 0.1, 0.4, 0.3, 0.8])
    got = epoch_agreement(y, p, score=s)
    keep = ~np.isnan(y)
    expected = _sklearn(y[keep].astype(int), p[keep], s[keep])
    for name, value in expected.items():
        assert got[name] == pytest.approx(value), name
    assert (got["n_epochs"], got["excluded_epochs"]) == (4, 2)


def test_unscored_predicted_epochs_are_excluded_and_counted():
    # a method leaves epochs without counts unscored (NaN): they leave the confusion, whatever the reference says
    y = np.array([1, np.nan, 0, 1, 0, 1, 0, 1])
    p = np.array([1, 0, np.nan, 0, np.nan, 1, 0, np.nan])
    s = np.array([0.9, 0.2, np.nan, 0.4, np.nan, 0.8, 0.1, np.nan])
    got = epoch_agreement(y, p, score=s)
    keep = ~np.isnan(y) & ~np.isnan(p)
    expected = _sklearn(y[keep].astype(int), p[keep].astype(int), s[keep])  # scikit-learn on the compared epochs
    for name, value in expected.items():
        assert got[name] == pytest.approx(value), name
    assert (got["n_epochs"], got["excluded_epochs"], got["unscored_epochs"]) == (4, 4, 3)


def test_everything_excluded_gives_nan_without_warning():
    got = _no_warning_agreement([np.nan, np.nan], [1, 0])
    assert _nan_names(got) == set(EPOCH_METRIC_NAMES) and got["n_epochs"] == 0


def test_auc_needs_finite_scores():
    assert math.isnan(epoch_agreement([1, 0, 1], [1, 0, 1], score=[0.9, np.nan, 0.2])["auc"])
    assert epoch_agreement([1, 0, 1], [1, 0, 1], score=[0.9, 0.1, 0.2])["auc"] == 1.0


@pytest.mark.parametrize(("ref", "pred", "score"), [
    ([1, 0], [1, 0, 1], None), ([1, 0], [1, 0], [0.1]), ([1, 0], [1, 0.5], None), ([1, 2], [1, 0], None)])
def test_invalid_inputs(ref, pred, score):
    with pytest.raises(InvalidSleepVectorError) as info:
        epoch_agreement(ref, pred, score=score)
    assert info.value.code == "invalid_sleep_vector"


def _nights():
    rng = np.random.default_rng(42)
    nights = []
    for participant, n_nights in (("p1", 3), ("p2", 2), ("p3", 1)):
        for k in range(n_nights):
            y = (rng.random(200) < 0.85).astype(float)
            y[rng.integers(0, 200, 5)] = np.nan
            score = np.nan_to_num(y, nan=1.0) + rng.normal(0, 1.0, 200)
            pred = (score > 0.3).astype(np.int8)
            nights.append(ScoredNight(participant, f"n{k}", "rule", y, pred, score))
            nights.append(ScoredNight(participant, f"n{k}", ALWAYS_SLEEP, y, always_sleep(y)))
    return nights


def test_agreement_table_levels_are_labelled_and_consistent():
    nights = _nights()
    table = agreement_table(nights)
    assert list(table.columns[:9]) == ["level", "method", "participant_id", "night_id", "statistic", "n_nights",
                                       "n_epochs", "excluded_epochs", "unscored_epochs"]
    assert list(table.columns[9:]) == list(EPOCH_METRIC_NAMES)
    night = table[table.level == "night"]
    assert len(night) == 12 and set(night.statistic) == {"value"}
    participant = table[table.level == "participant"].set_index(["method", "participant_id", "statistic"])
    for (method, pid), group in night.groupby(["method", "participant_id"]):
        for name in ("sensitivity", "kappa", "auc"):
            values = group[name].to_numpy(dtype=float)
            mean = np.nan if np.isnan(values).all() else np.nanmean(values)  # nights with NaN are skipped
            assert participant.loc[(method, pid, "mean"), name] == pytest.approx(mean, nan_ok=True)
            sd = np.std(values, ddof=1) if len(values) > 1 else np.nan
            assert participant.loc[(method, pid, "sd"), name] == pytest.approx(sd, nan_ok=True)
        assert participant.loc[(method, pid, "mean"), "n_nights"] == len(group)
    pooled = table[table.level == "pooled"].set_index("method")
    rule = [n for n in nights if n.method == "rule"]
    y = np.concatenate([n.reference for n in rule])
    keep = ~np.isnan(y)
    p = np.concatenate([n.predicted for n in rule])[keep]
    s = np.concatenate([n.score for n in rule])[keep]
    for name, value in _sklearn(y[keep].astype(int), p, s).items():
        assert pooled.loc["rule", name] == pytest.approx(value), name
    assert pooled.loc["rule", "n_epochs"] == keep.sum() and pooled.loc["rule", "excluded_epochs"] == (~keep).sum()
    assert pooled.loc[ALWAYS_SLEEP, "balanced_accuracy"] == 0.5 and math.isnan(pooled.loc[ALWAYS_SLEEP, "auc"])


def test_agreement_table_groups_rows_by_method_with_mean_before_sd():
    table = agreement_table(_nights())
    participant = table[table.level == "participant"]
    assert participant.statistic.tolist() == ["mean", "sd"] * 6
    assert participant.participant_id.tolist() == ["p1", "p1", "p2", "p2", "p3", "p3"] * 2
    assert participant.method.tolist() == ["rule"] * 6 + [ALWAYS_SLEEP] * 6
    assert table[table.level == "night"].method.tolist() == ["rule"] * 6 + [ALWAYS_SLEEP] * 6


def test_agreement_table_empty():
    table = agreement_table([])
    assert table.empty and "level" in table.columns and isinstance(table, pd.DataFrame)


@pytest.mark.parametrize("seed", range(6))
def test_metrics_are_sklearns_to_the_last_bit(seed):
    """The confusion-count formulas give scikit-learn's floats exactly (ties in the score included), so stored
    and fresh results do not differ by rounding."""
    rng = np.random.default_rng(100 + seed)
    n = int(rng.integers(20, 400))
    y = rng.integers(0, 2, n)
    p = np.where(rng.random(n) < 0.8, y, 1 - y)
    score = np.round(rng.random(n) * 0.5 + 0.5 * p, 1 + seed % 3)  # few distinct values: many ties
    got = epoch_agreement(y, p, score=score)
    for name, value in _sklearn(y, p, score).items():
        assert got[name] == float(value), name
