"""Scaling out personal trainings: one process versus a Dask LocalCluster of two worker processes.

Simulated participants (``NIGHTBANK_SCALE_PARTICIPANTS``, default 200) with 5 labelled nights
each get a personal model with 10 trials each (``models.train_personal``, one thread per fit) —
first one after the other in this process (what the local executor does), then as one Dask task
per participant on ``LocalCluster(n_workers=2, threads_per_worker=1)`` (what the Dask executor
submits). ``dask_s`` counts from the first submit to the last result, with the workers started
and warmed up beforehand (``cluster_start_s`` is printed separately). The per-participant
held-out figures, thresholds and hyperparameters of both runs are compared.

The default of 200 participants takes hours on a 2-core machine; 8-12 participants
(``NIGHTBANK_SCALE_PARTICIPANTS=10``) are enough to see the speed-up there. On a shared machine
the wall times depend on what else runs: the load average is printed too.
The last printed line is one JSON object.
"""

from __future__ import annotations

import json
import os
import sys
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

N_NIGHTS = 5
N_TRIALS = 10


def _cohort(n_participants: int) -> dict[str, list[Any]]:
    from models import CohortSpec, simulate_cohort

    spec = CohortSpec(n_participants=n_participants, nights_min=N_NIGHTS, nights_max=N_NIGHTS, labelled_share=1.0,
                      few_labels_participants=0, artefacts=False, id_prefix="SC")
    out: dict[str, list[Any]] = {}
    for sim in simulate_cohort(spec, seed=211):
        out.setdefault(sim.night.participant_id, []).append(sim.night)
    return out


def _figures(result: Any) -> dict[str, Any]:
    """What must agree between the runs: held-out figures, threshold, hyperparameters."""
    return {"summary": result.summary.to_dict(), "threshold": float(result.model.threshold_),
            "params": dict(result.model.params_)}


def main() -> None:
    from distributed import Client, LocalCluster

    from models import TrainingConfig, train_personal

    n = int(os.environ.get("NIGHTBANK_SCALE_PARTICIPANTS", "200"))
    cohort = _cohort(n)
    config = TrainingConfig(n_trials=N_TRIALS, n_jobs=1, seed=0)
    print(f"{n} participants x {N_NIGHTS} labelled nights, {N_TRIALS} trials each", flush=True)

    start = time.perf_counter()
    local = {pid: _figures(train_personal(nights, config=config)) for pid, nights in cohort.items()}
    local_s = time.perf_counter() - start
    print(f"local (one process): {local_s:.1f} s", flush=True)

    start = time.perf_counter()
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster, Client(cluster) as client:
        client.run(lambda: __import__("models"))  # warm-up: xgboost and models imported in each worker
        cluster_start_s = time.perf_counter() - start
        start = time.perf_counter()
        futures = {pid: client.submit(train_personal, nights, config=config, pure=False)
                   for pid, nights in cohort.items()}
        on_dask = {pid: _figures(future.result()) for pid, future in futures.items()}
        dask_s = time.perf_counter() - start
    print(f"dask (2 workers): {dask_s:.1f} s after {cluster_start_s:.1f} s start-up", flush=True)

    identical = json.dumps(on_dask, sort_keys=True) == json.dumps(local, sort_keys=True)  # NaN-safe comparison
    print(json.dumps({"participants": n, "nights_per_participant": N_NIGHTS, "trials": N_TRIALS,
                      "local_s": round(local_s, 1), "dask_s": round(dask_s, 1),
                      "speedup": round(local_s / dask_s, 2), "cluster_start_s": round(cluster_start_s, 1),
                      "identical_per_participant": identical, "cpu_count": os.cpu_count(),
                      "load_average_1min": round(os.getloadavg()[0], 2)}))


if __name__ == "__main__":
    main()
