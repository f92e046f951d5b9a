"""Size limits of ingest: documented in the OpenAPI document, configurable, and enforced with problems."""

from __future__ import annotations


def test_night_over_the_epoch_limit_is_refused_with_422(http, study, admin) -> None:
    from models import NightOptions

    limit = NightOptions().max_epochs
    body = {"start": "2031-03-02T22:41:00+01:00", "epoch_seconds": 15, "counts": [1] * (limit + 1)}
    r = http.post(f"/v1/studies/{study}/participants/P1/nights", json=body, headers=admin)
    assert r.status_code == 422, r.text
    assert "too_many_epochs" in {p["code"] for p in r.json()["problems"]}
    assert http.get(f"/v1/studies/{study}/participants", headers=admin).json()["count"] == 0


def test_body_limit_is_read_from_the_environment(monkeypatch) -> None:
    from service.config import Settings

    monkeypatch.setenv("NIGHTBANK_MAX_BODY_MB", "0.5")
    assert Settings().max_body_mb == 0.5


def test_limits_are_documented(http) -> None:
    ingest = http.get("/openapi.json").json()["paths"]["/v1/studies/{study}/participants/{pid}/nights"]["post"]
    for status in ("413", "415", "422"):
        assert "application/problem+json" in ingest["responses"][status]["content"], status
