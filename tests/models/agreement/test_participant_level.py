"""Participant-level epoch figures and paired participant differences.

References: scikit-learn (recall, balanced accuracy, Cohen's kappa on each participant's pooled
epochs); scipy.stats (paired t-interval; ``scipy.stats.bootstrap`` as an independent bootstrap
of the same mean); a seeded simulation for the coverage of the group-mean interval.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats
from sklearn.metrics import balanced_accuracy_score, cohen_kappa_score, recall_score

from models import (
    InvalidAgreementInputError,
    ScoredNight,
    StudyProtocol,
    agreement_table,
    paired_participant_difference,
    participant_epoch_figures,
)


def _night(rng, participant, night, method, n=200, wake=0.2, sens=0.95, spec=0.5):
    reference = (rng.random(n) > wake).astype(np.float64)
    flip = np.where(reference == 1, rng.random(n) > sens, rng.random(n) > spec)
    predicted = np.where(flip, 1 - reference, reference).astype(np.float64)
    return ScoredNight(participant_id=participant, night_id=night, method=method, reference=reference,
                       predicted=predicted)


def _study(seed=0, k=8):
    rng = np.random.default_rng(seed)
    nights = []
    for p in range(k):
        n_nights = 1 + p % 4  # unequal nights per participant
        spec = 0.3 + 0.05 * p
        for j in range(n_nights):
            nights.append(_night(rng, f"p{p}", f"n{j}", "rule", spec=spec))
            nights.append(_night(rng, f"p{p}", f"n{j}", "model", spec=spec + 0.1))
    return nights


def test_participant_metrics_pool_each_participants_nights_as_scikit_learn_does():
    nights = _study()
    figures = participant_epoch_figures(nights, n_boot=500)
    row = figures.participants.query("method == 'rule' and participant_id == 'p3'").iloc[0]
    mine = [n for n in nights if n.method == "rule" and n.participant_id == "p3"]
    y = np.concatenate([n.reference for n in mine]).astype(int)
    p = np.concatenate([n.predicted for n in mine]).astype(int)
    assert row["n_nights"] == 4 and row["n_epochs"] == y.size
    assert row["sensitivity"] == pytest.approx(recall_score(y, p, pos_label=1))
    assert row["specificity"] == pytest.approx(recall_score(y, p, pos_label=0))
    assert row["balanced_accuracy"] == pytest.approx(balanced_accuracy_score(y, p))
    assert row["kappa"] == pytest.approx(cohen_kappa_score(y, p))


def test_group_mean_is_over_participants_not_over_epochs():
    nights = _study()
    figures = participant_epoch_figures(nights, n_boot=500)
    group = figures.group.set_index(["method", "metric"])
    per = figures.participants.query("method == 'rule'")
    assert group.loc[("rule", "specificity"), "mean"] == pytest.approx(per["specificity"].mean())
    assert group.loc[("rule", "specificity"), "n_participants"] == 8
    assert group.loc[("rule", "specificity"), "n_nights"] == per["n_nights"].sum()
    # the pooled figure weights participants by their epochs; here participants with more nights
    # (p3, p7) have a higher specificity, so the pooled figure is above the participant mean
    pooled = agreement_table(nights).query("level == 'pooled' and method == 'rule'")["specificity"].iloc[0]
    assert pooled > group.loc[("rule", "specificity"), "mean"]
    low, high = group.loc[("rule", "specificity"), ["ci_low", "ci_high"]]
    assert low < group.loc[("rule", "specificity"), "mean"] < high


def test_group_interval_is_close_to_an_independent_bootstrap_and_the_t_interval():
    figures = participant_epoch_figures(_study(k=12), n_boot=4000, seed=1)
    values = figures.participants.query("method == 'model'")["balanced_accuracy"].to_numpy()
    row = figures.group.set_index(["method", "metric"]).loc[("model", "balanced_accuracy")]
    reference = stats.bootstrap((values,), np.mean, method="basic", n_resamples=4000,
                                random_state=np.random.default_rng(2)).confidence_interval
    t_interval = stats.ttest_1samp(values, 0.0).confidence_interval(0.95)
    width = t_interval.high - t_interval.low
    # bootstrap-t of a mean is close to the t-interval; scipy's basic bootstrap slightly narrower
    assert row["ci_low"] == pytest.approx(t_interval.low, abs=0.15 * width)
    assert row["ci_high"] == pytest.approx(t_interval.high, abs=0.15 * width)
    assert row["ci_low"] == pytest.approx(reference.low, abs=0.25 * width)
    assert row["ci_high"] == pytest.approx(reference.high, abs=0.25 * width)


def test_group_interval_covers_the_true_mean_in_a_seeded_simulation():
    # 15 participants with a true per-participant value ~ N(0.7, 0.08^2): the mean's interval
    rng = np.random.default_rng(7)
    hits = 0
    for rep in range(300):
        values = rng.normal(0.7, 0.08, 15)
        result = paired_participant_difference(dict(enumerate(values)), dict.fromkeys(range(15), 0.0),
                                               n_boot=1000, seed=rep)
        hits += result.ci[0] <= 0.7 <= result.ci[1]
    assert hits / 300 >= 0.90


def test_paired_difference_between_methods_of_the_same_participants():
    figures = participant_epoch_figures(_study(k=10), n_boot=1000)
    diff = figures.difference("model", "rule", "specificity")
    per = figures.participants.set_index("participant_id")
    expected = per.loc[per.method == "model", "specificity"] - per.loc[per.method == "rule", "specificity"]
    assert diff.mean_difference == pytest.approx(expected.mean())
    assert diff.n_participants == 10 and diff.per_participant["p0"] == pytest.approx(expected["p0"])
    t_ci = stats.ttest_rel(per.loc[per.method == "model", "specificity"],
                           per.loc[per.method == "rule", "specificity"]).confidence_interval(0.95)
    assert diff.t_ci == pytest.approx((t_ci.low, t_ci.high))
    assert diff.ci[0] > 0  # the model's specificity is 0.1 higher by construction
    json.dumps(diff.to_dict(), allow_nan=False)
    with pytest.raises(InvalidAgreementInputError, match="personal"):
        figures.difference("personal", "rule", "specificity")
    with pytest.raises(InvalidAgreementInputError, match="metric"):
        figures.difference("model", "rule", "speed")


def test_paired_difference_uses_only_participants_present_on_both_sides():
    a = {"p1": 0.8, "p2": 0.7, "p3": float("nan"), "p4": 0.9}
    b = {"p1": 0.6, "p2": 0.65, "p3": 0.5, "p5": 0.1}
    result = paired_participant_difference(a, b, label_a="personal", label_b="pooled")
    assert result.n_participants == 2 and result.mean_difference == pytest.approx((0.2 + 0.05) / 2)
    assert set(result.per_participant) == {"p1", "p2"}


def test_figures_are_seeded_and_json_safe():
    nights = _study(k=5)
    proto = StudyProtocol(bootstrap_resamples=300, seed=4)
    a = participant_epoch_figures(nights, protocol=proto)
    b = participant_epoch_figures(nights, protocol=proto)
    assert a.group.equals(b.group)
    out = json.loads(json.dumps(a.to_dict(), allow_nan=False))
    assert out["protocol"] == proto.to_dict() and len(out["participants"]) == 10
    with pytest.raises(InvalidAgreementInputError, match="unknown metrics"):
        participant_epoch_figures(nights, metrics=("sensitivity", "speed"))
