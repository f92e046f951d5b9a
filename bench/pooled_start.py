"""Pooled-start personal models against the pooled model on the same held-out nights (SIMULATED data).

For each simulated cohort: the pooled model (:func:`models.learning.pooled.train_pooled`) and, for
every participant with enough labelled nights, the personal model started from it
(:func:`models.learning.personal.train_personal` with ``base=pooled.base_for(pid)``: each held-out
night is predicted by a model whose pooled part never saw the participant). ``--with-scratch``
also trains the personal models from scratch (no ``base``), the method they replace.

Figures are means over held-out nights of the per-night balanced accuracy on in-bed epochs
(:meth:`models.learning.held_out.HeldOutNight.agreement`), every method on the same nights: those
of the participants with a personal model. Goal: on every cohort, pooled-start personal >= pooled.

Cohorts: ``demo`` (the demo study), ``second`` (``CohortSpec(spread=1.4, id_prefix="QB")``, seed
424242) and ``third`` (``CohortSpec(spread=0.7, id_prefix="QC")``, seed 77). ``--trials N`` sets
``TrainingConfig.n_trials`` (default 30, the service default); ``--only NAME`` runs one cohort.

The last printed line is one JSON object (with the 1-minute load average before and after).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from models.features.cache import FeatureCache  # noqa: E402
from models.learning.config import TrainingConfig  # noqa: E402
from models.learning.personal import personal_studies, train_personal  # noqa: E402
from models.learning.pooled import train_pooled  # noqa: E402
from models.simulation.demo_study import demo_nights  # noqa: E402
from models.simulation.simulator import CohortSpec, simulate_cohort  # noqa: E402

COHORTS = {
    "demo": lambda: [s.night for s in demo_nights()],
    "second": lambda: [s.night for s in simulate_cohort(CohortSpec(spread=1.4, id_prefix="QB"), seed=424242)],
    "third": lambda: [s.night for s in simulate_cohort(CohortSpec(spread=0.7, id_prefix="QC"), seed=77)],
}


def _ba(held: list) -> dict[str, float]:
    return {h.night_hash: float(h.agreement()["balanced_accuracy"]) for h in held}


def _cohort(name: str, config: TrainingConfig, *, with_scratch: bool) -> dict[str, object]:
    study: dict[str, list] = {}
    for night in COHORTS[name]():
        study.setdefault(night.participant_id, []).append(night)
    start = time.perf_counter()
    cache = FeatureCache()
    pooled = train_pooled(study, config=config, feature_cache=cache)
    pids = [pid for pid in sorted(study) if personal_studies(study[pid], config) >= config.min_personal_nights]
    rows: list[dict[str, float]] = []
    starts: dict[str, int] = {}
    added: list[int] = []
    held_starts: dict[str, int] = {}
    for pid in pids:
        result = train_personal(study[pid], config=config, feature_cache=cache, base=pooled.base_for(pid))
        scratch = _ba(train_personal(study[pid], config=config, feature_cache=cache).outer) if with_scratch else {}
        starts[result.model.info_["start"]] = starts.get(result.model.info_["start"], 0) + 1
        added.append(int(result.model.info_["added_rounds"]))
        for s in result.trials["start"][:-1]:
            held_starts[s] = held_starts.get(s, 0) + 1
        base = _ba(pooled.held_out[pid])
        for night_hash, value in _ba(result.outer).items():
            rows.append({"personal": value, "pooled": base[night_hash], "scratch": scratch.get(night_hash, np.nan)})
    seconds = time.perf_counter() - start
    personal = np.array([r["personal"] for r in rows])
    pooled_ba = np.array([r["pooled"] for r in rows])
    scratch_ba = np.array([r["scratch"] for r in rows])
    out: dict[str, object] = {
        "n_participants": len(pids), "n_nights": len(rows),
        "personal_balanced_accuracy": round(float(personal.mean()), 4),
        "pooled_balanced_accuracy": round(float(pooled_ba.mean()), 4),
        "gain": round(float(personal.mean() - pooled_ba.mean()), 4),
        "share_nights_no_worse": round(float(np.mean(personal >= pooled_ba - 1e-12)), 3),
        "final_starts": starts, "held_out_starts": held_starts, "final_added_rounds": added,
        "goal_personal_no_worse_than_pooled": bool(personal.mean() >= pooled_ba.mean()),
        "seconds": round(seconds, 1)}
    if with_scratch:
        out["scratch_balanced_accuracy"] = round(float(np.nanmean(scratch_ba)), 4)
    print(f"== {name}: {json.dumps(out)}", flush=True)
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=30)
    parser.add_argument("--only", choices=sorted(COHORTS), default=None)
    parser.add_argument("--with-scratch", action="store_true")
    parser.add_argument("--jobs", type=int, default=2)
    args = parser.parse_args()
    config = TrainingConfig(n_trials=args.trials, n_jobs=args.jobs)
    load_before = os.getloadavg()[0]
    print(f"load average (1 min) before: {load_before:.2f}", flush=True)
    names = [args.only] if args.only else list(COHORTS)
    figures = {name: _cohort(name, config, with_scratch=args.with_scratch) for name in names}
    load_after = os.getloadavg()[0]
    print(f"load average (1 min) after: {load_after:.2f}")
    print(json.dumps({"bench": "pooled_start", "n_trials": args.trials, "cohorts": figures,
                      "goal_every_cohort": all(bool(f["goal_personal_no_worse_than_pooled"]) for f in figures.values()),
                      "load_avg_1min_before": round(load_before, 2), "load_avg_1min_after": round(load_after, 2)}))


if __name__ == "__main__":
    main()
