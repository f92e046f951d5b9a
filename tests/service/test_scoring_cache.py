"""Stored scorings served from the process's byte cache: the same bytes as computed, the same access checks,
and a new answer as soon as the night, the active version or the protocol changes (real HTTP, real SQLite file;
changes made through the store in the test process, as another server process would make them)."""

from __future__ import annotations

import time

import pytest
from factories import night_json
from harness import bearer, cohort_bodies, wait_for


def _scoring_url(study: str, pid: str, night_id: str) -> str:
    return f"/v1/studies/{study}/participants/{pid}/nights/{night_id}/scoring"


def _post(http, headers, study: str, pid: str, body: dict) -> str:
    r = http.post(f"/v1/studies/{study}/participants/{pid}/nights", json=body, headers=headers)
    assert r.status_code == 201, r.text
    return r.json()["night_id"]


def _kept(server, body: bytes) -> bool:
    """Whether the server process keeps ``body`` among its ready response bytes."""
    cache = server.app.state.scoring_cache
    with cache._lock:
        return any(kept == body for kept in cache._bodies.values())


def test_kept_bytes_are_the_computed_bytes_and_access_stays_checked(http, server, study, admin, make_token,
                                                                  factory, settings) -> None:
    from service.store.db import session_scope
    from service.store.tokens import list_tokens, revoke_token

    night_id = _post(http, admin, study, "p1", night_json(240, seed=3))
    url = _scoring_url(study, "p1", night_id)
    analyst = make_token("analyst", study)
    first = http.get(url, params={"method": "sadeh"}, headers=bearer(analyst))
    server.app.state.cache_writer.flush()  # stored in the background
    second = http.get(url, params={"method": "sadeh"}, headers=bearer(analyst))  # from the stored row
    third = http.get(url, params={"method": "sadeh"}, headers=bearer(analyst))  # from the kept bytes
    assert first.status_code == second.status_code == third.status_code == 200
    assert first.content == second.content == third.content
    assert _kept(server, first.content)

    # roles and study scope are checked before the cache: a lower role and another study's token get nothing
    assert http.get(url, params={"method": "sadeh"}, headers=bearer(make_token("ingest", study))).status_code == 403
    assert http.get(url, params={"method": "sadeh"}, headers=bearer(make_token("admin", "other"))).status_code == 404
    assert http.get(url, params={"method": "sadeh"}).status_code == 401

    # a revoked token is refused once its verification expires, although its answer is still kept
    with session_scope(factory, write=True) as session:
        token_id = next(t.token_id for t in list_tokens(session) if t.role == "analyst")
        revoke_token(session, token_id)
    time.sleep(settings.token_cache_s + 0.1)
    refused = http.get(url, params={"method": "sadeh"}, headers=bearer(analyst))
    assert refused.status_code == 401 and refused.json()["code"] == "unauthorized"
    assert _kept(server, first.content)
    assert http.get(url, params={"method": "sadeh"}, headers=bearer(make_token("analyst", study))).content \
        == first.content


def test_a_deleted_night_is_not_served_from_the_kept_bytes(http, server, study, admin) -> None:
    night_id = _post(http, admin, study, "p1", night_json(240, seed=4))
    url = _scoring_url(study, "p1", night_id)
    http.get(url, params={"method": "cole-kripke"}, headers=admin)
    server.app.state.cache_writer.flush()
    kept = http.get(url, params={"method": "cole-kripke"}, headers=admin)
    assert kept.status_code == 200 and _kept(server, kept.content)
    assert http.delete(f"/v1/studies/{study}/participants/p1/nights/{night_id}", headers=admin).status_code == 200
    gone = http.get(url, params={"method": "cole-kripke"}, headers=admin)
    assert gone.status_code == 404 and gone.json()["code"] == "not_found"
    # posted again (same content, same id): computed afresh, the same bytes as before
    assert _post(http, admin, study, "p1", night_json(240, seed=4)) == night_id
    assert http.get(url, params={"method": "cole-kripke"}, headers=admin).content == kept.content


def test_a_protocol_set_by_another_process_changes_the_kept_answer(http, server, study, admin, factory) -> None:
    from service.store.db import session_scope
    from service.store.protocols import save_protocol

    night_id = _post(http, admin, study, "p1", night_json(240, seed=5))
    url = _scoring_url(study, "p1", night_id)
    http.get(url, params={"method": "sadeh"}, headers=admin)
    server.app.state.cache_writer.flush()
    before = http.get(url, params={"method": "sadeh"}, headers=admin).json()
    with session_scope(factory, write=True) as session:  # not through the server: no hook can tell it
        save_protocol(session, study_id=study, body={"waso_end": "final_awakening"}, actor="test")
    after = http.get(url, params={"method": "sadeh"}, headers=admin).json()
    assert before["protocol"]["waso_end"] == "lights_on" and after["protocol"]["waso_end"] == "final_awakening"


@pytest.mark.slow
def test_activation_and_the_model_floor_change_the_kept_model_answers(http, server, study, admin, factory,
                                                                     start_worker) -> None:
    from service.store.db import session_scope
    from service.store.protocols import save_protocol
    from service.store.registry import find_study
    from service.store.versions import activate_version

    ids: dict[str, list[str]] = {}
    for pid, bodies in cohort_bodies(n_participants=3, nights=3).items():
        ids[pid] = [_post(http, admin, study, pid, body) for body in bodies]
    start_worker()
    for _ in range(2):  # two pooled versions
        job_id = http.post(f"/v1/studies/{study}/pooled/training", json={"n_trials": 1}, headers=admin).json()["job_id"]
        job = wait_for(lambda j=job_id: (lambda s: s if s["state"] in ("succeeded", "failed") else None)(
            http.get(f"/v1/jobs/{j}", headers=admin).json()))
        assert job["state"] == "succeeded", job["error"]
    with session_scope(factory, write=True) as session:  # version 1 active, whatever promotion decided
        activate_version(session, study=find_study(session, study), participant=None, version=1, actor="test")
    url = _scoring_url(study, "P-02", ids["P-02"][0])

    def served(method: str) -> dict:
        http.get(url, params={"method": method}, headers=admin)
        server.app.state.cache_writer.flush()
        r = http.get(url, params={"method": method}, headers=admin)
        assert r.status_code == 200 and _kept(server, r.content)
        return r.json()

    assert served("pooled")["model_version"] == 1 and served("auto")["model_version"] == 1
    with session_scope(factory, write=True) as session:  # a rollforward made by another process
        activate_version(session, study=find_study(session, study), participant=None, version=2, actor="test")
    assert served("pooled")["model_version"] == 2 and served("auto")["model_version"] == 2
    with session_scope(factory, write=True) as session:  # a floor no model reaches: auto falls back to the rule
        save_protocol(session, study_id=study, body={"model_floor": 0.999}, actor="test")
    auto = served("auto")
    assert auto["method"] == "cole-kripke" and auto["model_version"] is None
    assert "pooled+offset" in auto["auto"]["passed_over"]
