"""Benchmark: the review queue and review context over HTTP (SIMULATED data, `nightbank serve` on SQLite,
one HTTP worker).

A simulated study (``models.simulate_cohort``, seeded): 12 participants with 12 nights each, the
first 2 of each labelled (PSG), the rest without a reference. The pooled model is trained (few
trials), so the deployed scoring is a model (``pooled+offset``) for every participant. Then:

- ``training_job_s``: the pooled training job, from its request to its success; it ends by
  preparing the review queue (:mod:`service.jobs.queue_warm`: features and scorings of the nights
  without PSG with the new model, stored);
- ``queue_cold_s``: the first ``GET /review-queue`` after the training (the stored scorings of
  every queued night with ``auto`` and two rules read in bulk, :mod:`service.results.bulk_scoring`,
  and ranked); goal: a few seconds for ~120 nights. Latest: 1.78 s, the training job 53.7 s (load
  average 5.2). Before the queue was prepared by the training job the request scored every night
  itself, one request's work per night and method: 28.6 s, the training job 19.6 s (load average 5.5);
- ``queue_warm_ms``: the median of 5 further requests (scorings read from the cache);
- ``context_warm_ms``: the median of 5 ``GET .../review-context`` of queued nights (the page's
  request; it ranks the queue for the neighbours);
- ``n_queued``. Goal on 2 cores (common practice for an interactive page): warm queue and
  context <= 1000 ms for ~120 queued nights. The last printed line is one JSON object.
"""

from __future__ import annotations

import json
import os
import statistics
import time

import httpx
from _served import served

SEED = 20261203
N_PARTICIPANTS = 12
NIGHTS = 12
LABELLED = 2


def _bodies() -> dict[str, list[dict]]:
    from models import CohortSpec, night_to_json, simulate_cohort

    spec = CohortSpec(n_participants=N_PARTICIPANTS, nights_min=NIGHTS, nights_max=NIGHTS, labelled_share=1.0,
                      few_labels_participants=0, artefacts=False, id_prefix="Q")
    out: dict[str, list[dict]] = {}
    for sim in simulate_cohort(spec, seed=SEED):
        out.setdefault(sim.night.participant_id, []).append(night_to_json(sim.night))
    return out


def _timed_ms(client: httpx.Client, url: str) -> float:
    start = time.perf_counter()
    client.get(url).raise_for_status()
    return (time.perf_counter() - start) * 1000.0


def main() -> None:
    with served("nightbank-bench-queue-", workers=1, job_workers=1, start_timeout_s=240) as inst, \
            httpx.Client(base_url=inst.base, headers=inst.headers, timeout=900) as client:
        client.post("/v1/studies", json={"study_id": "q", "name": "queue bench (simulated)"}).raise_for_status()
        for pid, bodies in _bodies().items():
            for i, body in enumerate(bodies):
                if i >= LABELLED:
                    body = {k: v for k, v in body.items() if k != "reference"}
                client.post(f"/v1/studies/q/participants/{pid}/nights", json=body).raise_for_status()
        job_start = time.perf_counter()
        job_id = client.post("/v1/studies/q/pooled/training", json={"n_trials": 2}).json()["job_id"]
        while (job := client.get(f"/v1/jobs/{job_id}").json())["state"] not in ("succeeded", "failed", "cancelled"):
            time.sleep(0.5)
        assert job["state"] == "succeeded", job.get("error")
        job_s = time.perf_counter() - job_start
        cold_ms = _timed_ms(client, "/v1/studies/q/review-queue?limit=500")
        warm = [_timed_ms(client, "/v1/studies/q/review-queue?limit=500") for _ in range(5)]
        queue = client.get("/v1/studies/q/review-queue?limit=500").json()
        context = [_timed_ms(client, f"/v1/studies/q/participants/{item['participant_id']}/nights/"
                                     f"{item['night_id']}/review-context") for item in queue["data"][:5]]
    figures = {"training_job_s": round(job_s, 1),
               "queue_cold_s": round(cold_ms / 1000.0, 2), "queue_warm_ms": round(statistics.median(warm), 1),
               "context_warm_ms": round(statistics.median(context), 1), "n_queued": queue["count"],
               "load_average": [round(v, 2) for v in os.getloadavg()]}
    print(json.dumps(figures))


if __name__ == "__main__":
    main()
