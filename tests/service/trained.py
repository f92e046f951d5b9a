"""Tiny real trainings for tests that need stored versions, trained once per test session.

A training job is queued over HTTP and run in this process by the service's own job code
(:func:`service.jobs.training.run_training_job`); the :mod:`models` training call inside it is
remembered by its inputs (the function, the nights' content hashes and the training options), so
the second database backend of a test stores the very same model without fitting it again. Nothing
of the service is replaced: the job reads the nights, builds the metadata and stores the version
(held-out predictions, fold models) exactly as a worker would.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from harness import cohort_bodies

_RESULTS: dict[str, Any] = {}


def _key(function: Callable[..., Any], kwargs: dict[str, Any]) -> str:
    nights = kwargs["nights"]
    groups = nights.values() if isinstance(nights, dict) else [nights]
    hashes = sorted(n.content_hash for group in groups for n in group)
    config = kwargs["config"].to_dict()
    return repr((function.__name__, hashes, sorted(config.items()), kwargs.get("base") is not None))


def remembered_compute(function: Callable[..., Any], kwargs: dict[str, Any], progress: Any) -> Any:
    """``function(**kwargs)`` computed once per distinct input in this test session."""
    key = _key(function, kwargs)
    if key not in _RESULTS:
        _RESULTS[key] = function(**kwargs, progress=progress)
    return _RESULTS[key]


def post_cohort(http: Any, *, study: str = "s1", n_participants: int = 3, nights: int = 3,
                seed: int = 5) -> dict[str, list[str]]:
    """Post a simulated labelled cohort; night ids per participant (``P-01``, ...). The nights' labels
    (``lab-1``, ...) do not spell the participant ids, so a search for an id finds only records naming it."""
    out: dict[str, list[str]] = {}
    k = 0
    for pid, bodies in cohort_bodies(n_participants=n_participants, nights=nights, seed=seed).items():
        for body in bodies:
            k += 1
            r = http.post(f"/v1/studies/{study}/participants/{pid}/nights", json=body | {"label": f"lab-{k}"})
            assert r.status_code == 201, r.text
            out.setdefault(pid, []).append(r.json()["night_id"])
    return out


def train_here(world: Any, participant_id: str | None = None, *, study: str = "s1") -> dict[str, Any]:
    """Queue a training over HTTP (n_trials=2, seed 0), run it here, and return the job's result."""
    from service.jobs.queue import JobState, claim_job, finish_job
    from service.jobs.training import run_training_job

    url = (f"/v1/studies/{study}/pooled/training" if participant_id is None
           else f"/v1/studies/{study}/participants/{participant_id}/training")
    queued = world.http.post(url, json={"n_trials": 2, "seed": 0})
    assert queued.status_code == 202, queued.text
    settings = world.server.app.state.settings
    job = claim_job(world.factory, worker_id="here", lease_s=120, max_attempts=3)
    assert job is not None and job.job_id == queued.json()["job_id"]
    result = run_training_job(job, factory=world.factory, settings=settings, progress=lambda *_: None,
                              compute=remembered_compute)
    assert finish_job(world.factory, job.job_id, worker_id="here", state=JobState.succeeded, result=result)
    return result
