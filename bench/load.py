"""Benchmark: mixed traffic at 32 concurrent clients against a served instance.

``nightbank serve`` (a separate process, SQLite file, no training workers) gets a study of 16
simulated participants with 5 short nights each (2 h, 240 epochs; invented data). Then 32 clients
send, for ``NIGHTBANK_LOAD_SECONDS`` (default 60) seconds, a seeded mix of

- ingest (30 %): a new night, or now and then one posted before (answered 200);
- scoring (40 %): a rule method (Cole-Kripke, Sadeh, count threshold, with or without Webster
  rescoring) of a stored night;
- listings (30 %): participants of the study, nights of a participant, one night's metadata.

Figures: ``requests_per_s`` (all answered requests / wall seconds), ``p50_ms`` and ``p99_ms``
(latency of every request), ``errors`` (5xx, unexpected 4xx or transport errors), and the same
per kind. Environment: ``NIGHTBANK_LOAD_SECONDS``, ``NIGHTBANK_LOAD_CLIENTS`` (default 32),
``NIGHTBANK_LOAD_WORKERS`` (HTTP worker processes, default 2). The last printed line is one JSON
object.
"""

from __future__ import annotations

import json
import os
import random
import threading
import time

import httpx
import numpy as np
import pandas as pd
from _served import served

SEED = 20261203
N_PARTICIPANTS = 16
NIGHTS_EACH = 5
RULES = ("cole-kripke", "cole-kripke+webster", "sadeh", "sadeh+webster", "count-threshold",
         "count-threshold+webster")
MIX = (("ingest", 0.3), ("scoring", 0.4), ("listing", 0.3))


def _night_body(seed: int, participant_id: str) -> bytes:
    """A 2-h night of 30-s epochs with Poisson counts and AASM stages (simulated, seeded)."""
    from models import Night, night_to_json

    rng = np.random.default_rng(seed)
    start = pd.Timestamp("2031-03-02T22:41:00+01:00") + pd.Timedelta(days=seed % 3650)
    night = Night(participant_id=participant_id, start=start, epoch_seconds=30,
                  counts=rng.poisson(4.0, 240).astype(float),
                  reference=rng.choice(np.array(["W", "N1", "N2", "N3", "R"]), 240))
    return json.dumps(night_to_json(night)).encode()


class Traffic:
    """Shared state of the clients: stored nights, latencies and errors by kind."""

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.stored: list[tuple[str, str]] = []  # (participant id, night id)
        self.posted: list[tuple[str, bytes]] = []
        self.next_seed = 10_000
        self.latencies: dict[str, list[float]] = {kind: [] for kind, _ in MIX}
        self.errors: dict[str, int] = {kind: 0 for kind, _ in MIX}

    def new_seed(self) -> int:
        with self.lock:
            self.next_seed += 1
            return self.next_seed


def _one_request(client: httpx.Client, traffic: Traffic, rng: random.Random) -> None:
    kind = rng.choices([k for k, _ in MIX], weights=[w for _, w in MIX])[0]
    pid = f"L-{rng.randrange(N_PARTICIPANTS):02d}"
    with traffic.lock:
        pid_night = rng.choice(traffic.stored)
        again = rng.choice(traffic.posted) if traffic.posted and rng.random() < 0.1 else None
    expected: tuple[int, ...] = (200,)
    kwargs: dict = {}
    if kind == "ingest":
        pid, body = again or (pid, _night_body(traffic.new_seed(), pid))
        method, url = "POST", f"/v1/studies/load/participants/{pid}/nights"
        kwargs = {"content": body, "headers": {"Content-Type": "application/json"}}
        expected = (200,) if again else (201,)
    elif kind == "scoring":
        method, url = "GET", f"/v1/studies/load/participants/{pid_night[0]}/nights/{pid_night[1]}/scoring"
        kwargs = {"params": {"method": rng.choice(RULES)}}
    else:
        method, url = "GET", rng.choice(["/v1/studies/load/participants",
                                          f"/v1/studies/load/participants/{pid_night[0]}/nights",
                                          f"/v1/studies/load/participants/{pid_night[0]}/nights/{pid_night[1]}"])
    t0 = time.perf_counter()
    try:
        r = client.request(method, url, **kwargs)
        ok = r.status_code in expected
    except httpx.TransportError:
        r, ok = None, False
    elapsed_ms = (time.perf_counter() - t0) * 1000
    with traffic.lock:
        traffic.latencies[kind].append(elapsed_ms)
        traffic.errors[kind] += not ok
        if kind == "ingest" and ok and not again and r is not None:
            traffic.stored.append((pid, r.json()["night_id"]))
            traffic.posted.append((pid, body))


def main() -> None:
    seconds = float(os.environ.get("NIGHTBANK_LOAD_SECONDS", "60"))
    clients = int(os.environ.get("NIGHTBANK_LOAD_CLIENTS", "32"))
    workers = int(os.environ.get("NIGHTBANK_LOAD_WORKERS", "2"))
    traffic = Traffic()
    with served("nightbank-load-", workers=workers, job_workers=0) as inst:
        base, headers = inst.base, inst.headers
        with httpx.Client(base_url=base, headers=headers, timeout=60) as client:
            client.post("/v1/studies", json={"study_id": "load", "name": "load (simulated)"}).raise_for_status()
            for p in range(N_PARTICIPANTS):
                pid = f"L-{p:02d}"
                for k in range(NIGHTS_EACH):
                    r = client.post(f"/v1/studies/load/participants/{pid}/nights",
                                    content=_night_body(p * NIGHTS_EACH + k, pid),
                                    headers={"Content-Type": "application/json"})
                    r.raise_for_status()
                    traffic.stored.append((pid, r.json()["night_id"]))
        stop_at = time.perf_counter() + seconds

        def loop(k: int) -> None:
            rng = random.Random(SEED + k)
            with httpx.Client(base_url=base, headers=headers, timeout=60) as own:
                while time.perf_counter() < stop_at:
                    _one_request(own, traffic, rng)

        threads = [threading.Thread(target=loop, args=(k,)) for k in range(clients)]
        t0 = time.perf_counter()
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        wall_s = time.perf_counter() - t0
    everything = np.concatenate([np.asarray(v) for v in traffic.latencies.values()])
    figures = {
        "requests_per_s": round(everything.size / wall_s, 1),
        "p50_ms": round(float(np.percentile(everything, 50)), 1),
        "p99_ms": round(float(np.percentile(everything, 99)), 1),
        "errors": int(sum(traffic.errors.values())),
        "requests": int(everything.size),
        "seconds": round(wall_s, 1),
        "clients": clients,
        "http_workers": workers,
    }
    for kind, values in traffic.latencies.items():
        figures[f"{kind}_requests"] = len(values)
        figures[f"{kind}_p50_ms"] = round(float(np.percentile(values, 50)), 1) if values else None
        figures[f"{kind}_errors"] = traffic.errors[kind]
    print(json.dumps(figures))


if __name__ == "__main__":
    main()
