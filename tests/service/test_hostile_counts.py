"""Implausible counts over real HTTP: refused with their epoch, nothing stored (limit: ``NightOptions``)."""

from __future__ import annotations

from typing import Any

from factories import night_json

NIGHTS = "/v1/studies/s1/participants/P01/nights"


def test_a_night_with_1e308_counts_is_refused_naming_the_epoch(http: Any, admin: dict[str, str], study: str) -> None:
    body = night_json(240)
    body["counts"][12] = 1e308  # finite, so not caught as NaN/inf; 10,000 counts/s is the limit (common practice)
    response = http.post(NIGHTS, json=body, headers=admin)
    assert response.status_code == 422, response.text
    problem = next(p for p in response.json()["problems"] if p["code"] == "implausible_count")
    assert problem["location"]["epoch"] == 12
    body["counts"][12] = 300_000  # exactly the limit of a 30-s epoch
    assert http.post(NIGHTS, json=body, headers=admin).status_code == 201
    assert http.get("/v1/studies/s1/participants/P01/nights", headers=admin).json()["count"] == 1
