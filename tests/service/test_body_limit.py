"""Bodies the framework parses itself are bounded: 413 ``body_too_large`` before or while reading.

Over the real HTTP harness (uvicorn on a loopback port). Status 413 for a body over a server's
limit is RFC 9110 §15.5.14 (Content Too Large); the 1 MB default is common practice.
"""

from __future__ import annotations

import json
from collections.abc import Iterator

FIVE_MB = 5 * 2**20


def _assert_refused(r) -> None:  # type: ignore[no-untyped-def]
    assert r.status_code == 413, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    problem = r.json()
    assert problem["code"] == "body_too_large"
    assert "1 MB" in problem["detail"]


def _study_ids(http, admin) -> set[str]:  # type: ignore[no-untyped-def]
    r = http.get("/v1/studies", headers=admin)
    assert r.status_code == 200, r.text
    return {s["study_id"] for s in r.json()}


def test_a_5_mb_json_body_to_study_create_is_refused_before_reading(http, admin) -> None:
    body = json.dumps({"study_id": "big", "name": "x" * FIVE_MB}).encode()
    r = http.post("/v1/studies", content=body, headers={**admin, "Content-Type": "application/json"})
    _assert_refused(r)
    # the same keep-alive client goes on working, and nothing was stored
    assert "big" not in _study_ids(http, admin)
    assert http.post("/v1/studies", json={"study_id": "s2", "name": "Two"}, headers=admin).status_code == 201


def test_a_chunked_oversized_body_is_refused_while_it_arrives(http, admin) -> None:
    sent = {"bytes": 0}

    def chunks() -> Iterator[bytes]:
        yield b'{"study_id": "big", "name": "'
        for _ in range(FIVE_MB // 2**16):
            sent["bytes"] += 2**16
            yield b"x" * 2**16
        yield b'"}'

    r = http.post("/v1/studies", content=chunks(), headers={**admin, "Content-Type": "application/json"})
    _assert_refused(r)
    assert "big" not in _study_ids(http, admin)
    assert http.post("/v1/studies", json={"study_id": "s3", "name": "Three"}, headers=admin).status_code == 201


def test_a_chunked_body_under_the_limit_is_read(http, admin) -> None:
    def chunks() -> Iterator[bytes]:
        yield b'{"study_id": "c1", '
        yield b'"name": "Chunked"}'

    r = http.post("/v1/studies", content=chunks(), headers={**admin, "Content-Type": "application/json"})
    assert r.status_code == 201, r.text
    assert "c1" in _study_ids(http, admin)


def test_an_upload_keeps_its_larger_limit(http, study, admin) -> None:
    counts = list(range(240))
    night = json.dumps({"start": "2031-03-02T22:41:00+01:00", "epoch_seconds": 30, "counts": counts})
    body = (night[:-1] + " " * (2 * 2**20) + "}").encode()  # JSON allows any run of whitespace (RFC 8259 §2)
    assert len(body) > 2**20
    r = http.post(f"/v1/studies/{study}/participants/P1/nights", content=body,
                  headers={**admin, "Content-Type": "application/json"})
    assert r.status_code == 201, r.text
    big = (night[:-1] + " " * (21 * 2**20) + "}").encode()  # over NIGHTBANK_MAX_BODY_MB (20)
    r = http.post(f"/v1/studies/{study}/participants/P2/nights", content=big,
                  headers={**admin, "Content-Type": "application/json"})
    assert r.status_code == 413, r.text
    assert r.json()["code"] == "payload_too_large"
