"""Quality of personal, pooled, pooled+offset and auto against the classical rules (SIMULATED data).

Runs the full study comparison (:func:`models.learning.study_comparison.compare_study`, default settings: 30
trials, ``n_jobs=2``) on two simulated cohorts:

- ``demo``: the demo study (``models.simulation.demo_study.demo_nights()``);
- ``second``: ``simulate_cohort(CohortSpec(spread=1.4, id_prefix="QB"), seed=424242)``, wider
  person-to-person differences, never used while developing the models.

Every figure is a mean over held-out nights (per-night metric, then averaged). ``auto`` is the
participant's choice among the three models made without each night (its own nested held-out
figures, :func:`models.learning.method_choice.nested_choice`). Every classical rule (and its
``+webster`` variant, ``rules`` in the report) is shown as published and calibrated to the
cohort's counts leave-participants-out (``<rule>:calibrated``: count scale, or the
count-threshold's threshold in counts, chosen on the other participants). A goal compares
methods on the same nights: personal on the nights of participants with a personal model,
pooled on all labelled nights, pooled+offset against pooled on the nights of participants with
one or two labelled nights (a single labelled night has no held-out offset figure). As those are
few nights, the same situation is also replayed on every participant with two or more labelled
nights: offset from one night, scored on each other night (``one_night_offset``).

Goals: personal, pooled and auto beat every rule, published and calibrated, on balanced accuracy;
their specificity >= 0.70 with sensitivity >= 0.90; their SOL mean absolute error at most half the
count-threshold rule's;
their awakening-count bias at most half the count-threshold rule's (absolute values);
pooled+offset no worse than pooled for participants with 1-2 labelled nights.

Decoding goals (held-out, for ``auto``, the default ``decoder="hmm"`` with isotonic calibration): mean
awakenings error within +/-2 per night, mean WASO and TST errors within +/-10 min, SOL mean absolute
error and balanced accuracy no worse than the same study run with ``decoder="threshold"`` (calls at
Youden's threshold on the calibrated probabilities, epoch by epoch; same seed, same models), personal
balanced accuracy >= pooled on the personal nights, and the 90 % intervals of TST and WASO covering
85-95 % of the held-out nights (``StudyComparison.interval_coverage``; median widths reported).
``--no-threshold-run`` skips the comparison run (those two goals are then not evaluated).
``--without-time-context`` is an ablation: the time-context features ``since_lights_off_min`` and
``to_lights_on_min`` (:func:`models.features.context.time_context`) are blanked (NaN, so no tree
splits on them) for this run only, features computed in this process; the defaults are unchanged.
``--only demo`` (or ``second``) runs one cohort.

The last printed line is one JSON object (with the 1-minute load average before and after).
"""

from __future__ import annotations

import dataclasses
import itertools
import json
import os
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.special import expit
from sklearn.metrics import balanced_accuracy_score

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from models.agreement.rule_comparison import NightRecord, compare_rules_with_reference  # noqa: E402
from models.features.cache import FeatureCache  # noqa: E402
from models.learning.config import TrainingConfig  # noqa: E402
from models.learning.offset import estimate_offset  # noqa: E402
from models.learning.splits import participant_groups  # noqa: E402
from models.learning.study_comparison import COMPARED_RULES, compare_study  # noqa: E402
from models.scoring.rules import METHOD_IDS  # noqa: E402
from models.simulation.demo_study import demo_nights  # noqa: E402
from models.simulation.simulator import CohortSpec, simulate_cohort  # noqa: E402

CALIBRATED = tuple(f"{r}:calibrated" for r in COMPARED_RULES)
METHODS = ("personal", "pooled", "pooled+offset", "auto", *COMPARED_RULES, *CALIBRATED, "always-sleep")


def _figures(nights: pd.DataFrame) -> dict[str, float]:
    return {"n_nights": int(len(nights)), "sensitivity": float(nights["sensitivity"].mean()),
            "specificity": float(nights["specificity"].mean()),
            "balanced_accuracy": float(nights["balanced_accuracy"].mean()),
            "sol_mae_min": float(nights["sol_min_error"].abs().mean()),
            "awakenings_bias": float(nights["awakenings_error"].mean())}


def _one_night_offsets(result) -> dict[str, float]:
    """The few-label situation on every participant with 2+ labelled nights: the offset from one
    night (penalty chosen without the participant), balanced accuracy on each other night."""
    pooled = result.pooled
    gains = []
    for pid, held in pooled.held_out.items():
        if len(held) < 2:
            continue
        shrinkage = pooled.shrinkage_search.excluding(pid)
        parts = []
        for h in held:
            bed = slice(*h.in_bed)
            keep = ~np.isnan(h.reference[bed])
            parts.append((h.margin[bed][keep], h.reference[bed][keep], h.threshold))
        for (m_k, y_k, _), (m_l, y_l, threshold) in itertools.permutations(parts, 2):
            b = estimate_offset(m_k + pooled.baselines[pid], y_k, shrinkage=shrinkage)
            before = balanced_accuracy_score(y_l, expit(m_l) >= threshold)
            gains.append(balanced_accuracy_score(y_l, expit(m_l + b) >= threshold) - before)
    g = np.asarray(gains)
    return {"n_pairs": int(g.size), "mean_gain": float(g.mean()), "share_no_worse": float((g >= 0).mean())}


def _table(result) -> pd.DataFrame:
    keys = ["participant_id", "night_id", "method"]
    night_rows = result.epoch_metrics[result.epoch_metrics["level"] == "night"]
    return night_rows.merge(result.parameter_errors, on=keys)


def _decoding_figures(table: pd.DataFrame, method: str) -> dict[str, float]:
    mine = table[table["method"] == method]
    return {"n_nights": int(len(mine)), "balanced_accuracy": float(mine["balanced_accuracy"].mean()),
            "sol_mae_min": float(mine["sol_min_error"].abs().mean()),
            "tst_bias_min": float(mine["tst_min_error"].mean()), "waso_bias_min": float(mine["waso_min_error"].mean()),
            "awakenings_bias": float(mine["awakenings_error"].mean()),
            "awakenings_mae": float(mine["awakenings_error"].abs().mean())}


def _decoding_goals(result, table: pd.DataFrame, baseline: pd.DataFrame | None) -> dict[str, object]:
    """The decoding goals for auto (module docstring), with the threshold-decoder run as the baseline."""
    auto = _decoding_figures(table, "auto")
    goals: dict[str, bool] = {
        "auto_awakenings_bias_within_2": bool(abs(auto["awakenings_bias"]) <= 2.0),
        "auto_waso_bias_within_10_min": bool(abs(auto["waso_bias_min"]) <= 10.0),
        "auto_tst_bias_within_10_min": bool(abs(auto["tst_bias_min"]) <= 10.0),
    }
    before = None if baseline is None else _decoding_figures(baseline, "auto")
    if before is not None:
        goals["auto_sol_mae_no_worse_than_threshold_decoder"] = bool(auto["sol_mae_min"] <= before["sol_mae_min"])
        goals["auto_balanced_accuracy_no_worse_than_threshold_decoder"] = bool(
            auto["balanced_accuracy"] >= before["balanced_accuracy"])
    personal_ids = table[table["method"] == "personal"][["participant_id", "night_id"]]
    on_personal = table.merge(personal_ids, on=["participant_id", "night_id"])
    ba = on_personal.groupby("method")["balanced_accuracy"].mean()
    goals["personal_no_worse_than_pooled_on_personal_nights"] = bool(
        len(personal_ids) > 0 and ba.get("personal", np.nan) >= ba.get("pooled", np.nan))
    coverage = result.interval_coverage
    cover = {f"{r.method}:{r.parameter}": {"coverage": float(r.coverage), "n_nights": int(r.n_nights),
                                             "median_width": float(r.median_width), "level": float(r.level)}
             for r in coverage.itertuples()}
    for name in ("tst_min", "waso_min"):
        c = cover.get(f"auto:{name}", {}).get("coverage", np.nan)
        goals[f"auto_{name}_90pct_interval_covers_85_95pct"] = bool(0.85 <= c <= 0.95)
    return {"auto": auto, "threshold_decoder_auto": before, "goals": goals, "interval_coverage": cover,
            "personal_vs_pooled_balanced_accuracy": {"personal": float(ba.get("personal", np.nan)),
                                                     "pooled": float(ba.get("pooled", np.nan)),
                                                     "n_nights": int(len(personal_ids))}}


def _study(sims: list) -> dict[str, list]:
    study: dict[str, list] = {}
    for s in sims:
        study.setdefault(s.night.participant_id, []).append(s.night)
    return study


def _evaluate(name: str, sims: list, config: TrainingConfig, *, in_process: bool = False,
              threshold_run: bool = True) -> dict[str, object]:
    study = _study(sims)
    start = time.perf_counter()
    cache = FeatureCache()
    if in_process:  # the ablation's patch lives in this process only: compute every night's features here
        list(cache.features_of([n for v in study.values() for n in v], config.features, n_jobs=1))
    result = compare_study(study, config=config, feature_cache=cache)
    seconds = time.perf_counter() - start
    table = _table(result)
    baseline = None
    if threshold_run:
        start_b = time.perf_counter()
        other = compare_study(study, config=dataclasses.replace(config, decoder="threshold"), feature_cache=cache)
        baseline = _table(other)
        print(f"  (threshold-decoder run: {time.perf_counter() - start_b:.0f} s)")
    decoding = _decoding_goals(result, table, baseline)

    def on(method: str, ids: pd.DataFrame) -> pd.DataFrame:
        mine = table[table["method"] == method]
        return mine.merge(ids, on=["participant_id", "night_id"])

    every = table[table["method"] == "pooled"][["participant_id", "night_id"]]
    personal_ids = table[table["method"] == "personal"][["participant_id", "night_id"]]
    labelled = result.participants.set_index("participant_id")["n_labelled_nights"]
    few = [pid for pid, n in labelled.items() if 1 <= n <= 2]
    few_ids = table[(table["method"] == "pooled+offset") & table["participant_id"].isin(few)][
        ["participant_id", "night_id"]]
    methods = {m: _figures(table[table["method"] == m]) for m in METHODS}

    goals: dict[str, bool] = {}
    for model, ids in (("personal", personal_ids), ("pooled", every), ("auto", every)):
        own = _figures(on(model, ids))
        rules = {r: _figures(on(r, ids)) for r in (*COMPARED_RULES, *CALIBRATED)}
        threshold_rule = rules["count-threshold"]
        goals[f"{model}_beats_every_rule_on_balanced_accuracy"] = all(
            own["balanced_accuracy"] > r["balanced_accuracy"] for r in rules.values())
        goals[f"{model}_specificity_0.70_at_sensitivity_0.90"] = bool(
            own["sensitivity"] >= 0.90 and own["specificity"] >= 0.70)
        goals[f"{model}_sol_mae_at_most_half_count_threshold"] = bool(
            own["sol_mae_min"] <= 0.5 * threshold_rule["sol_mae_min"])
        goals[f"{model}_awakenings_bias_at_most_half_count_threshold"] = bool(
            abs(own["awakenings_bias"]) <= 0.5 * abs(threshold_rule["awakenings_bias"]))
    offset_few, pooled_few = _figures(on("pooled+offset", few_ids)), _figures(on("pooled", few_ids))
    goals["pooled_offset_no_worse_than_pooled_with_1_2_labelled_nights"] = bool(
        len(few_ids) == 0 or offset_few["balanced_accuracy"] >= pooled_few["balanced_accuracy"])
    one_night = _one_night_offsets(result)
    chosen = result.participants["chosen"].value_counts().to_dict()
    rules = _rules(study)
    switched = int(sum(set(c.per_night["chosen"]) != {c.method} for c in result.choices.values()))
    print(f"== {name}: {len(study)} participants, {len(every)} labelled nights, {seconds:.0f} s")
    for m, f in methods.items():
        print(f"  {m:16s} " + " ".join(f"{k}={v:.3f}" if isinstance(v, float) else f"{k}={v}" for k, v in f.items()))
    print(f"  few-label nights: pooled BA {pooled_few['balanced_accuracy']:.3f}, "
          f"pooled+offset BA {offset_few['balanced_accuracy']:.3f} (n={len(few_ids)})")
    print(f"  offset from one night, scored on another (all pairs): BA gain {one_night['mean_gain']:+.4f}, "
          f"no worse in {one_night['share_no_worse']:.0%} of {one_night['n_pairs']} pairs")
    for m, f in rules["methods"].items():
        print(f"  rules {m:32s} BA={f['balanced_accuracy']:.3f} sens={f['sensitivity']:.3f} "
              f"spec={f['specificity']:.3f}")
    print(f"  participants whose nested choice differs on some night from the overall one: {switched}")
    for label, fig in (("auto (hmm)", decoding["auto"]), ("auto (threshold)", decoding["threshold_decoder_auto"])):
        if fig is not None:
            print(f"  decoding {label:17s} " + " ".join(f"{k}={v:.3f}" if isinstance(v, float) else f"{k}={v}"
                                                     for k, v in fig.items()))
    for key, c in decoding["interval_coverage"].items():
        if c["level"] and key.split(":")[1] in ("tst_min", "waso_min", "sol_min", "awakenings"):
            print(f"  interval {key:26s} coverage={c['coverage']:.3f} n={c['n_nights']} "
                  f"median_width={c['median_width']:.1f}")
    goals |= decoding["goals"]
    return {"methods": methods, "goals": goals, "decoding": decoding, "chosen": {k: int(v) for k, v in chosen.items()},
            "auto_switched_participants": switched,
            "calibrations": {m: c.to_dict() for m, c in result.calibrations.items()}, "rules": rules,
            "few_label": {"participants": few, "n_nights": int(len(few_ids)), "pooled": pooled_few,
                          "pooled+offset": offset_few},
            "one_night_offset": one_night,
            "shrinkage": result.pooled.shrinkage, "seconds": round(seconds, 1)}


def _rules(study: dict[str, list]) -> dict[str, object]:
    """Every rule id (``+webster`` included) as published and calibrated, on the same labelled nights."""
    labelled = {pid: [n for n in v if n.reference is not None] for pid, v in study.items()}
    records = [NightRecord.from_night(n) for pid in sorted(labelled) for n in labelled[pid]]
    groups = participant_groups({pid: v for pid, v in labelled.items() if v})
    tables = compare_rules_with_reference(records, methods=METHOD_IDS, groups=groups)
    nights = tables.epoch_metrics[tables.epoch_metrics["level"] == "night"]
    return {"methods": {str(m): {"n_nights": int(len(g)), "sensitivity": float(g["sensitivity"].mean()),
                                 "specificity": float(g["specificity"].mean()),
                                 "balanced_accuracy": float(g["balanced_accuracy"].mean())}
                        for m, g in nights.groupby("method", sort=False)}}


def _without_time_context() -> None:
    """Blank the time-context features in this process (ablation; feature names and order unchanged)."""
    import models.features.matrix as matrix

    original = matrix.time_context

    def blanked(n_epochs: int, epoch_seconds: float, **kwargs: object) -> dict[str, np.ndarray]:
        return {k: np.full(n_epochs, np.nan) for k in original(n_epochs, epoch_seconds, **kwargs)}  # type: ignore[arg-type]

    matrix.time_context = blanked  # type: ignore[assignment]


def main(argv: list[str]) -> None:
    sys.stdout.reconfigure(line_buffering=True)  # type: ignore[attr-defined]  # progress lines show in a log
    ablation = "--without-time-context" in argv
    if ablation:
        _without_time_context()
    trials = int(argv[argv.index("--trials") + 1]) if "--trials" in argv else 30  # fewer: a quick look only
    config = TrainingConfig(n_trials=trials, n_jobs=2)
    cohorts = {
        "demo": demo_nights(),
        "second": simulate_cohort(CohortSpec(spread=1.4, id_prefix="QB"), seed=424242),
    }
    if "--only" in argv:  # one cohort, a quicker look
        cohorts = {argv[argv.index("--only") + 1]: cohorts[argv[argv.index("--only") + 1]]}
    load_before = os.getloadavg()[0]
    print(f"load average (1 min) before: {load_before:.2f}")
    report: dict[str, object] = {name: _evaluate(name, sims, config, in_process=ablation,
                                                 threshold_run="--no-threshold-run" not in argv)
                                 for name, sims in cohorts.items()}
    load_after = os.getloadavg()[0]
    print(f"load average (1 min) after: {load_after:.2f}")
    report["load_average_1min"] = {"before": round(load_before, 2), "after": round(load_after, 2)}
    report["n_trials"] = trials
    report["ablation"] = "without since_lights_off_min, to_lights_on_min" if ablation else None
    report["all_goals_met"] = bool(np.all([v for name in cohorts
                                           for v in report[name]["goals"].values()]))  # type: ignore[index]
    print(json.dumps(report))


if __name__ == "__main__":
    main(sys.argv[1:])
