"""Access rules for every route, generated from the app's route table (new routes are covered automatically):
no token -> 401; a lower role of the same study -> 403; a token of another study -> 404 with no data."""

from __future__ import annotations

import re
from typing import Any

import pytest
from harness import bearer, cohort_bodies


def _required_role(route: Any) -> Any:
    """Highest role any dependency of the route asks for (``required_role`` set by the deps factories)."""
    roles, stack = [], list(route.dependant.dependencies)
    while stack:
        dep = stack.pop()
        role = getattr(dep.call, "required_role", None)
        if role is not None:
            roles.append(role)
        stack.extend(dep.dependencies)
    return max(roles) if roles else None


@pytest.fixture
def world(server: Any, http: Any, admin: dict[str, str], make_token: Any) -> dict[str, Any]:
    """Study s1 with one participant, a night and a job; study s2; tokens of every role."""
    for sid, name in (("s1", "Study one"), ("s2", "Study two")):
        assert http.post("/v1/studies", json={"study_id": sid, "name": name}, headers=admin).status_code == 201
    bodies = cohort_bodies(n_participants=1, nights=3)["P-01"]
    night_id = [http.post("/v1/studies/s1/participants/P-01/nights", json=b, headers=admin).json()["night_id"]
                for b in bodies][0]
    tokens = {role: make_token(role, "s1") for role in ("ingest", "reviewer", "analyst", "admin")}
    job = http.post("/v1/studies/s1/participants/P-01/training", json={}, headers=bearer(tokens["analyst"]))
    assert job.status_code == 202, job.text
    listed = http.get("/v1/tokens", headers=admin).json()
    from test_api_recordings import recording_csv, simulated

    recording = http.post("/v1/studies/s1/participants/P-01/recordings", headers={**admin, "Content-Type": "text/csv"},
                          content=recording_csv(simulated(2, seed=3, psg_nights=0)[0].recording))
    assert recording.status_code == 201, recording.text
    return {"night_id": night_id, "job_id": job.json()["job_id"], "tokens": tokens,
            "recording_id": recording.json()["recording_id"],
            "other": make_token("admin", "s2"), "token_id": listed[0]["token_id"], "app": server.app}


def _routes(app: Any):
    """(route, path, method) of every API operation under /v1, included routers flattened."""
    from fastapi.routing import APIRoute, iter_route_contexts

    for ctx in iter_route_contexts(app.routes):
        if isinstance(ctx.route, APIRoute) and ctx.path.startswith("/v1"):
            for method in sorted(ctx.methods):
                yield ctx.route, ctx.path, method


def _fill(path: str, world: dict[str, Any]) -> str:
    values = {"study": "s1", "pid": "P-01", "night_id": world["night_id"], "job_id": world["job_id"],
              "version": "1", "token_id": world["token_id"], "name": "lab-export",
              "recording_id": world["recording_id"]}
    return re.sub(r"\{(\w+)\}", lambda m: str(values[m.group(1)]), path)


def _body(path: str) -> dict[str, Any]:
    if path == "/v1/studies":
        return {"json": {"study_id": "s9", "name": "x"}}
    if path == "/v1/tokens":
        return {"json": {"role": "ingest", "study_id": "s1"}}
    if path.endswith("/nights"):
        return {"json": cohort_bodies(n_participants=1, nights=1, seed=5)["P-01"][0]}
    return {}


def test_every_route_needs_a_token_the_role_and_the_study(http: Any, world: dict[str, Any]) -> None:
    from service.store.tokens import Role

    checked, failures = 0, []
    below = {Role.reviewer: "ingest", Role.analyst: "reviewer", Role.admin: "analyst"}
    for route, path, method in _routes(world["app"]):
        url = _fill(path, world)
        kwargs = _body(path)
        r = http.request(method, url, **kwargs)
        if r.status_code != 401:
            failures.append((method, path, "no token", r.status_code))
        role = _required_role(route)
        if role in below:
            r = http.request(method, url, headers=bearer(world["tokens"][below[role]]), **kwargs)
            if r.status_code != 403:
                failures.append((method, path, f"{below[role]} token", r.status_code))
        if "{study}" in path or "{job_id}" in path:
            r = http.request(method, url, headers=bearer(world["other"]), **kwargs)
            shown = {k: v for k, v in r.json().items() if k != "instance"}  # instance echoes the caller's URL
            leaked = [v for v in ("P-01", world["night_id"], "Study one") if v in repr(shown)]
            if r.status_code != 404 or leaked:
                failures.append((method, path, "other study", r.status_code, leaked))
        checked += 1
    assert checked >= 15
    assert not failures, failures
