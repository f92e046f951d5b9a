"""Ingest speed: parse and validate 1,000 nights of 1,000 epochs from CSV and from JSON (one core).

Last line: one JSON object, e.g. {"csv_epochs_per_s": ..., "json_epochs_per_s": ...}.
Goals: >= 1,000,000 epochs/s for CSV and >= 2,000,000 for JSON.
"""

from __future__ import annotations

import json
import os
import time

import numpy as np
import pandas as pd

os.environ.setdefault("OMP_NUM_THREADS", "1")

from models import Night, night_from_csv, night_from_json, night_to_csv, night_to_json  # noqa: E402

N_NIGHTS = int(os.environ.get("BENCH_NIGHTS", "1000"))
N_EPOCHS = 1000


def _nights() -> list[Night]:
    rng = np.random.default_rng(1)
    stages = np.array(["W", "N1", "N2", "N3", "R"])
    start = pd.Timestamp("2031-03-02T22:00:00+01:00")
    return [Night(participant_id="B", start=start + pd.Timedelta(days=i), epoch_seconds=30,
                  counts=rng.poisson(6, N_EPOCHS).astype(float), reference=rng.choice(stages, N_EPOCHS))
            for i in range(N_NIGHTS)]


def main() -> None:
    nights = _nights()
    csv_blobs = [night_to_csv(n).encode() for n in nights]
    json_blobs = [json.dumps(night_to_json(n)).encode() for n in nights]
    t0 = time.perf_counter()
    for blob in csv_blobs:
        night_from_csv(blob)
    csv_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    for blob in json_blobs:
        night_from_json(blob)
    json_s = time.perf_counter() - t0
    total = N_NIGHTS * N_EPOCHS
    print(f"CSV : {csv_s:.2f} s for {N_NIGHTS} nights ({sum(map(len, csv_blobs)) / 1e6:.1f} MB)")
    print(f"JSON: {json_s:.2f} s for {N_NIGHTS} nights ({sum(map(len, json_blobs)) / 1e6:.1f} MB)")
    print(json.dumps({"csv_epochs_per_s": round(total / csv_s), "json_epochs_per_s": round(total / json_s),
                      "nights": N_NIGHTS, "epochs_per_night": N_EPOCHS}))


if __name__ == "__main__":
    main()
