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

4. cached scorings side by side with the framework's own limit: the (night, method) pairs step 3
   answered are requested again, now served from the scoring cache, by 16 and then 64 clients,
   each for ``--cached-seconds``; between them, with the same clients, a bare FastAPI app
   (:func:`_served.bare_app`: same worker count, same route path, the same bearer check, a stored
   body of a cached scoring's median size) gets the same requests. Rounds alternate which server
   goes first; ``--rounds`` of them.

The server runs with 4 HTTP worker processes and 2 training workers. Figures:
``score_p50_ms``, ``score_p99_ms`` (all requests), per-kind medians, ``errors`` (non-200
answers or transport errors), ``ingest_nights_per_s``; for the cached scorings at ``N`` clients
``cachedN_per_s``, ``cachedN_p50_ms``, ``cachedN_p99_ms``, ``cachedN_errors``, the bare app's
``bareN_*`` and ``cachedN_ratio`` (nightbank's requests per second over the bare app's, over all
rounds; ``cachedN_round_ratios`` per round). ``load_average`` is the 1, 5 and 15 minute load
average before and after the cached rounds (the machine is shared). Goals on 2 cores: p50 <= 50 ms,
p99 <= 250 ms, 0 errors, >= 100 nights/s ingest; cached: ratio >= 0.5, p99 <= 4 x p50, 0 errors.
The last printed line is one JSON object.
"""

from __future__ import annotations

import argparse
import http.client
import json
import os
import random
import sqlite3
import threading
import time
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from urllib.parse import urlencode

import httpx
import numpy as np
from _served import served, served_bare

SEED = 20261202
N_PARTICIPANTS = 32
SCORING_CLIENTS = 16
SCORING_SECONDS = 30.0
INGEST_CLIENTS = 8
METHODS = ("auto", "pooled", "cole-kripke", "sadeh", "count-threshold", "cole-kripke+webster", "sadeh+webster",
           "count-threshold+webster")
MODEL_METHODS = ("auto", "pooled")
WARM_LIMIT_S = 180.0
HTTP_WORKERS = 4
CACHED_CLIENTS = (16, 64)


def _study(n_participants: int) -> dict[str, list[bytes]]:
    from models import CohortSpec, night_to_json, simulate_cohort

    spec = CohortSpec(n_participants=n_participants, nights_min=20, nights_max=30, labelled_share=0.05,
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
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--participants", type=int, default=N_PARTICIPANTS)
    parser.add_argument("--scoring-seconds", type=float, default=SCORING_SECONDS)
    parser.add_argument("--cached-seconds", type=float, default=8.0)
    parser.add_argument("--rounds", type=int, default=2)
    args = parser.parse_args()
    with served("nightbank-bench-", workers=HTTP_WORKERS, job_workers=2) as inst:
        with httpx.Client(base_url=inst.base, headers=inst.headers, timeout=600) as client:
            client.post("/v1/studies", json={"study_id": "bench", "name": "bench (simulated)"}).raise_for_status()
            figures, answered = _run(client, inst.base, inst.headers, inst.db_path, n_participants=args.participants,
                                     scoring_seconds=args.scoring_seconds)
            figures.update(_cached(client, inst.base, inst.headers, answered, seconds=args.cached_seconds,
                                   rounds=args.rounds))
    print(json.dumps(figures))


def _paths(answered: list[tuple[str, str, str]]) -> list[str]:
    return [f"/v1/studies/bench/participants/{pid}/nights/{night_id}/scoring?{urlencode({'method': method})}"
            for pid, night_id, method in answered]


def _hammer(base: str, headers: dict[str, str], paths: list[str], *, clients: int,
            seconds: float) -> tuple[list[float], int, float]:
    """``clients`` threads, one keep-alive connection each, cycling through ``paths`` for ``seconds``.

    Returns the latencies (ms), the number of errors (non-200 or transport errors) and the wall seconds.
    """
    host, port = base.removeprefix("http://").split(":")
    latencies: list[float] = []
    errors = [0]
    lock = threading.Lock()
    stop_at = time.perf_counter() + seconds

    def loop(start: int) -> None:
        conn = http.client.HTTPConnection(host, int(port), timeout=60)
        own: list[float] = []
        failed = 0
        i = start
        while time.perf_counter() < stop_at:
            path = paths[i % len(paths)]
            i += 1
            t0 = time.perf_counter()
            try:
                conn.request("GET", path, headers=headers)
                response = conn.getresponse()
                response.read()
                failed += response.status != 200
            except (OSError, http.client.HTTPException):
                failed += 1
                conn.close()
                conn = http.client.HTTPConnection(host, int(port), timeout=60)
            own.append((time.perf_counter() - t0) * 1000)
        conn.close()
        with lock:
            latencies.extend(own)
            errors[0] += failed

    step = max(1, len(paths) // clients)
    threads = [threading.Thread(target=loop, args=(k * step,)) for k in range(clients)]
    t0 = time.perf_counter()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return latencies, errors[0], time.perf_counter() - t0


def _cached(client: httpx.Client, base: str, headers: dict[str, str], answered: list[tuple[str, str, str]], *,
            seconds: float, rounds: int) -> dict:
    """Step 4: cached scorings against the bare app, alternating, at each of :data:`CACHED_CLIENTS`."""
    paths = _paths(answered)
    random.Random(SEED + 1).shuffle(paths)
    _hammer(base, headers, paths, clients=16, seconds=1.0)  # connections and process caches warm
    with ThreadPoolExecutor(16) as pool:  # every pair answered once more, now from the cache
        bodies = sorted(pool.map(lambda path: client.get(path).content, paths), key=len)
    sample = bodies[len(bodies) // 2]
    token = headers["Authorization"].removeprefix("Bearer ")
    load_before = [round(x, 2) for x in os.getloadavg()]
    runs: dict[tuple[str, int], list[tuple[list[float], int, float]]] = {}
    with served_bare("nightbank-bench-bare-", body=sample, token=token, workers=HTTP_WORKERS) as bare:
        targets = {"cached": base, "bare": bare.base}
        _hammer(bare.base, headers, paths, clients=16, seconds=1.0)
        for round_no in range(rounds):
            for clients in CACHED_CLIENTS:
                order = ("cached", "bare") if round_no % 2 == 0 else ("bare", "cached")
                for name in order:
                    runs.setdefault((name, clients), []).append(
                        _hammer(targets[name], headers, paths, clients=clients, seconds=seconds))
    out: dict = {"cached_pairs": len(paths), "cached_body_bytes": len(sample)}
    for clients in CACHED_CLIENTS:
        for name in ("cached", "bare"):
            done = runs[(name, clients)]
            lat = np.array([x for latencies, _, _ in done for x in latencies])
            out[f"{name}{clients}_per_s"] = round(lat.size / sum(s for _, _, s in done), 1)
            out[f"{name}{clients}_p50_ms"] = round(float(np.percentile(lat, 50)), 2)
            out[f"{name}{clients}_p99_ms"] = round(float(np.percentile(lat, 99)), 2)
            out[f"{name}{clients}_errors"] = int(sum(e for _, e, _ in done))
        out[f"cached{clients}_ratio"] = round(out[f"cached{clients}_per_s"] / out[f"bare{clients}_per_s"], 3)
        out[f"cached{clients}_round_ratios"] = [
            round((len(a[0]) / a[2]) / (len(b[0]) / b[2]), 3)
            for a, b in zip(runs[("cached", clients)], runs[("bare", clients)], strict=True)]
        out[f"cached{clients}_p99_over_p50"] = round(out[f"cached{clients}_p99_ms"] / out[f"cached{clients}_p50_ms"], 2)
    out["load_average"] = {"before_cached": load_before, "after": [round(x, 2) for x in os.getloadavg()]}
    return out


def _features_ready(path: Path) -> float:
    """Share of nights whose features are stored (read from the benchmark's own database file)."""
    with sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=30) as conn:
        nights = conn.execute("SELECT count(*) FROM nights").fetchone()[0]
        ready = conn.execute("SELECT count(DISTINCT night_pk) FROM night_features").fetchone()[0]
    return ready / nights if nights else 1.0


def _run(client: httpx.Client, base: str, headers: dict[str, str], db_path: Path, *, n_participants: int,
         scoring_seconds: float) -> tuple[dict, list[tuple[str, str, str]]]:
    study = _study(n_participants)
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
    answered: list[tuple[str, str, str]] = []
    stop_at = time.perf_counter() + scoring_seconds

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
                    if ok:
                        answered.append((pid, night_id, method))

    threads = [threading.Thread(target=client_loop) for _ in range(SCORING_CLIENTS)]
    t0 = time.perf_counter()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    scoring_s = time.perf_counter() - t0
    everything = np.array(latencies["model"] + latencies["rule"])
    return {
        "load_average_uncached": [round(x, 2) for x in os.getloadavg()],
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
    }, answered


if __name__ == "__main__":
    main()
