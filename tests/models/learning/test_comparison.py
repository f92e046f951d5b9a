"""Study comparison: held-out tables for models and rules, Bland-Altman, method choice."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from models.agreement.bland_altman import bland_altman
from models.agreement.rule_comparison import NightRecord, compare_rules_with_reference
from models.learning.config import TrainingConfig
from models.learning.method_choice import MODEL_METHODS, choose_method
from models.learning.study_comparison import COMPARED_RULES, compare_study
from models.simulation.simulator import CohortSpec, simulate_cohort

CONFIG = TrainingConfig(n_trials=2, max_rounds=50, pooled_folds=3)


@pytest.fixture(scope="module")
def study():
    sims = simulate_cohort(CohortSpec(n_participants=5, nights_min=3, nights_max=3, labelled_share=1.0,
                                      few_labels_participants=2, artefacts=False), seed=51)
    nights: dict[str, list] = {}
    for s in sims:
        nights.setdefault(s.night.participant_id, []).append(s.night)
    calls: list[tuple[int, int, str]] = []
    result = compare_study(nights, config=CONFIG, progress=lambda d, t, s: calls.append((d, t, s)))
    return nights, result, calls


def test_participant_table_and_notes(study) -> None:
    nights, result, calls = study
    table = result.participants.set_index("participant_id")
    assert sorted(table.index) == sorted(nights)
    assert calls[-1][0] == calls[-1][1]  # progress ends at its total
    for pid, row in table.iterrows():
        n_lab = sum(n.reference is not None for n in nights[pid])
        assert row["n_labelled_nights"] == n_lab
        assert row["chosen"] in MODEL_METHODS
        assert np.isnan(row["personal_balanced_accuracy"]) == (n_lab < 3)
        assert np.isnan(row["pooled+offset_balanced_accuracy"]) == (n_lab < 2)
        if n_lab == 1:
            assert any(note.startswith(f"{pid}: 1 labelled night") for note in result.notes)
    night_level = result.epoch_metrics[result.epoch_metrics["level"] == "night"]
    calibrated = {f"{r}:calibrated" for r in COMPARED_RULES}
    assert set(night_level["method"]) == {*MODEL_METHODS, "auto", *COMPARED_RULES, *calibrated, "always-sleep"}
    json.dumps(result.to_dict(), allow_nan=False)


def test_rule_rows_match_the_agreement_module(study) -> None:
    nights, result, _ = study
    records = [NightRecord.from_night(n) for pid in sorted(nights) for n in nights[pid] if n.reference is not None]
    direct = compare_rules_with_reference(records, methods=COMPARED_RULES)
    ours = result.epoch_metrics
    for method in COMPARED_RULES:
        a = ours[(ours.level == "night") & (ours.method == method)].set_index("night_id").sort_index()
        b = direct.epoch_metrics[(direct.epoch_metrics.level == "night")
                                 & (direct.epoch_metrics.method == method)].set_index("night_id").sort_index()
        pd.testing.assert_frame_equal(a[["sensitivity", "specificity", "auc", "kappa"]],
                                      b[["sensitivity", "specificity", "auc", "kappa"]])


def test_parameter_errors_and_bland_altman_agree_with_the_parameter_table(study) -> None:
    _, result, _ = study
    p = result.parameters.set_index(["participant_id", "night_id"])
    ref = p[p.method == "reference"]
    for method in ("personal", "pooled+offset", "sadeh"):
        mine = p[p.method == method]
        diff = (mine["sol_min"] - ref["sol_min"].reindex(mine.index)).to_numpy()
        errors = result.parameter_errors.query("method == @method")["sol_min_error"].to_numpy()
        np.testing.assert_array_equal(errors, diff)
        row = result.bland_altman.query("method == @method and parameter == 'sol_min'").iloc[0]
        assert row["bias"] == pytest.approx(np.nanmean(diff))  # numpy mean of the differences
        assert row["n"] == np.isfinite(diff).sum()
        expected = bland_altman(mine["sol_min"], ref["sol_min"].reindex(mine.index))
        assert row["loa_upper"] == pytest.approx(expected.loa_upper)


def test_tables_name_nights_as_the_service_stores_them_and_keep_labels(study) -> None:
    nights, result, _ = study
    labels = {n.content_hash[:20]: n.label for v in nights.values() for n in v}  # the API's night_id
    for frame in (result.parameters, result.parameter_errors):
        assert [labels[i] for i in frame["night_id"]] == list(frame["label"])
    night_level = result.epoch_metrics[result.epoch_metrics["level"] == "night"]
    assert set(night_level["night_id"]) <= set(labels)


def _metrics(**means: float) -> pd.DataFrame:
    rows = [{"night_id": f"n{k}", "method": m, "balanced_accuracy": v, "kappa": 1.0 - v}
            for m, v in means.items() for k in range(2)]
    return pd.DataFrame(rows)


@pytest.mark.parametrize("means, policy, expected", [
    ({"personal": 0.90, "pooled": 0.85}, "balanced_accuracy", "personal"),
    ({"personal": 0.85, "pooled": 0.85}, "balanced_accuracy", "pooled"),  # ties go to the simpler model
    ({"personal": 0.90, "pooled": 0.95, "pooled+offset": 0.80}, "balanced_accuracy", "pooled"),  # plain pooled
    ({"personal": 0.90, "pooled": 0.80, "pooled+offset": 0.92}, "balanced_accuracy", "pooled+offset"),
    ({"personal": 0.90, "pooled": 0.80, "pooled+offset": 0.90}, "balanced_accuracy", "pooled+offset"),  # tie
    ({"personal": 0.90, "pooled": 0.85}, "kappa", "pooled"),  # kappa = 1 - BA here
    ({"pooled": 0.70}, "balanced_accuracy", "pooled"),
])
def test_choose_method(means: dict, policy: str, expected: str) -> None:
    method, reason = choose_method(_metrics(**means), policy=policy)
    assert method == expected
    assert policy in reason


def test_interval_coverage_counts_the_held_out_nights_inside_their_intervals(study) -> None:
    nights, result, _ = study
    table = result.interval_coverage
    assert list(table.columns) == ["method", "parameter", "level", "coverage", "n_nights", "median_width"]
    assert {"personal", "pooled", "auto"} <= set(table["method"])
    p = result.parameters
    reference = p[p.method == "reference"].set_index(["participant_id", "night_id"])
    night_id = {n.content_hash: n.night_id for v in nights.values() for n in v}
    held = [h for pid in sorted(nights) for h in result.pooled.held_out[pid]]
    for name in ("tst_min", "waso_min"):
        # counted here by hand from each held-out night's interval and the reference parameter table
        inside, widths = [], []
        for h in held:
            low, high = h.intervals.intervals[name]
            value = reference.loc[(h.participant_id, night_id[h.night_hash]), name]
            inside.append(low <= value <= high)
            widths.append(high - low)
        row = table[(table.method == "pooled") & (table.parameter == name)].iloc[0]
        assert row["level"] == CONFIG.interval_level and row["n_nights"] == len(held)
        assert row["coverage"] == pytest.approx(np.mean(inside))
        assert row["median_width"] == pytest.approx(np.median(widths))
    assert json.loads(json.dumps(result.to_dict()["interval_coverage"], allow_nan=False))
