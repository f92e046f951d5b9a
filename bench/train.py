"""Training speed: a personal model (7 labelled nights, 30 trials, full nested evaluation) and the
pooled model (100 participants x 7 nights, leave-participants-out evaluation included).

Each part runs in its own process (so peak memory is that part's own), on simulated data, with
``n_jobs=2``. Goals: personal <= 30 s wall; pooled <= 90 s wall and <= 4 GB peak RSS. CPU seconds
and the load average are printed too: on a shared machine the wall time depends on the others.
The last printed line is one JSON object.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

GOALS = {"personal_s": 30.0, "pooled_s": 90.0, "pooled_peak_rss_mb": 4096.0}


def _personal() -> dict[str, float]:
    from models.learning.config import TrainingConfig
    from models.learning.personal import train_personal
    from models.simulation.simulator import CohortSpec, simulate_cohort

    sims = simulate_cohort(CohortSpec(n_participants=1, nights_min=7, nights_max=7, labelled_share=1.0,
                                      few_labels_participants=0, artefacts=False, id_prefix="TB"), seed=101)
    nights = [s.night for s in sims]
    start = time.perf_counter()
    result = train_personal(nights, config=TrainingConfig(n_trials=30, n_jobs=2))
    seconds = time.perf_counter() - start
    trials = result.trials
    return {"seconds": seconds, "studies": len(trials), "trials": int(trials["n_trials"].sum()),
            "pruned": int(trials["n_pruned"].sum()),
            "outer_balanced_accuracy": float(result.summary.loc["balanced_accuracy", "mean"])}


def _pooled() -> dict[str, float]:
    from models.learning.config import TrainingConfig
    from models.learning.pooled import train_pooled
    from models.simulation.simulator import CohortSpec, simulate_cohort

    sims = simulate_cohort(CohortSpec(n_participants=100, nights_min=7, nights_max=7, labelled_share=1.0,
                                      few_labels_participants=0, artefacts=False, id_prefix="PB"), seed=102)
    nights: dict[str, list] = {}
    for s in sims:
        nights.setdefault(s.night.participant_id, []).append(s.night)
    start = time.perf_counter()
    result = train_pooled(nights, config=TrainingConfig(n_jobs=2))
    seconds = time.perf_counter() - start
    pooled = result.summary.loc["pooled"]
    return {"seconds": seconds, "nights": sum(len(v) for v in nights.values()),
            "rows": int(result.night_metrics.query("method == 'pooled'")["n_epochs"].sum()),
            "n_rounds": result.model.n_rounds_,
            "held_out_balanced_accuracy": float(pooled.loc["balanced_accuracy", "mean"])}


def _child(part: str) -> None:
    figures = {"personal": _personal, "pooled": _pooled}[part]()
    own, workers = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    figures["peak_rss_mb"] = own.ru_maxrss / 1024.0  # Linux: kB
    figures["cpu_s"] = own.ru_utime + own.ru_stime + workers.ru_utime + workers.ru_stime
    figures["load_average_1min"] = os.getloadavg()[0]  # the machines are shared: high load stretches wall time
    print(json.dumps(figures))


def main() -> None:
    parts = {}
    for part in ("personal", "pooled"):
        out = subprocess.run([sys.executable, __file__, part], capture_output=True, text=True, check=True, cwd=ROOT)
        parts[part] = json.loads(out.stdout.strip().splitlines()[-1])
        print(f"{part}: {parts[part]}")
    figures = {"personal_s": round(parts["personal"]["seconds"], 1), "pooled_s": round(parts["pooled"]["seconds"], 1),
               "pooled_peak_rss_mb": round(parts["pooled"]["peak_rss_mb"]),
               "personal_cpu_s": round(parts["personal"]["cpu_s"], 1),
               "pooled_cpu_s": round(parts["pooled"]["cpu_s"], 1),
               "personal_peak_rss_mb": round(parts["personal"]["peak_rss_mb"])}
    figures["fits"] = {name: figures[name] <= limit for name, limit in GOALS.items()}
    figures["personal"] = parts["personal"]
    figures["pooled"] = parts["pooled"]
    print(json.dumps(figures))


if __name__ == "__main__":
    if len(sys.argv) > 1:
        _child(sys.argv[1])
    else:
        main()
