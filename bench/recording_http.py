"""A 28-day recording end to end over HTTP, on SIMULATED data.

Serves nightbank (:func:`bench._served.served`: migrated SQLite file, admin token, ``nightbank serve`` with
one worker), creates a study, then for each round posts one simulated 28-day recording of 30-s epochs as CSV
(``POST .../participants/{pid}/recordings``: read, validated, stored, non-wear and sleep periods found, nights
made of its main periods), posts its sleep diary (``POST .../recordings/{id}/diary``: periods recomputed) and
reads its day table with the Cole–Kripke rule (``GET .../recordings/{id}/days?method=cole-kripke``: every main
period's night scored and summarised). Each round uses a fresh participant (a recording posted again is only
recognised by its content), so every round is cold.

Figures: the median over rounds of each step and of the three together (``end_to_end_s``, goal <= 2 s; the
slowest round as ``end_to_end_max_s``: the first round also warms the server), the CSV's size,
and the load average before and after. The last printed line is one JSON object.

Usage: ``python bench/recording_http.py [--rounds 3]``.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import time
from pathlib import Path

import httpx
import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench._served import served  # noqa: E402
from models.simulation.recordings import RecordingSpec, SimulatedRecording, simulate_recordings  # noqa: E402

GOAL_END_TO_END_S = 2.0
STUDY = "REC-HTTP"


def _csv_bytes(sim: SimulatedRecording) -> bytes:
    rec = sim.recording
    stamps = rec.timestamps().strftime("%Y-%m-%dT%H:%M:%S%z").str.replace(r"(\d\d)(\d\d)$", r"\1:\2", regex=True)
    return pd.DataFrame({"time": stamps, "counts": rec.counts.astype(np.int64)}).to_csv(index=False).encode()


def _round(http: httpx.Client, pid: str, csv: bytes, diary: str) -> dict[str, float]:
    base = f"/v1/studies/{STUDY}/participants/{pid}/recordings"
    t0 = time.perf_counter()
    posted = http.post(base, content=csv, headers={"Content-Type": "text/csv"},
                       params={"source_name": "bench.csv"})
    posted.raise_for_status()
    t1 = time.perf_counter()
    rid = posted.json()["recording_id"]
    http.post(f"{base}/{rid}/diary", content=diary.encode(), headers={"Content-Type": "text/csv"}).raise_for_status()
    t2 = time.perf_counter()
    days = http.get(f"{base}/{rid}/days", params={"method": "cole-kripke"})
    days.raise_for_status()
    t3 = time.perf_counter()
    n_days = len(days.json()["rows"])
    if n_days < 27:
        raise RuntimeError(f"expected a row per day of the 28-day recording, got {n_days}")
    return {"post_recording_s": t1 - t0, "post_diary_s": t2 - t1, "days_s": t3 - t2, "end_to_end_s": t3 - t0}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()
    before = os.getloadavg()
    print(f"load average: {before[0]:.2f} {before[1]:.2f} {before[2]:.2f}")
    sims = simulate_recordings(RecordingSpec(n_participants=args.rounds, n_days=28), seed=99)
    rounds = []
    with served("nb-rec-http-", workers=1, job_workers=1) as inst, \
            httpx.Client(base_url=inst.base, headers=inst.headers, timeout=120) as http:
        http.post("/v1/studies", json={"study_id": STUDY, "name": "recording bench (simulated)"}).raise_for_status()
        for k, sim in enumerate(sims):
            csv = _csv_bytes(sim)
            figures = _round(http, f"R{k:02d}", csv, sim.diary_csv)
            print(f"round {k}: " + ", ".join(f"{key} {value:.3f}" for key, value in figures.items()))
            rounds.append(figures)
    after = os.getloadavg()
    result: dict[str, object] = {key: round(statistics.median(r[key] for r in rounds), 3) for key in rounds[0]}
    result |= {"end_to_end_max_s": round(max(r["end_to_end_s"] for r in rounds), 3), "rounds": len(rounds),
               "csv_megabytes": round(len(_csv_bytes(sims[0])) / 1e6, 2),
               "goal_end_to_end_s": GOAL_END_TO_END_S,
               "met": bool(result["end_to_end_s"] <= GOAL_END_TO_END_S),  # type: ignore[operator]
               "load_average_before": [round(x, 2) for x in before],
               "load_average_after": [round(x, 2) for x in after]}
    print(json.dumps(result))


if __name__ == "__main__":
    main()
