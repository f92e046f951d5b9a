"""Night ingest in JSON, CSV and Parquet; idempotency; every problem listed; listings and metadata."""

from __future__ import annotations

import json

import numpy as np
import pytest
from factories import make_night, night_json
from harness import LiveServer

URL = "/v1/studies/{study}/participants/{pid}/nights"


def _url(study: str, pid: str = "p1") -> str:
    return URL.format(study=study, pid=pid)


def test_json_night_is_stored_once_and_reposting_returns_the_same_id(http, study, admin) -> None:
    from models import night_from_json

    body = night_json(240, seed=3)
    first = http.post(_url(study), json=body, headers=admin)
    assert first.status_code == 201 and first.json()["created"] is True
    again = http.post(_url(study), json=body, headers=admin)
    assert again.status_code == 200 and again.json()["created"] is False
    assert again.json()["night_id"] == first.json()["night_id"]
    meta = http.get(f"{_url(study)}/{first.json()['night_id']}", headers=admin).json()
    assert meta["content_hash"] == night_from_json(body).content_hash
    assert meta["n_epochs"] == 240 and meta["epoch_seconds"] == 30 and meta["labelled"] is True
    assert meta["source_format"] == "json"
    assert http.get(_url(study), headers=admin).json()["count"] == 1


def test_same_content_as_csv_and_parquet_is_the_same_night(http, study, admin) -> None:
    from models import night_to_csv, night_to_parquet

    night = make_night(240, seed=5)
    r_csv = http.post(_url(study), content=night_to_csv(night).encode(),
                      headers=admin | {"content-type": "text/csv"})
    assert r_csv.status_code == 201
    r_pq = http.post(_url(study), content=night_to_parquet(night),
                     headers=admin | {"content-type": "application/vnd.apache.parquet"})
    assert r_pq.status_code == 200 and r_pq.json()["night_id"] == r_csv.json()["night_id"]
    # the same content under another participant is refused unless allowed, then it is that participant's own
    csv_headers = admin | {"content-type": "text/csv; charset=utf-8"}
    refused = http.post(_url(study, "p2"), content=night_to_csv(night).encode(), headers=csv_headers)
    assert refused.status_code == 409 and refused.json()["code"] == "duplicate_night"
    assert http.post(_url(study, "p2"), content=night_to_csv(night).encode(), headers=csv_headers,
                     params={"allow_duplicate": "true"}).status_code == 201


def test_naive_csv_times_need_the_tz_parameter(http, study, admin) -> None:
    rows = "\n".join(f"2031-03-02 22:{m:02d}:{s:02d},{c}" for m in range(60) for s, c in ((0, 3), (30, 0)))
    csv = ("time,counts\n" + rows + "\n").encode()
    r = http.post(_url(study), content=csv, headers=admin | {"content-type": "text/csv"})
    assert r.status_code == 422 and "missing_timezone" in {p["code"] for p in r.json()["problems"]}
    r = http.post(_url(study), content=csv, params={"tz": "Europe/Berlin"},
                  headers=admin | {"content-type": "text/csv"})
    assert r.status_code == 201
    meta = http.get(f"{_url(study)}/{r.json()['night_id']}", headers=admin).json()
    assert meta["start"] == "2031-03-02T22:00:00+01:00" and meta["labelled"] is False


def test_invalid_night_lists_every_problem_with_locations_and_stores_nothing(http, study, admin) -> None:
    from models import InvalidNightError, night_from_json

    body = night_json(240, epoch_seconds=45, bogus=1)
    body["counts"][7] = -3
    with pytest.raises(InvalidNightError) as direct:
        night_from_json(body)
    r = http.post(_url(study, "new-person"), json=body, headers=admin)
    assert r.status_code == 422 and r.headers["content-type"] == "application/problem+json"
    problem = r.json()
    assert problem["code"] == "invalid_night" and "traceback" not in r.text.lower()
    assert problem["problems"] == [p.to_dict() for p in direct.value.problems]
    assert {"unknown_field", "negative_count"} <= {p["code"] for p in problem["problems"]}
    assert any(p["location"].get("epoch") == 7 for p in problem["problems"])
    assert http.get(f"/v1/studies/{study}/participants", headers=admin).json()["count"] == 0


def test_malformed_and_unsupported_bodies(http, study, admin) -> None:
    r = http.post(_url(study), content=b"{oops", headers=admin | {"content-type": "application/json"})
    assert r.status_code == 422 and r.json()["problems"][0]["code"] == "malformed_json"
    r = http.post(_url(study), content=b"\xff\xfe\x00garbage", headers=admin | {"content-type": "text/csv"})
    assert r.status_code == 422 and r.json()["problems"][0]["code"] == "not_utf8"
    r = http.post(_url(study), content=b"<night/>", headers=admin | {"content-type": "application/xml"})
    assert r.status_code == 415 and r.json()["code"] == "unsupported_media_type"
    r = http.post(_url("nostudy"), json=night_json(240), headers=admin)
    assert r.status_code == 404


def test_body_over_the_limit_is_refused(settings, make_token) -> None:
    import httpx

    small = settings.model_copy(update={"max_body_mb": 0.01})
    token = make_token("admin")
    with LiveServer(small) as live, httpx.Client(base_url=live.url) as http:
        headers = {"Authorization": f"Bearer {token}"}
        assert http.post("/v1/studies", json={"study_id": "s", "name": "s"}, headers=headers).status_code == 201
        r = http.post("/v1/studies/s/participants/p/nights", json=night_json(2000), headers=headers)
        assert r.status_code == 413 and r.json()["code"] == "payload_too_large"


def test_night_listing_is_in_start_order_and_paginated(http, study, admin) -> None:
    starts = ["2031-03-04T22:00:00+01:00", "2031-03-02T22:00:00+01:00", "2031-03-03T22:00:00+01:00"]
    for i, start in enumerate(starts):
        body = night_json(240, seed=i, start=start, label=f"n{i}")
        assert http.post(_url(study), json=body, headers=admin).status_code == 201
    page = http.get(_url(study), params={"limit": 2}, headers=admin).json()
    assert page["count"] == 3 and [n["label"] for n in page["data"]] == ["n1", "n2"]
    assert [n["label"] for n in http.get(_url(study), params={"offset": 2}, headers=admin).json()["data"]] == ["n0"]
    assert http.get(f"{_url(study)}/{'0' * 20}", headers=admin).status_code == 404


def test_qc_flags_are_returned_and_stored(http, study, admin) -> None:
    from models import night_from_json, quality_flags

    body = night_json(480, seed=1)
    body["counts"][100:250] = [0] * 150  # 75 minutes of zeros: suspected off-wrist
    expected = [f.to_dict() for f in quality_flags(night_from_json(body))]
    assert expected, "the factory night must raise a flag for this test to mean something"
    r = http.post(_url(study), json=body, headers=admin).json()
    assert r["qc"] == json.loads(json.dumps(expected))
    assert http.get(f"{_url(study)}/{r['night_id']}", headers=admin).json()["qc"] == r["qc"]


def test_stored_arrays_rebuild_the_posted_night(http, study, admin, factory) -> None:
    from sqlalchemy import select

    from models import night_from_json
    from service.store import db
    from service.store.codec import night_from_row

    body = night_json(240, seed=9)
    body["counts"][3] = 12.5
    r = http.post(_url(study), json=body, headers=admin)
    with db.session_scope(factory) as session:
        row = session.scalar(select(db.Night).where(db.Night.night_id == r.json()["night_id"]))
        rebuilt = night_from_row(row, participant_id="p1")
    posted = night_from_json(body)
    assert rebuilt.content_hash == posted.content_hash
    np.testing.assert_array_equal(rebuilt.counts, posted.counts)
    np.testing.assert_array_equal(rebuilt.reference, posted.reference)
