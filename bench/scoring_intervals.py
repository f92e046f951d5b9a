"""Benchmark: what the per-night intervals add to scoring a night with a model (the compute path).

Trains one personal model (calibrated, HMM-decoded; 4 simulated labelled nights, 3 trials,
seeded), then times :func:`service.results.scoring.compute_scoring` on 8 simulated nights of the same
participant, on one core:

- ``ms_per_night`` (headline): scoring with intervals (the model as trained);
- ``ms_per_night_without_decoding``: the same model restored without its decoding (an old model:
  raw probabilities at the threshold, no intervals);
- ``ms_per_night_intervals_only``: :func:`service.results.night_intervals.decoded_extras` alone
  (the paths, the intervals and the posterior).

Times are CPU seconds of this process (``time.process_time``) per night, the median of 3 rounds;
the load average stands beside them. Run with ``.venv/bin/python bench/scoring_intervals.py``.
The last printed line is one JSON object.
"""

from __future__ import annotations

import json
import os
import statistics
import time

from models import (
    DEFAULT_PROTOCOL,
    CohortSpec,
    TrainingConfig,
    model_from_bytes,
    model_to_bytes,
    simulate_cohort,
    train_personal,
)
from service.results.night_intervals import decoded_extras, interval_seed
from service.results.scoring import compute_scoring

SEED = 20261203
ROUNDS = 3


def _per_night(fn, nights) -> float:
    """Median over rounds of CPU milliseconds per night."""
    times = []
    for _ in range(ROUNDS):
        start = time.process_time()
        for night in nights:
            fn(night)
        times.append((time.process_time() - start) / len(nights) * 1000)
    return statistics.median(times)


def main() -> None:
    spec = CohortSpec(n_participants=1, nights_min=12, nights_max=12, labelled_share=1.0, few_labels_participants=0,
                      artefacts=False, id_prefix="B")
    nights = [s.night for s in simulate_cohort(spec, seed=SEED)]
    model = train_personal(nights[:4], config=TrainingConfig(n_trials=3, seed=0)).model
    booster, meta = model_to_bytes(model)
    old = model_from_bytes(booster, {k: v for k, v in meta.items() if k != "decoding"})
    scored = nights[4:]
    with_intervals = _per_night(lambda n: compute_scoring(n, method="personal", model=model, version=1,
                                                          seed=interval_seed(n.night_id, "bench")), scored)
    without = _per_night(lambda n: compute_scoring(n, method="personal", model=old, version=1), scored)
    p_sleep = {n.night_id: model.predict_proba(n) for n in scored}
    extras = _per_night(lambda n: decoded_extras(model, n, p_sleep[n.night_id], protocol=DEFAULT_PROTOCOL, seed=1),
                        scored)
    load = os.getloadavg()
    print(json.dumps({"ms_per_night": round(with_intervals, 1), "ms_per_night_without_decoding": round(without, 1),
                      "ms_per_night_intervals_only": round(extras, 1), "n_nights": len(scored),
                      "n_epochs": int(sum(n.n_epochs for n in scored) / len(scored)),
                      "decoder": model.decoding_.info["decoder"]["decoder"] if model.decoding_ else None,
                      "load_average": [round(x, 2) for x in load]}))


if __name__ == "__main__":
    main()
