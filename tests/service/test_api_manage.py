"""Managing stored data over real HTTP, on SQLite and PostgreSQL: the study's epoch length, duplicate,
overlap and id-case refusals (also under concurrent posts), night arrays, corrections and deletion,
participant renames, version numbers that are never reused, and the jobs listing."""

from __future__ import annotations

import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from backends import BACKENDS, World, live_world
from factories import make_night

START = "2031-03-02T22:41:00+01:00"


@pytest.fixture(params=BACKENDS)
def world(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[World]:
    with live_world(request.param, tmp_path) as out:
        yield out


def _body(*, seed: int = 0, start: str = START, n_epochs: int = 240, epoch_seconds: int = 30, **extra) -> dict:
    from models import night_to_json

    night = make_night(n_epochs, seed=seed, start=start, epoch_seconds=epoch_seconds)
    return {**night_to_json(night), **extra}


def _nights(study: str, pid: str) -> str:
    return f"/v1/studies/{study}/participants/{pid}/nights"


def _count_nights(factory: Any, **where: Any) -> int:
    from sqlalchemy import func, select

    from service.store import db

    with db.session_scope(factory) as session:
        query = select(func.count()).select_from(db.Night)
        for column, value in where.items():
            query = query.where(getattr(db.Night, column) == value)
        return int(session.scalar(query) or 0)


def test_same_content_for_another_participant_is_refused_naming_them(world: World) -> None:
    http, body = world.http, _body(seed=1)
    first = http.post(_nights("s1", "P01"), json=body)
    assert first.status_code == 201
    refused = http.post(_nights("s1", "P02"), json=body)
    assert refused.status_code == 409 and refused.headers["content-type"] == "application/problem+json"
    assert refused.json()["code"] == "duplicate_night" and "'P01'" in refused.json()["detail"]
    assert [p["participant_id"] for p in http.get("/v1/studies/s1/participants").json()["data"]] == ["P01"]
    again = http.post(_nights("s1", "P01"), json=body)  # the same file to the same participant: not a conflict
    assert again.status_code == 200 and again.json()["night_id"] == first.json()["night_id"]
    allowed = http.post(_nights("s1", "P02"), json=body, params={"allow_duplicate": "true"})
    assert allowed.status_code == 201 and allowed.json()["night_id"] == first.json()["night_id"]


def test_overlapping_night_is_refused_naming_the_stored_night(world: World) -> None:
    http = world.http
    stored = http.post(_nights("s1", "P01"), json=_body(seed=1, label="n1")).json()["night_id"]
    end = pd.Timestamp(START) + pd.Timedelta(seconds=240 * 30)  # [start, end) of the stored night, by pandas
    inside = (pd.Timestamp(START) + pd.Timedelta(hours=1)).isoformat()
    refused = http.post(_nights("s1", "P01"), json=_body(seed=2, start=inside))
    assert refused.status_code == 409 and refused.json()["code"] == "overlapping_night"
    assert stored in refused.json()["detail"] and "'n1'" in refused.json()["detail"]
    # touching intervals do not overlap: one starting at the end, one ending at the start
    assert http.post(_nights("s1", "P01"), json=_body(seed=3, start=end.isoformat())).status_code == 201
    before = (pd.Timestamp(START) - pd.Timedelta(seconds=240 * 30)).isoformat()
    assert http.post(_nights("s1", "P01"), json=_body(seed=4, start=before)).status_code == 201
    assert http.post(_nights("s1", "P02"), json=_body(seed=2, start=inside)).status_code == 201  # another person
    assert _count_nights(world.factory) == 4
    assert http.post(_nights("s1", "P01"), json=_body(seed=5, start=inside)).status_code == 409
    allowed = http.post(_nights("s1", "P01"), json=_body(seed=5, start=inside), params={"allow_overlap": "true"})
    assert allowed.status_code == 201


def test_participant_ids_differing_only_by_case_are_refused(world: World) -> None:
    http = world.http
    assert http.post(_nights("s1", "P01"), json=_body(seed=1)).status_code == 201
    refused = http.post(_nights("s1", "p01"), json=_body(seed=2, start="2031-04-02T22:41:00+01:00"))
    assert refused.status_code == 409 and refused.json()["code"] == "participant_id_case_clash"
    assert "'P01'" in refused.json()["detail"]
    assert http.get("/v1/studies/s1/participants").json()["count"] == 1
    assert http.get(_nights("s1", "p01")).status_code == 404


def test_concurrent_posts_store_one_duplicate_and_one_of_overlapping_nights(world: World) -> None:
    import httpx

    from models import night_from_json

    same = _body(seed=7)
    overlapping = [_body(seed=20 + i, start=(pd.Timestamp(START) + pd.Timedelta(minutes=10 * i)).isoformat())
                   for i in range(8)]
    jobs = [(f"D{i}", same) for i in range(8)] + [("Q", b) for b in overlapping]
    barrier = threading.Barrier(len(jobs))
    statuses: dict[int, tuple[int, str]] = {}

    def post(k: int, pid: str, body: dict) -> None:
        with httpx.Client(base_url=world.url, headers=world.http.headers, timeout=60) as client:
            barrier.wait()
            r = client.post(_nights("s1", pid), json=body)
            statuses[k] = (r.status_code, r.json().get("code", ""))

    threads = [threading.Thread(target=post, args=(k, pid, body)) for k, (pid, body) in enumerate(jobs)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    duplicates = sorted(statuses[k] for k in range(8))
    overlaps = sorted(statuses[k] for k in range(8, 16))
    assert duplicates == [(201, "")] + [(409, "duplicate_night")] * 7, duplicates
    assert overlaps == [(201, "")] + [(409, "overlapping_night")] * 7, overlaps
    assert _count_nights(world.factory, content_hash=night_from_json(same).content_hash) == 1
    assert _count_nights(world.factory) == 2
    assert http_count(world, "/v1/studies/s1/participants") == 2  # the refused participants were not created


def http_count(world: World, url: str) -> int:
    return int(world.http.get(url).json()["count"])


def test_nights_are_stored_at_the_study_epoch_length(world: World) -> None:
    from models import night_from_json

    http = world.http
    created = http.post("/v1/studies", json={"study_id": "m", "name": "Minute epochs", "epoch_seconds": 60})
    assert created.status_code == 201 and created.json()["epoch_seconds"] == 60
    assert {s["study_id"]: s["epoch_seconds"] for s in http.get("/v1/studies").json()} == {"s1": 30, "m": 60}
    for bad in (45, 15, "60"):
        r = http.post("/v1/studies", json={"study_id": "x", "name": "x", "epoch_seconds": bad})
        assert r.status_code == 422 and r.json()["problems"][0]["location"]["field"] == "epoch_seconds"
    posted = _body(seed=3)  # 30-s epochs into a 60-s study: pairs summed
    r = http.post(_nights("m", "P01"), json=posted)
    assert r.status_code == 201 and (r.json()["epoch_seconds"], r.json()["source_epoch_seconds"]) == (60, 30)
    out = http.get(f"{_nights('m', 'P01')}/{r.json()['night_id']}", params={"epochs": "true"}).json()
    assert (out["epoch_seconds"], out["n_epochs"], out["source_epoch_seconds"]) == (60, 120, 30)
    counts = np.asarray(posted["counts"], dtype=float)
    np.testing.assert_array_equal(out["counts"], counts.reshape(-1, 2).sum(axis=1))  # numpy sum of each pair
    pairs = np.asarray(night_from_json(posted).reference).reshape(-1, 2)
    agree = pairs[:, 0] == pairs[:, 1]  # both halves one stage: the AASM majority rule gives that stage (from memory)
    assert agree.any() and list(np.asarray(out["reference"])[agree]) == list(pairs[agree, 0])
    again = http.post(_nights("m", "P01"), json=posted)
    assert again.status_code == 200 and again.json()["night_id"] == r.json()["night_id"]
    quarter = _body(seed=4, n_epochs=480, epoch_seconds=15, start="2031-03-05T22:41:00+01:00")
    r = http.post(_nights("m", "P01"), json=quarter)
    assert r.status_code == 201 and r.json()["source_epoch_seconds"] == 15
    out = http.get(f"{_nights('m', 'P01')}/{r.json()['night_id']}", params={"epochs": "true"}).json()
    np.testing.assert_array_equal(out["counts"], np.asarray(quarter["counts"], dtype=float).reshape(-1, 4).sum(1))
    # a 60-s night cannot become 30-s epochs
    refused = http.post(_nights("s1", "P01"), json=_body(seed=5, n_epochs=120, epoch_seconds=60))
    assert refused.status_code == 422 and refused.json()["code"] == "epoch_length_mismatch"
    assert "60-s" in refused.json()["detail"] and "30-s" in refused.json()["detail"]
    assert refused.json()["problems"][0]["location"] == {"field": "epoch_seconds"}
    assert http_count(world, "/v1/studies/s1/participants") == 0
    listed = http.get(_nights("s1", "P01"))
    assert listed.status_code == 404


def test_night_arrays_are_the_posted_ones(world: World) -> None:
    from models import NightOptions, night_from_json

    http = world.http
    body = _body(seed=6)
    body["counts"][10:14] = [None] * 4  # missing epochs, accepted with fill_gaps
    r = http.post(_nights("s1", "P01"), json=body, params={"fill_gaps": "true"})
    assert r.status_code == 201, r.text
    url = f"{_nights('s1', 'P01')}/{r.json()['night_id']}"
    plain = http.get(url).json()
    assert "counts" not in plain and "reference" not in plain and plain["epoch_seconds"] == 30
    out = http.get(url, params={"epochs": "true"}).json()
    assert out["counts"] == [None if c is None else float(c) for c in body["counts"]]
    assert out["reference"] == list(night_from_json(body, options=NightOptions(fill_gaps=True)).reference)
    assert {k: v for k, v in out.items() if k not in ("counts", "reference", "corrected")} == plain
    unlabelled = http.post(_nights("s1", "P01"), json=_body(seed=7, start="2031-03-04T22:41:00+01:00",
                                                            reference=None)).json()["night_id"]
    assert http.get(f"{_nights('s1', 'P01')}/{unlabelled}", params={"epochs": "true"}).json()["reference"] is None
    assert http.get(url, params={"epochs": "maybe"}).status_code == 422


def test_patch_corrects_the_label_and_excludes_a_night_from_training(world: World) -> None:
    from service.store.audit import list_audit
    from service.store.db import session_scope

    http, ingest = world.http, world.token("ingest", "s1")
    ids = [http.post(_nights("s1", "P01"), json=_body(seed=i, start=f"2031-03-0{2 + i}T22:41:00+01:00")).json()[
        "night_id"] for i in range(3)]
    url = f"{_nights('s1', 'P01')}/{ids[0]}"
    out = http.patch(url, json={"label": "first night"}, headers=ingest)
    assert out.status_code == 200 and (out.json()["label"], out.json()["excluded"]) == ("first night", False)
    out = http.patch(url, json={"excluded": True}, headers=ingest).json()
    assert (out["label"], out["excluded"]) == ("first night", True)
    assert http.get(url).json()["excluded"] is True
    listing = http.get("/v1/studies/s1/participants").json()["data"][0]
    assert (listing["n_labelled_nights"], listing["untrained_labelled_nights"]) == (3, 2)
    # a personal model needs three labelled nights that are not excluded (TrainingConfig.min_personal_nights)
    refused = http.post("/v1/studies/s1/participants/P01/training")
    assert refused.status_code == 422 and refused.json()["code"] == "too_few_labelled_nights"
    assert http.patch(url, json={"label": None, "excluded": False}).json()["label"] is None
    assert http.post("/v1/studies/s1/participants/P01/training").status_code == 202
    assert http.patch(url, json={}).json() == http.get(url).json()
    for bad in ({"excluded": "yes"}, {"label": 5}, {"other": 1}, {"label": "x" * 201}):
        assert http.patch(url, json=bad).status_code == 422, bad
    assert http.patch(f"{_nights('s1', 'P01')}/{'0' * 20}", json={"label": "x"}).status_code == 404
    with session_scope(world.factory) as session:
        updates = [e for e in list_audit(session, study_id="s1") if e.action == "night.update"]
    assert len(updates) == 3 and updates[-1].detail["after"] == {"label": "first night"}


def _add_version(factory: Any, pid: str | None, nights: list[tuple[str, str]], score: float = 0.8) -> int:
    """A version stored through the registry, trained on ``nights`` (night id, content hash) of ``pid``."""
    from service.store import db, registry, versions
    from service.store.metadata import ModelMetadata, Selection, TrainingNight

    owner_id = pid or "P01"
    metadata = ModelMetadata(selection=Selection(metric="balanced_accuracy", value=score),
                             training_nights=tuple(TrainingNight(participant_id=owner_id, night_id=n, content_hash=h)
                                                   for n, h in nights),
                             training_hashes=tuple(h for _, h in nights), participants=(owner_id,))
    with db.session_scope(factory, write=True) as session:
        study = registry.find_study(session, "s1")
        owner = None if pid is None else registry.find_participant(session, study, pid)
        return versions.add_version(session, study=study, participant=owner, booster=b"raw", model_meta={},
                                    metadata=metadata, job_id=None, actor="test").version


def test_deleting_a_night_removes_its_caches_and_marks_the_versions_trained_on_it(world: World) -> None:
    from sqlalchemy import func, select

    from models import FeatureConfig, night_features
    from service.store import db, registry
    from service.store.features import features_row

    http = world.http
    posted = [http.post(_nights("s1", "P01"), json=_body(seed=i, start=f"2031-03-0{2 + i}T22:41:00+01:00")).json()
              for i in range(2)]
    gone, kept = posted[0]["night_id"], posted[1]["night_id"]
    hashes = {n["night_id"]: http.get(f"{_nights('s1', 'P01')}/{n['night_id']}").json()["content_hash"] for n in posted}
    assert http.get(f"{_nights('s1', 'P01')}/{gone}/scoring", params={"method": "sadeh"}).status_code == 200
    world.server.app.state.cache_writer.flush()
    with db.session_scope(world.factory, write=True) as session:
        _, night = registry.load_night(session, study_id="s1", participant_id="P01", night_id=gone)
        pk = session.scalar(select(db.Night.pk).where(db.Night.night_id == gone))
        session.add(features_row(night_pk=pk, config=FeatureConfig(), features=night_features(night, FeatureConfig())))
    personal = _add_version(world.factory, "P01", [(gone, hashes[gone]), (kept, hashes[kept])])
    pooled = _add_version(world.factory, None, [(gone, hashes[gone])])
    other = _add_version(world.factory, "P01", [(kept, hashes[kept])])
    assert http.delete(f"{_nights('s1', 'P01')}/{gone}", headers=world.token("analyst", "s1")).status_code == 403
    r = http.delete(f"{_nights('s1', 'P01')}/{gone}")
    assert r.status_code == 200
    assert r.json() == {"night_id": gone, "scorings": 1, "features": 1, "marked_versions": [
        {"kind": "personal", "participant_id": "P01", "version": personal},
        {"kind": "pooled", "participant_id": None, "version": pooled}]}
    assert http.get(f"{_nights('s1', 'P01')}/{gone}").status_code == 404
    with db.session_scope(world.factory) as session:
        left = {t.__tablename__: session.scalar(select(func.count()).select_from(t))
                for t in (db.Night, db.Scoring, db.NightFeatures)}
    assert left == {"nights": 1, "scorings": 0, "night_features": 0}
    mine = {v["version"]: v for v in http.get("/v1/studies/s1/participants/P01/models").json()}
    assert mine[personal]["trained_on_deleted_nights"] == [gone] and mine[other]["trained_on_deleted_nights"] == []
    assert http.get("/v1/studies/s1/pooled/models").json()[0]["trained_on_deleted_nights"] == [gone]
    assert http.delete(f"{_nights('s1', 'P01')}/{gone}").status_code == 404


def test_rename_merges_into_the_target_and_keeps_its_versions_readable(world: World) -> None:
    http = world.http
    a = http.post(_nights("s1", "P01"), json=_body(seed=1)).json()["night_id"]
    b_body = _body(seed=2, start="2031-03-03T22:41:00+01:00")
    b = http.post(_nights("s1", "P01"), json=b_body).json()["night_id"]
    c = http.post(_nights("s1", "P02"), json=_body(seed=3, start="2031-03-05T22:41:00+01:00")).json()["night_id"]
    assert http.post(_nights("s1", "P02"), json=b_body, params={"allow_duplicate": "true"}).status_code == 201
    assert [_add_version(world.factory, "P01", []) for _ in range(2)] == [1, 2]
    assert _add_version(world.factory, "P02", [], score=0.9) == 1
    rename = "/v1/studies/s1/participants/P01/rename"
    assert http.post(rename, json={"to": "P02"}, headers=world.token("analyst", "s1")).status_code == 403
    assert http.post(rename, json={"to": "P01"}).json()["code"] == "same_participant"
    for bad in ({"to": "bad id"}, {}, {"to": "P02", "x": 1}):
        assert http.post(rename, json=bad).status_code == 422, bad
    r = http.post(rename, json={"to": "P02"})
    assert r.status_code == 200, r.text
    assert r.json() == {"participant_id": "P02", "previous_id": "P01", "merged": True, "nights_moved": 1,
                        "duplicates_dropped": 1, "personal_versions": [{"previous_version": 1, "version": 2},
                                                                      {"previous_version": 2, "version": 3}]}
    assert http.get(_nights("s1", "P01")).status_code == 404
    assert {n["night_id"] for n in http.get(_nights("s1", "P02")).json()["data"]} == {a, b, c}
    models = http.get("/v1/studies/s1/participants/P02/models").json()
    assert [(v["version"], v["active"]) for v in models] == [(3, False), (2, False), (1, True)]
    assert http.get(f"{_nights('s1', 'P02')}/{a}/scoring", params={"method": "sadeh"}).status_code == 200
    # no participant of the new id: a plain rename, numbers kept
    r = http.post("/v1/studies/s1/participants/P02/rename", json={"to": "P07"}).json()
    assert (r["merged"], r["nights_moved"], r["duplicates_dropped"]) == (False, 3, 0)
    assert [v["version"] for v in r["personal_versions"]] == [1, 2, 3]
    assert http.post("/v1/studies/s1/participants/P07/rename", json={"to": "p07"}).status_code == 200  # own case
    assert http.post(_nights("s1", "P08"), json=_body(seed=9, start="2031-04-02T22:41:00+01:00")).status_code == 201
    clash = http.post("/v1/studies/s1/participants/P08/rename", json={"to": "P07"})
    assert clash.status_code == 409 and clash.json()["code"] == "participant_id_case_clash"
    assert "'p07'" in clash.json()["detail"]


def test_rename_refuses_to_merge_nights_that_overlap_in_time(world: World) -> None:
    http = world.http
    moving = http.post(_nights("s1", "P01"), json=_body(seed=1)).json()["night_id"]  # 22:41 .. 00:41
    later = http.post(_nights("s1", "P01"), json=_body(seed=2, start="2031-03-04T22:41:00+01:00")).json()["night_id"]
    staying = http.post(_nights("s1", "P02"), json=_body(seed=3, start="2031-03-03T00:11:00+01:00",
                                                         label="lab copy")).json()["night_id"]  # 00:11 .. 02:11
    rename = "/v1/studies/s1/participants/P01/rename"
    refused = http.post(rename, json={"to": "P02"})
    assert refused.status_code == 409 and refused.headers["content-type"] == "application/problem+json"
    assert refused.json()["code"] == "overlapping_night"
    detail = refused.json()["detail"]
    assert f"{moving!r}" in detail and f"{staying!r}" in detail and "'lab copy'" in detail and later not in detail
    assert {n["night_id"] for n in http.get(_nights("s1", "P01")).json()["data"]} == {moving, later}  # nothing moved
    assert {n["night_id"] for n in http.get(_nights("s1", "P02")).json()["data"]} == {staying}
    # touching ends are not an overlap: [start, end) intervals (a night ending as the other starts)
    assert http.post(_nights("s1", "P03"), json=_body(seed=4, start="2031-03-02T20:41:00+01:00")).status_code == 201
    assert http.post("/v1/studies/s1/participants/P03/rename", json={"to": "P01"}).status_code == 200
    merged = http.post(rename, json={"to": "P02"}, params={"allow_overlap": "true"})
    assert merged.status_code == 200, merged.text
    assert (merged.json()["nights_moved"], merged.json()["duplicates_dropped"]) == (3, 0)
    assert len(http.get(_nights("s1", "P02")).json()["data"]) == 4


def test_rename_waits_for_a_queued_training(world: World) -> None:
    http = world.http
    for i in range(3):
        assert http.post(_nights("s1", "P01"), json=_body(seed=i, start=f"2031-03-0{2 + i}T22:41:00+01:00")
                         ).status_code == 201
    job = http.post("/v1/studies/s1/participants/P01/training").json()["job_id"]
    r = http.post("/v1/studies/s1/participants/P01/rename", json={"to": "P02"})
    assert r.status_code == 409 and r.json()["code"] == "training_in_progress" and job in r.json()["detail"]
    assert http.post(f"/v1/jobs/{job}/cancel").json()["state"] == "cancelled"
    assert http.post("/v1/studies/s1/participants/P01/rename", json={"to": "P02"}).status_code == 200


def test_version_numbers_are_never_given_out_again(world: World) -> None:
    http = world.http
    assert http.post(_nights("s1", "P01"), json=_body(seed=1)).status_code == 201
    assert [_add_version(world.factory, None, []) for _ in range(2)] == [1, 2]
    assert [_add_version(world.factory, "P01", []) for _ in range(2)] == [1, 2]
    removed = http.delete("/v1/studies/s1/participants/P01").json()
    assert (removed["pooled_versions"], removed["personal_versions"]) == (2, 2)
    assert http.get("/v1/studies/s1/pooled/models").json() == []
    assert http.post(_nights("s1", "P01"), json=_body(seed=1)).status_code == 201  # the participant again
    assert _add_version(world.factory, None, []) == 3
    assert _add_version(world.factory, "P01", []) == 3
    assert [v["version"] for v in http.get("/v1/studies/s1/participants/P01/models").json()] == [3]


def test_jobs_listing_is_newest_first_filtered_and_paginated(world: World) -> None:
    http = world.http
    for pid in ("P01", "P02"):
        for i in range(3):
            start = f"2031-03-0{2 + i}T22:41:00+01:00"
            assert http.post(_nights("s1", pid), json=_body(seed=10 * (pid == "P02") + i, start=start)
                             ).status_code == 201
    queued = [http.post(url).json()["job_id"] for url in ("/v1/studies/s1/participants/P01/training",
                                                          "/v1/studies/s1/participants/P02/training",
                                                          "/v1/studies/s1/pooled/training")]
    page = http.get("/v1/studies/s1/jobs").json()
    assert page["count"] == 3 and [j["job_id"] for j in page["data"]] == queued[::-1]
    assert [j["participant_id"] for j in page["data"]] == [None, "P02", "P01"]
    assert http.post(f"/v1/jobs/{queued[0]}/cancel").status_code == 200
    assert [j["job_id"] for j in http.get("/v1/studies/s1/jobs", params={"state": "cancelled"}).json()["data"]] == [
        queued[0]]
    assert http.get("/v1/studies/s1/jobs", params={"state": "queued"}).json()["count"] == 2
    assert http.get("/v1/studies/s1/jobs", params={"state": "running"}).json() == {"data": [], "count": 0,
                                                                                    "limit": 100, "offset": 0}
    second = http.get("/v1/studies/s1/jobs", params={"limit": 1, "offset": 1}).json()
    assert [j["job_id"] for j in second["data"]] == [queued[1]] and second["count"] == 3
    assert http.get("/v1/studies/s1/jobs", params={"state": "lost"}).status_code == 422
    assert http.get("/v1/studies/s1/jobs", headers=world.token("ingest", "s1")).status_code == 403
    assert http.get("/v1/studies/s1/jobs", headers=world.token("analyst", "s1")).status_code == 200


@pytest.mark.slow
def test_training_leaves_out_excluded_nights_and_its_version_outlives_a_deleted_night(http, study, admin,
                                                                                      start_worker) -> None:
    from harness import cohort_bodies, wait_for

    ids = [http.post(_nights(study, "P-01"), json=b, headers=admin).json()["night_id"]
           for b in cohort_bodies(n_participants=1, nights=4)["P-01"]]
    assert http.patch(f"{_nights(study, 'P-01')}/{ids[0]}", json={"excluded": True}, headers=admin).status_code == 200
    job = http.post(f"/v1/studies/{study}/participants/P-01/training", json={"n_trials": 2}, headers=admin).json()
    start_worker()
    done = wait_for(lambda: (j := http.get(f"/v1/jobs/{job['job_id']}", headers=admin).json())["state"]
                    in ("succeeded", "failed") and j)
    assert done["state"] == "succeeded", done["error"]
    version = http.get(f"/v1/studies/{study}/participants/P-01/models", headers=admin).json()[0]
    assert sorted(n["night_id"] for n in version["training_nights"]) == sorted(ids[1:])
    assert http.delete(f"{_nights(study, 'P-01')}/{ids[1]}", headers=admin).json()["marked_versions"] == [
        {"kind": "personal", "participant_id": "P-01", "version": version["version"]}]
    after = http.get(f"/v1/studies/{study}/participants/P-01/models", headers=admin).json()[0]
    assert after["trained_on_deleted_nights"] == [ids[1]] and after["active"] is True
    scored = http.get(f"{_nights(study, 'P-01')}/{ids[2]}/scoring", params={"method": "personal"}, headers=admin)
    assert scored.status_code == 200 and scored.json()["model_version"] == version["version"]
