"""Secrets and leaks: tokens kept only as salted hashes, constant-time checks, quiet logs, bare errors."""

from __future__ import annotations

import hashlib
import hmac
import logging
import sqlite3
from pathlib import Path

import pytest
from factories import make_night
from harness import bearer

PID = "PX-7Q4"  # a participant id distinctive enough to search the logs for
COUNT = 98765.4321  # likewise a count value
CLIENT_LOGGERS = ("httpx", "httpcore")  # the test's own HTTP client, not the service
LEAKS = ("Traceback", 'File "', "sqlalchemy", "sqlite3", "SELECT ", "INSERT ", "UPDATE ", " FROM ")


def _db_path(settings) -> Path:
    return Path(settings.db.removeprefix("sqlite:///"))


def test_tokens_are_stored_only_as_salted_hashes(settings, http, admin, make_token) -> None:
    r = http.post("/v1/tokens", json={"role": "analyst", "study_id": "s1", "label": "lab"}, headers=admin)
    assert r.status_code == 201
    tokens = [r.json()["token"], make_token("admin"), admin["Authorization"].removeprefix("Bearer ")]
    with sqlite3.connect(_db_path(settings)) as con:
        rows = {row[0]: row[1:] for row in con.execute("SELECT token_id, salt, secret_hash FROM tokens")}
        dump = "\n".join(con.iterdump())
    salts = set()
    for token in tokens:
        _, token_id, secret = token.split("_", 2)
        salt, secret_hash = rows[token_id]
        # SHA-256 over salt bytes + secret, recomputed with hashlib (Python standard library)
        assert secret_hash == hashlib.sha256(bytes.fromhex(salt) + secret.encode()).hexdigest()
        assert secret not in dump and token not in dump
        salts.add(salt)
    assert len(salts) == len(tokens)  # a fresh salt per token
    raw = b"".join(p.read_bytes() for p in _db_path(settings).parent.glob("nightbank.db*"))
    assert not any(t.split("_", 2)[2].encode() in raw for t in tokens)  # not even in WAL pages


@pytest.mark.parametrize("kind", ["wrong secret", "unknown id", "malformed"])
def test_token_check_compares_in_constant_time(factory, make_token, monkeypatch, kind) -> None:
    """Every verification, including unknown and malformed tokens, goes through hmac.compare_digest."""
    from service.errors import Unauthorized
    from service.store.db import session_scope
    from service.store.tokens import verify_token

    token = make_token("admin")
    presented = {"wrong secret": token[:-4] + "AAAA", "unknown id": "nb_000000000000_" + token[16:],
                 "malformed": "not-a-token"}[kind]
    calls = []
    real = hmac.compare_digest

    def spy(a, b):
        calls.append((len(a), len(b)))
        return real(a, b)

    monkeypatch.setattr(hmac, "compare_digest", spy)
    with session_scope(factory) as session:
        with pytest.raises(Unauthorized):
            verify_token(session, presented)
        assert verify_token(session, token).role.name == "admin"
    assert calls == [(64, 64), (64, 64)]  # equal-length digests: time does not depend on where they differ


def test_info_logs_hold_no_tokens_participants_or_counts(server, http, admin, caplog) -> None:
    from models import night_to_json

    caplog.set_level(logging.INFO)
    night = make_night(240, seed=5, participant_id=PID)
    body = night_to_json(night)
    body["counts"][7] = COUNT
    assert http.post("/v1/studies", json={"study_id": "s1", "name": "Study one"}, headers=admin).status_code == 201
    r = http.post(f"/v1/studies/s1/participants/{PID}/nights", json=body, headers=admin)
    assert r.status_code == 201
    night_id = r.json()["night_id"]
    assert http.get(f"/v1/studies/s1/participants/{PID}/nights/{night_id}/scoring", params={"method": "sadeh"},
                    headers=admin).status_code == 200
    assert http.get("/v1/studies/s1/participants", headers=admin).status_code == 200
    assert http.get(f"/v1/studies/s1/participants/{PID}/nights", headers=bearer("nb_bad")).status_code == 401
    bad = dict(body, counts=[*body["counts"][:-1], "x"])
    assert http.post(f"/v1/studies/s1/participants/{PID}/nights", json=bad, headers=admin).status_code == 422
    token = admin["Authorization"].removeprefix("Bearer ")
    service = [r for r in caplog.records if not r.name.startswith(CLIENT_LOGGERS)]
    assert any(r.name == "nightbank.http" for r in service), "the request log must be captured"
    text = "\n".join(r.getMessage() + (r.exc_text or "") for r in service)
    for secret in (token, token.split("_", 2)[2], PID, str(COUNT), "98765"):
        assert secret not in text, secret


def test_error_responses_carry_no_traceback_or_sql(settings, server, http, admin, caplog) -> None:
    assert http.post("/v1/studies", json={"study_id": "s1", "name": "Study one"}, headers=admin).status_code == 201
    url = "/v1/studies/s1/participants/P1/nights"
    provoked = [
        http.post(url, content=b"{not json", headers={**admin, "Content-Type": "application/json"}),
        http.post(url, content=b"\xff\xfe\x00", headers={**admin, "Content-Type": "application/json"}),
        http.post(url, content=b"PAR1garbagePAR1", headers={**admin, "Content-Type": "application/vnd.apache.parquet"}),
        http.post(url, content=b"time,counts\nyesterday,lots\n", headers={**admin, "Content-Type": "text/csv"}),
        http.post(url, json={"start": 1, "counts": "x"}, headers=admin),
        http.get("/v1/studies/s1/participants/x';DROP TABLE nights;--/nights", headers=admin),
        http.get("/v1/studies/s1/participants", params={"limit": 10**30}, headers=admin),
        http.get("/v1/studies/s1/participants", headers={"Authorization": "Bearer ' OR 1=1 --"}),
        http.get("/v1/nowhere", headers=admin),
    ]
    # a storage failure: the nights table disappears under the running server
    from models import night_to_json

    assert http.post(url, json=night_to_json(make_night(240)), headers=admin).status_code == 201
    with sqlite3.connect(_db_path(settings)) as con:
        con.execute("ALTER TABLE nights RENAME TO nights_gone")
    caplog.set_level(logging.INFO)
    provoked.append(http.get(url, headers=admin))
    # the failure is logged, without the query or its values
    logged = "\n".join(r.getMessage() + (r.exc_text or "") for r in caplog.records
                       if not r.name.startswith(CLIENT_LOGGERS))
    assert "storage_error" in logged and "P1" not in logged and "nights_gone" not in logged, logged[-2000:]
    assert provoked[-1].status_code == 503 and provoked[-1].json()["request_id"]
    documented = http.get("/openapi.json").json()["paths"]["/v1/studies/{study}/participants/{pid}/nights"]["get"]
    assert "503" in documented["responses"]
    for r in provoked:
        assert r.status_code >= 400 and r.headers["content-type"].startswith("application/problem+json"), r.text
        assert not [leak for leak in LEAKS if leak in r.text], r.text


def test_token_cache_forgets_a_token_after_its_time_and_keeps_no_token_text() -> None:
    import time

    from service.store.tokens import Principal, Role, TokenCache

    token = "nb_0123456789ab_" + "s" * 43
    principal = Principal(token_id="0123456789ab", role=Role.analyst, study_id="s1")
    cache = TokenCache(0.2, max_entries=2)
    cache.put(token, principal)
    assert cache.get(token) == principal and cache.get(token + "x") is None
    assert token not in repr(vars(cache)) and "s" * 43 not in repr(vars(cache))  # keyed by SHA-256 only
    time.sleep(0.3)
    assert cache.get(token) is None  # a revocation takes effect within ttl_s
    disabled = TokenCache(0)
    disabled.put(token, principal)
    assert disabled.get(token) is None
