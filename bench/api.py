"""Benchmark: the HTTP API under load, on the embedded defaults (SQLite file, local workers).

Steps (all over HTTP, against ``nightbank serve`` started as a separate process):

1. ingest a simulated study (``models.simulate_cohort``, seeded): 32 participants, 20-30 nights
   each, with 8 concurrent clients; ``ingest_nights_per_s`` = nights stored / wall seconds;
2. train the pooled model and two personal models (few trials; training time is not a goal),
   and let the training workers store the features of the new nights, as they do between jobs
   (at most 3 minutes; ``features_ready_pct`` says how far they got);
3. 16 concurrent clients request scorings of nights not scored before, for 30 s: each request
   takes the next (night, method) pair of a shuffled list of every unlabelled night with
   ``auto`` (the participant's model), ``pooled`` and the six rule methods. Every request
   computes its result (nothing is served from the scoring cache).

The server runs with 4 HTTP worker processes and 2 training workers. Figures:
``score_p50_ms``, ``score_p99_ms`` (all requests), per-kind medians, ``errors`` (non-200
answers or transport errors), ``ingest_nights_per_s``. Goals on 2 cores: p50 <= 50 ms,
p99 <= 250 ms, 0 errors, >= 100 nights/s ingest. The last printed line is one JSON object.
"""

from __future__ import annotations

import json
import random
import sqlite3
import threading
import time
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import httpx
import numpy as np
from _served import served

SEED = 20261202
N_PARTICIPANTS = 32
SCORING_CLIENTS = 16
SCORING_SECONDS = 30.0
INGEST_CLIENTS = 8
METHODS = ("auto", "pooled", "cole-kripke", "sadeh", "count-threshold", "cole-kripke+webster", "sadeh+webster",
           "count-threshold+webster")
MODEL_METHODS = ("auto", "pooled")
WARM_LIMIT_S = 180.0


def _study() -> dict[str, list[bytes]]:
    from models import CohortSpec, night_to_json, simulate_cohort

    spec = CohortSpec(n_participants=N_PARTICIPANTS, nights_min=20, nights_max=30, labelled_share=0.05,
                      few_labels_participants=0, artefacts=False, id_prefix="B")
    out: dict[str, list[bytes]] = {}
    for sim in simulate_cohort(spec, seed=SEED):
        out.setdefault(sim.night.participant_id, []).append(json.dumps(night_to_json(sim.night)).encode())
    return out


def _wait_job(client: httpx.Client, job_id: str) -> dict:
    while True:
        job = client.get(f"/v1/jobs/{job_id}").json()
        if job["state"] in ("succeeded", "failed", "cancelled"):
            return job
        time.sleep(0.5)


def main() -> None:
    with served("nightbank-bench-", workers=4, job_workers=2) as inst:
        with httpx.Client(base_url=inst.base, headers=inst.headers, timeout=600) as client:
            client.post("/v1/studies", json={"study_id": "bench", "name": "bench (simulated)"}).raise_for_status()
            figures = _run(client, inst.base, inst.headers, inst.db_path)
    print(json.dumps(figures))


def _features_ready(path: Path) -> float:
    """Share of nights whose features are stored (read from the benchmark's own database file)."""
    with sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=30) as conn:
        nights = conn.execute("SELECT count(*) FROM nights").fetchone()[0]
        ready = conn.execute("SELECT count(DISTINCT night_pk) FROM night_features").fetchone()[0]
    return ready / nights if nights else 1.0


def _run(client: httpx.Client, base: str, headers: dict[str, str], db_path: Path) -> dict:
    study = _study()
    uploads = [(pid, body) for pid, bodies in study.items() for body in bodies]
    local = threading.local()

    def http() -> httpx.Client:
        if not hasattr(local, "client"):
            local.client = httpx.Client(base_url=base, headers=headers, timeout=120)
        return local.client

    def post(item: tuple[str, bytes]) -> tuple[str, str, bool]:
        pid, body = item
        r = http().post(f"/v1/studies/bench/participants/{pid}/nights", content=body,
                        headers={"Content-Type": "application/json"})
        r.raise_for_status()
        return pid, r.json()["night_id"], b'"reference"' in body

    start = time.perf_counter()
    with ThreadPoolExecutor(INGEST_CLIENTS) as pool:
        stored = list(pool.map(post, uploads))
    ingest_s = time.perf_counter() - start

    train_start = time.perf_counter()
    pooled = client.post("/v1/studies/bench/pooled/training", json={"n_trials": 2}).json()["job_id"]
    assert _wait_job(client, pooled)["state"] == "succeeded"
    personal = [client.post(f"/v1/studies/bench/participants/{pid}/training", json={"n_trials": 5}).json()["job_id"]
                for pid in ("B-01", "B-02")]
    for job_id in personal:
        assert _wait_job(client, job_id)["state"] == "succeeded"
    train_s = time.perf_counter() - train_start
    warm_until = time.perf_counter() + WARM_LIMIT_S
    while _features_ready(db_path) < 1.0 and time.perf_counter() < warm_until:
        time.sleep(1.0)
    features_ready = _features_ready(db_path)

    work = [(pid, night_id, method) for pid, night_id, labelled in stored if not labelled for method in METHODS]
    random.Random(SEED).shuffle(work)
    queue = deque(work)
    lock = threading.Lock()
    latencies: dict[str, list[float]] = {"model": [], "rule": []}
    errors = 0
    stop_at = time.perf_counter() + SCORING_SECONDS

    def client_loop() -> None:
        nonlocal errors
        with httpx.Client(base_url=base, headers=headers, timeout=60) as own:
            while time.perf_counter() < stop_at:
                with lock:
                    if not queue:
                        return
                    pid, night_id, method = queue.popleft()
                t0 = time.perf_counter()
                try:
                    ok = own.get(f"/v1/studies/bench/participants/{pid}/nights/{night_id}/scoring",
                                 params={"method": method}).status_code == 200
                except httpx.TransportError:
                    ok = False
                elapsed = (time.perf_counter() - t0) * 1000
                with lock:
                    latencies["model" if method in MODEL_METHODS else "rule"].append(elapsed)
                    errors += not ok

    threads = [threading.Thread(target=client_loop) for _ in range(SCORING_CLIENTS)]
    t0 = time.perf_counter()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    scoring_s = time.perf_counter() - t0
    everything = np.array(latencies["model"] + latencies["rule"])
    return {
        "score_p50_ms": round(float(np.percentile(everything, 50)), 1),
        "score_p99_ms": round(float(np.percentile(everything, 99)), 1),
        "model_p50_ms": round(float(np.percentile(latencies["model"], 50)), 1) if latencies["model"] else None,
        "rule_p50_ms": round(float(np.percentile(latencies["rule"], 50)), 1) if latencies["rule"] else None,
        "scorings": int(everything.size),
        "scorings_per_s": round(everything.size / scoring_s, 1),
        "errors": int(errors),
        "ingest_nights_per_s": round(len(stored) / ingest_s, 1),
        "nights": len(stored),
        "training_s": round(train_s, 1),
        "features_ready_pct": round(100 * features_ready, 1),
    }


if __name__ == "__main__":
    main()
