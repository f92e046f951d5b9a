"""Studies, participants, tokens and roles, consent withdrawal (real HTTP, real SQLite file)."""

from __future__ import annotations

from factories import night_json
from harness import bearer


def _post_night(http, headers, study: str, pid: str, seed: int = 0, **extra):
    """A 2-h night starting on day ``seed`` after 2 March 2031, so that nights of one participant never overlap."""
    extra.setdefault("start", f"2031-03-{2 + seed:02d}T22:41:00+01:00")
    return http.post(f"/v1/studies/{study}/participants/{pid}/nights", json=night_json(240, seed=seed, **extra),
                     headers=headers)


def test_routes_need_a_token_except_healthz(http, study) -> None:
    assert http.get("/healthz").json()["status"] == "ok"
    for method, url in [("GET", "/v1/studies"), ("POST", "/v1/studies"), ("GET", "/metrics"),
                        ("GET", f"/v1/studies/{study}/participants"),
                        ("POST", f"/v1/studies/{study}/participants/p1/nights"),
                        ("GET", "/v1/jobs/" + "0" * 32)]:
        r = http.request(method, url)
        assert r.status_code == 401, url
        assert r.headers["content-type"] == "application/problem+json"
        assert r.json()["code"] == "unauthorized"
    r = http.get("/v1/studies", headers=bearer("nb_000000000000_not-a-real-secret"))
    assert r.status_code == 401


def test_revoked_token_is_refused_once_the_cache_entry_expires(http, make_token, factory, settings) -> None:
    import time

    from service.store.db import session_scope
    from service.store.tokens import list_tokens, revoke_token

    token = make_token("admin")
    assert http.get("/v1/studies", headers=bearer(token)).status_code == 200
    with session_scope(factory, write=True) as session:
        revoke_token(session, list_tokens(session)[0].token_id)
    time.sleep(settings.token_cache_s + 0.1)
    assert http.get("/v1/studies", headers=bearer(token)).status_code == 401


def test_create_study_needs_admin_and_a_study_admin_creates_only_its_study(http, make_token) -> None:
    body = {"study_id": "s2", "name": "Two"}
    r = http.post("/v1/studies", json=body, headers=bearer(make_token("analyst", "s2")))
    assert r.status_code == 403 and r.json()["code"] == "forbidden"
    r = http.post("/v1/studies", json=body, headers=bearer(make_token("admin", "other")))
    assert r.status_code == 403
    r = http.post("/v1/studies", json=body, headers=bearer(make_token("admin", "s2")))
    assert r.status_code == 201 and r.json()["study_id"] == "s2"
    r = http.post("/v1/studies", json=body, headers=bearer(make_token("admin")))
    assert r.status_code == 409 and r.json()["code"] == "conflict"


def test_study_body_is_strict(http, admin) -> None:
    for body in ({"study_id": "ok", "name": "x", "extra": 1}, {"study_id": "bad id!", "name": "x"},
                 {"study_id": "ok", "name": 5}, {"study_id": "ok"}):
        r = http.post("/v1/studies", json=body, headers=admin)
        assert r.status_code == 422, body
        problems = r.json()["problems"]
        assert problems and all({"code", "message", "location"} <= set(p) for p in problems)
    r = http.post("/v1/studies", content=b"{not json", headers=admin | {"content-type": "application/json"})
    assert r.status_code in (400, 422) and r.headers["content-type"] == "application/problem+json"


def test_study_scoped_token_gets_404_for_another_study_and_403_for_a_higher_role(http, study, make_token,
                                                                                 admin) -> None:
    assert http.post("/v1/studies", json={"study_id": "s2", "name": "Two"}, headers=admin).status_code == 201
    assert _post_night(http, admin, "s2", "p1").status_code == 201
    other = bearer(make_token("admin", "s1"))
    for url in ["/v1/studies/s2/participants", "/v1/studies/s2/participants/p1/nights"]:
        r = http.get(url, headers=other)
        assert r.status_code == 404 and r.json()["code"] == "not_found"
    assert http.get("/v1/studies/nope/participants", headers=other).status_code == 404
    assert [s["study_id"] for s in http.get("/v1/studies", headers=other).json()] == ["s1"]
    ingest = bearer(make_token("ingest", "s1"))
    assert http.get(f"/v1/studies/{study}/participants", headers=ingest).status_code == 200
    r = http.delete(f"/v1/studies/{study}/participants/p1", headers=ingest)
    assert r.status_code == 403
    r = http.post(f"/v1/studies/{study}/pooled/training", headers=ingest)
    assert r.status_code == 403
    # a lower role on another study still sees nothing: 404 before 403
    assert http.delete("/v1/studies/s2/participants/p1", headers=ingest).status_code == 404


def test_participants_listing_is_paginated_and_counts_nights(http, study, admin) -> None:
    for i, pid in enumerate(["p3", "p1", "p2"]):
        assert _post_night(http, admin, study, pid, seed=i).status_code == 201
    assert _post_night(http, admin, study, "p1", seed=10, reference=None).status_code == 201
    page = http.get(f"/v1/studies/{study}/participants", params={"limit": 2}, headers=admin).json()
    assert page["count"] == 3 and [p["participant_id"] for p in page["data"]] == ["p1", "p2"]
    assert page["data"][0]["n_nights"] == 2 and page["data"][0]["n_labelled_nights"] == 1
    assert page["data"][0]["retrain_would_add_nights"] is True
    page = http.get(f"/v1/studies/{study}/participants", params={"limit": 2, "offset": 2}, headers=admin).json()
    assert [p["participant_id"] for p in page["data"]] == ["p3"]
    assert http.get(f"/v1/studies/{study}/participants", params={"limit": 0}, headers=admin).status_code == 422


def test_consent_withdrawal_removes_nights_and_keeps_an_audit_record(http, server, study, admin, factory) -> None:
    from sqlalchemy import func, select

    from service.store import db
    from service.store.audit import list_audit

    night_id = _post_night(http, admin, study, "p1").json()["night_id"]
    assert _post_night(http, admin, study, "p1", seed=1).status_code == 201
    assert http.get(f"/v1/studies/{study}/participants/p1/nights/{night_id}/scoring",
                    params={"method": "sadeh"}, headers=admin).status_code == 200
    server.app.state.cache_writer.flush()  # scorings are stored in the background
    r = http.delete(f"/v1/studies/{study}/participants/p1", headers=admin)
    assert r.status_code == 200
    assert r.json() == {"nights": 2, "scorings": 1, "personal_versions": 0, "pooled_versions": 0}
    assert http.get(f"/v1/studies/{study}/participants/p1/nights", headers=admin).status_code == 404
    with db.session_scope(factory) as session:
        assert session.scalar(select(func.count()).select_from(db.Night)) == 0
        assert session.scalar(select(func.count()).select_from(db.Scoring)) == 0
        entries = [e for e in list_audit(session, study_id=study) if e.action == "participant.delete"]
    assert len(entries) == 1 and entries[0].subject == "p1" and entries[0].detail["nights"] == 2
    assert http.delete(f"/v1/studies/{study}/participants/p1", headers=admin).status_code == 404


def test_every_write_is_audited_with_actor(http, study, make_token, factory) -> None:
    from service.store.audit import list_audit
    from service.store.db import session_scope

    token = make_token("ingest", study)
    assert _post_night(http, bearer(token), study, "p1").status_code == 201
    with session_scope(factory) as session:
        entries = list_audit(session)
    token_id = token.split("_")[1]
    mine = {e.action for e in entries if e.actor == token_id}
    assert mine == {"night.create", "participant.create"}
    assert all(e.at.tzinfo is not None for e in entries)
