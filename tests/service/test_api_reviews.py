"""Review queue, blind double review, adjudication and corrections over the real HTTP server (SQLite, PostgreSQL)."""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from backends import BACKENDS, World, live_world
from harness import cohort_bodies

NIGHTS = "/v1/studies/s1/participants/{pid}/nights"


def _night_url(pid: str, night_id: str) -> str:
    return f"{NIGHTS.format(pid=pid)}/{night_id}"


@pytest.fixture(params=BACKENDS)
def world(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[World]:
    with live_world(request.param, tmp_path) as out:
        yield out


def _post_cohort(w: World, *, n_participants: int = 2, nights: int = 3, labelled: int = 1) -> dict[str, Any]:
    """Simulated nights; the first ``labelled`` of each participant keep their PSG reference."""
    out: dict[str, Any] = {"psg": [], "unlabelled": []}
    for pid, bodies in cohort_bodies(n_participants=n_participants, nights=nights, seed=4).items():
        for i, body in enumerate(bodies):
            if i >= labelled:
                body = {k: v for k, v in body.items() if k != "reference"}
            r = w.http.post(NIGHTS.format(pid=pid), json=body)
            assert r.status_code == 201, r.text
            out["psg" if i < labelled else "unlabelled"].append((pid, r.json()["night_id"]))
    return out


def _n_epochs(w: World, pid: str, night_id: str) -> int:
    return int(w.http.get(_night_url(pid, night_id)).json()["n_epochs"])


def _labels(n: int, seed: int) -> list[int | None]:
    rng = np.random.default_rng(seed)
    values: list[int | None] = [int(v) for v in rng.integers(0, 2, n)]
    values[:3] = [None, None, None]  # not judged
    return values


def test_reviewer_role_sits_between_ingest_and_analyst(world: World) -> None:
    made = world.http.post("/v1/tokens", json={"role": "reviewer", "study_id": "s1"})
    assert made.status_code == 201 and made.json()["role"] == "reviewer"
    nights = _post_cohort(world, n_participants=1, nights=2)
    pid, nid = nights["unlabelled"][0]
    reviewer = {"Authorization": f"Bearer {made.json()['token']}"}
    assert world.http.get(_night_url(pid, nid), headers=reviewer).status_code == 200
    assert world.http.get("/v1/studies/s1/review-queue", headers=reviewer).status_code == 200
    assert world.http.get(f"{_night_url(pid, nid)}/review-context", headers=reviewer).status_code == 200
    assert world.http.get(f"{_night_url(pid, nid)}/scoring", headers=reviewer).status_code == 403
    assert world.http.get("/v1/studies/s1/review-queue", headers=world.token("ingest", "s1")).status_code == 403
    bad = world.http.post("/v1/tokens", json={"role": "judge", "study_id": "s1"})
    assert bad.status_code == 422


@pytest.mark.parametrize("role", ["reviewer", "analyst", "admin"])
def test_reviews_stay_blind_until_both_are_in_for_every_role(world: World, role: str) -> None:
    pid, nid = _post_cohort(world, n_participants=1, nights=2)["unlabelled"][0]
    first, second = world.token(role, "s1"), world.token(role, "s1")
    n = _n_epochs(world, pid, nid)
    url = f"{_night_url(pid, nid)}/reviews"
    r = world.http.post(url, json={"reviewer": "ana", "wake_intervals": [{"start_epoch": 10, "end_epoch": 40}],
                                   "rest_interval": {"start_epoch": 5, "end_epoch": n - 5}, "note": "restless"},
                        headers=first)
    assert r.status_code == 201, r.text
    assert r.json()["status"] == "in_review" and r.json()["reviewer"] == "ana"
    own = world.http.get(url, headers=first).json()
    assert [x["reviewer"] for x in own["data"]] == ["ana"] and own["data"][0]["labels"] is not None
    assert own["discrepancy"] is None
    other = world.http.get(url, headers=second).json()
    assert all(x.get("labels") is None and x.get("parameters") is None and x.get("note") is None
               for x in other["data"])
    assert "restless" not in repr(other)
    if role == "reviewer":
        assert other["data"] == []  # a reviewer does not even see whose review exists
    else:
        assert [x["reviewer"] for x in other["data"]] == ["ana"]
    assert world.http.post(url, json={"reviewer": "ana2", "labels": [1] * n}, headers=first).status_code == 409
    assert world.http.post(url, json={"reviewer": "ana", "labels": [1] * n}, headers=second).status_code == 409
    r = world.http.post(url, json={"reviewer": "ben", "sleep_intervals": [{"start_epoch": 10, "end_epoch": 20}]},
                        headers=second)
    assert r.status_code == 201 and r.json()["status"] == "reviewed"
    for headers in (first, second):
        both = world.http.get(url, headers=headers).json()
        assert sorted(x["reviewer"] for x in both["data"]) == ["ana", "ben"]
        assert all(x["labels"] is not None and x["parameters"] is not None for x in both["data"])
        assert both["discrepancy"]["epochs_compared"] > 0 and both["status"] == "reviewed"
    third = world.http.post(url, json={"reviewer": "cy", "labels": [1] * n}, headers=world.token(role, "s1"))
    assert third.status_code == 409 and third.json()["code"] == "review_complete"


def test_adjudication_needs_analyst_and_both_reviews_and_is_kept_apart_from_psg(world: World) -> None:
    nights = _post_cohort(world, n_participants=1, nights=3)
    pid, nid = nights["unlabelled"][0]
    n = _n_epochs(world, pid, nid)
    url = f"{_night_url(pid, nid)}/reviews"
    a, b = world.token("reviewer", "s1"), world.token("reviewer", "s1")
    first = world.http.post(url, json={"reviewer": "ana", "labels": _labels(n, 1)}, headers=a).json()
    adj = {"reviewer": "chief", "accept": first["review_id"]}
    early = world.http.post(f"{url}/adjudication", json=adj, headers=world.token("analyst", "s1"))
    assert early.status_code == 409 and early.json()["code"] == "reviews_incomplete"
    assert world.http.post(url, json={"reviewer": "ben", "labels": _labels(n, 2)}, headers=b).status_code == 201
    assert world.http.post(f"{url}/adjudication", json=adj, headers=a).status_code == 403
    unknown = world.http.post(f"{url}/adjudication", json={"reviewer": "chief", "accept": "abc"},
                              headers=world.token("analyst", "s1"))
    assert unknown.status_code == 422 and "accept" in unknown.json()["detail"]
    done = world.http.post(f"{url}/adjudication", json=adj, headers=world.token("analyst", "s1"))
    assert done.status_code == 201, done.text
    assert done.json()["correction"]["reviewers"] == ["ana", "ben"]
    detail = world.http.get(_night_url(pid, nid), params={"epochs": "true"}).json()
    assert detail["corrected"] == _labels(n, 1)  # the accepted review's labels
    assert detail["reference"] is None and detail["labelled"] is False
    assert detail["correction"]["adjudicated_by"] == "chief"
    assert detail["correction"]["model_version_shown"] == "cole-kripke"  # no model trained: the default rule
    # a corrected night is never a PSG night: its scoring has no agreement, the PSG night's has
    scored = world.http.get(f"{_night_url(pid, nid)}/scoring", params={"method": "sadeh"}).json()
    assert scored["agreement"] is None
    psg_pid, psg_nid = nights["psg"][0]
    assert world.http.get(f"{_night_url(psg_pid, psg_nid)}/scoring",
                          params={"method": "sadeh"}).json()["agreement"] is not None
    flow = world.http.get(f"/v1/studies/s1/participants/{pid}/comparison").json()
    assert [f["n_labelled_nights"] for f in flow["flow"]] == [1]  # the PSG night only, not the corrected one
    assert world.http.post(url, json={"reviewer": "dan", "labels": [1] * n},
                           headers=world.token("reviewer", "s1")).json()["code"] == "already_adjudicated"


def test_queue_leaves_out_psg_nights_pages_and_filters_by_status(world: World) -> None:
    nights = _post_cohort(world, n_participants=2, nights=4)
    everything = world.http.get("/v1/studies/s1/review-queue", params={"limit": 500}).json()
    queued = {(x["participant_id"], x["night_id"]) for x in everything["data"]}
    assert queued == set(nights["unlabelled"]) and everything["count"] == len(nights["unlabelled"])
    assert not queued & set(nights["psg"])
    priorities = [x["priority"] for x in everything["data"]]
    assert priorities == sorted(priorities, reverse=True)
    assert all(x["status"] == "open" and isinstance(x["reasons"], list) for x in everything["data"])
    pages = [world.http.get("/v1/studies/s1/review-queue", params={"limit": 2, "offset": o}).json()
             for o in range(0, len(queued), 2)]
    assert [x["night_id"] for p in pages for x in p["data"]] == [x["night_id"] for x in everything["data"]]
    pid, nid = everything["data"][0]["participant_id"], everything["data"][0]["night_id"]
    assert world.http.post(f"{_night_url(pid, nid)}/reviews", json={"reviewer": "ana", "labels": None},
                           headers=world.token("reviewer", "s1")).status_code == 201
    in_review = world.http.get("/v1/studies/s1/review-queue", params={"status": "in_review"}).json()
    assert [x["night_id"] for x in in_review["data"]] == [nid] and in_review["count"] == 1
    assert world.http.get("/v1/studies/s1/review-queue", params={"status": "open"}).json()["count"] == len(queued) - 1
    bad = world.http.get("/v1/studies/s1/review-queue", params={"status": "done"})
    assert bad.status_code == 422 and "status" in bad.text
    assert world.http.get("/v1/studies/s1/review-queue", params={"limit": 0}).status_code == 422
    context = world.http.get(f"{_night_url(pid, nid)}/review-context").json()
    assert context["status"] == "in_review" and context["queue_neighbours"]["previous"] is None
    assert context["queue_neighbours"]["next"] == {"participant_id": everything["data"][1]["participant_id"],
                                                   "night_id": everything["data"][1]["night_id"]}
    assert len(context["calls"]) == len(context["counts"]) == _n_epochs(world, pid, nid)
    psg = world.http.get(f"{_night_url(*nights['psg'][0])}/review-context")
    assert psg.status_code == 409 and psg.json()["code"] == "has_reference"
    extra = cohort_bodies(n_participants=1, nights=5, seed=4)["P-01"][4]  # the ranking follows new nights
    added = world.http.post(NIGHTS.format(pid="P-01"), json={k: v for k, v in extra.items() if k != "reference"})
    assert added.status_code == 201, added.text
    again = world.http.get("/v1/studies/s1/review-queue", params={"limit": 500}).json()
    assert again["count"] == len(queued) + 1 and added.json()["night_id"] in {x["night_id"] for x in again["data"]}


def test_bad_intervals_are_refused_naming_the_index_and_nothing_is_stored(world: World) -> None:
    pid, nid = _post_cohort(world, n_participants=1, nights=2)["unlabelled"][0]
    n = _n_epochs(world, pid, nid)
    url = f"{_night_url(pid, nid)}/reviews"
    reviewer = world.token("reviewer", "s1")
    body = {"reviewer": "ana", "wake_intervals": [{"start_epoch": 1, "end_epoch": 5},
                                                  {"start_epoch": 10, "end_epoch": n + 3}]}
    r = world.http.post(url, json=body, headers=reviewer)
    assert r.status_code == 422 and r.json()["code"] == "invalid_review"
    assert "wake_intervals[1].end_epoch" in r.json()["detail"]
    backwards = world.http.post(url, json={"reviewer": "ana", "sleep_intervals": [{"start_epoch": 9, "end_epoch": 9}]},
                                headers=reviewer)
    assert backwards.status_code == 422 and "sleep_intervals[0]" in backwards.json()["detail"]
    typed = world.http.post(url, json={"reviewer": "ana", "wake_intervals": [{"start_epoch": "a", "end_epoch": 3}]},
                            headers=reviewer)
    assert typed.status_code == 422 and "wake_intervals" in typed.text and ".0." in typed.text
    short = world.http.post(url, json={"reviewer": "ana", "labels": [1, 0]}, headers=reviewer)
    assert short.status_code == 422 and "labels" in short.json()["detail"]
    both = world.http.post(url, json={"reviewer": "ana", "labels": [1] * n,
                                      "rest_interval": {"start_epoch": 0, "end_epoch": n}}, headers=reviewer)
    assert both.status_code == 422
    assert world.http.get(url, headers=reviewer).json()["data"] == []
    preview = world.http.post(f"{url}/preview", json={"wake_intervals": [{"start_epoch": 0, "end_epoch": n}]},
                              headers=reviewer)
    assert preview.status_code == 200 and preview.json()["labels_summary"]["wake_epochs"] == n
    assert preview.json()["parameters"]["tst_min"] == 0
    assert world.http.get(url, headers=reviewer).json()["status"] == "open"


def test_agreement_kappa_matches_scikit_learn(world: World) -> None:
    from sklearn.metrics import cohen_kappa_score

    nights = _post_cohort(world, n_participants=1, nights=3)
    expected = []
    for k, (pid, nid) in enumerate(nights["unlabelled"]):
        n = _n_epochs(world, pid, nid)
        a, b = _labels(n, 10 + k), _labels(n, 20 + k)
        b[: n // 2] = a[: n // 2]  # agree on the first half
        for name, labels in (("ana", a), ("ben", b)):
            assert world.http.post(f"{_night_url(pid, nid)}/reviews", json={"reviewer": name, "labels": labels},
                                   headers=world.token("reviewer", "s1")).status_code == 201
        both = [i for i in range(n) if a[i] is not None and b[i] is not None]
        expected.append(cohen_kappa_score([a[i] for i in both], [b[i] for i in both]))  # scikit-learn reference
    assert world.http.get("/v1/studies/s1/reviews/agreement",
                          headers=world.token("reviewer", "s1")).status_code == 403
    out = world.http.get("/v1/studies/s1/reviews/agreement").json()
    assert out["n_nights_reviewed"] == 2 and out["n_reviews"] == 4
    got = {(x["participant_id"], x["night_id"]): x["kappa"] for x in out["nights"]}
    assert [got[key] for key in nights["unlabelled"]] == pytest.approx(expected, abs=1e-12)
    assert out["reviewer_vs_reviewer"]["kappa_mean"] == pytest.approx(float(np.mean(expected)), abs=1e-12)
    assert out["reviewers_vs_model"]["n_nights"] == 4


@pytest.mark.slow
@pytest.mark.prepared_review_queue
def test_personal_training_fits_corrected_nights_with_the_study_weight_but_never_holds_them_out(
        http: Any, study: str, admin: dict[str, str], settings: Any, factory: Any, make_token: Any) -> None:
    from sqlalchemy import select

    from service.jobs.queue import JobState, claim_job, finish_job
    from service.jobs.training import run_training_job
    from service.store import db, versions
    from service.store.registry import find_participant, find_study
    from service.ui.cards import model_card, model_card_markdown

    psg, corrected = [], []
    for i, body in enumerate(cohort_bodies(n_participants=1, nights=5, seed=6)["P-01"]):
        if i >= 3:
            body = {k: v for k, v in body.items() if k != "reference"}
        r = http.post(NIGHTS.format(pid="P-01"), json=body, headers=admin)
        assert r.status_code == 201, r.text
        (psg if i < 3 else corrected).append(r.json()["night_id"])
    for nid in corrected:
        url = f"{_night_url('P-01', nid)}/reviews"
        n = int(http.get(_night_url("P-01", nid), headers=admin).json()["n_epochs"])
        first = http.post(url, json={"reviewer": "ana", "labels": _labels(n, 7)},
                          headers={"Authorization": f"Bearer {make_token('reviewer', 's1')}"}).json()
        http.post(url, json={"reviewer": "ben", "labels": _labels(n, 8)},
                  headers={"Authorization": f"Bearer {make_token('reviewer', 's1')}"})
        assert http.post(f"{url}/adjudication", json={"reviewer": "chief", "accept": first["review_id"]},
                         headers=admin).status_code == 201
    bad = http.put("/v1/studies/s1/protocol", json={"correction_weight": 1.5}, headers=admin)
    assert bad.status_code == 422 and "correction_weight" in bad.text
    assert http.get("/v1/studies/s1/protocol", headers=admin).json()["correction_weight"] == 0.5  # the default
    assert http.put("/v1/studies/s1/protocol", json={"correction_weight": 0.3}, headers=admin).status_code == 200
    assert http.get("/v1/studies/s1/protocol", headers=admin).json()["correction_weight"] == 0.3
    job_id = http.post("/v1/studies/s1/participants/P-01/training", json={"n_trials": 2, "seed": 0},
                       headers=admin).json()["job_id"]
    job = claim_job(factory, worker_id="here", lease_s=60, max_attempts=3)
    assert job.job_id == job_id
    result = run_training_job(job, factory=factory, settings=settings, progress=lambda *_: None)
    assert finish_job(factory, job_id, worker_id="here", state=JobState.succeeded, result=result)
    with db.session_scope(factory) as session:
        study_info = find_study(session, "s1")
        version = versions.active_version(session, study=study_info,
                                          participant=find_participant(session, study_info, "P-01"))
        hashes = dict(session.execute(select(db.Night.night_id, db.Night.content_hash)).all())
    assert version is not None
    meta = version.metadata
    assert meta.corrected_nights == 2 and meta.correction_weight == 0.3
    assert meta.metrics.n_nights == 3  # held out: the PSG nights only
    held_out_hashes = {r["night_hash"] for r in meta.night_metrics}
    assert held_out_hashes == {hashes[nid] for nid in psg}  # corrected nights are never held out
    assert {hashes[nid] for nid in psg + corrected} <= set(meta.training_hashes)
    card = model_card(version, study_id="s1", participant_id="P-01")
    assert card["data"]["corrected_nights"] == 2
    assert "Corrected nights (reviewed labels, not PSG; final fit only, never held out): 2 at weight 0.3" \
        in model_card_markdown(card)
    _check_prepared_queue(factory, [("P-01", nid) for nid in corrected])


def _check_prepared_queue(factory: Any, queued: list[tuple[str, str]]) -> None:
    """The training job stored the queue's scorings (auto and the compared rules) of the nights without PSG, and
    the bulk scoring builds the very bytes a single scoring request builds (rows deleted before each)."""
    from sqlalchemy import delete, select

    from service.results.bulk_scoring import score_nights
    from service.results.review_queue import COMPARED_RULES
    from service.results.scoring import score_night
    from service.store import db

    methods = ("auto", *COMPARED_RULES)
    with db.session_scope(factory) as session:
        pks = list(session.scalars(select(db.Night.pk).where(db.Night.night_id.in_([n for _, n in queued]))))
        stored = session.execute(select(db.Scoring.night_pk, db.Scoring.method)
                                 .where(db.Scoring.night_pk.in_(pks))).all()
    assert {pk for pk, _ in stored} == set(pks)
    assert {m for _, m in stored} == {"personal", *COMPARED_RULES}  # auto resolved to the new personal model
    with db.session_scope(factory, write=True) as session:
        session.execute(delete(db.Scoring).where(db.Scoring.night_pk.in_(pks)))
    bulk = score_nights(factory, study_id="s1", nights=queued, methods=methods)
    with db.session_scope(factory, write=True) as session:
        session.execute(delete(db.Scoring).where(db.Scoring.night_pk.in_(pks)))
    for pid, nid in queued:
        for method in methods:
            single = score_night(factory, study_id="s1", participant_id=pid, night_id=nid, method=method)
            assert bulk[(pid, nid, method)] == single, (nid, method)


def test_queue_command_and_client_review_methods(server: Any, http: Any, study: str, admin: dict[str, str],
                                                 make_token: Any) -> None:
    from typer.testing import CliRunner

    from service.cli import app
    from service.client import NightbankClient
    from service.errors import Conflict

    ids = []
    for body in cohort_bodies(n_participants=1, nights=3, seed=9)["P-01"]:
        body = {k: v for k, v in body.items() if k != "reference"}
        ids.append(http.post(NIGHTS.format(pid="P-01"), json=body, headers=admin).json()["night_id"])
    reviewer_token = make_token("reviewer", study_id=study)
    runner = CliRunner()
    common = ["--study", study, "--server", server.url, "--token", reviewer_token]
    listed = runner.invoke(app, ["queue", *common, "--limit", "2", "--json"])
    assert listed.exit_code == 0, listed.output
    items = json.loads(listed.output)
    assert len(items) == 2 and {i["night_id"] for i in items} <= set(ids)
    table = runner.invoke(app, ["queue", *common], terminal_width=200)
    assert table.exit_code == 0 and "Review queue of study s1" in table.output and "not for diagnosis" in table.output
    bad = runner.invoke(app, ["queue", *common, "--status", "done"])
    assert bad.exit_code == 2 and "--status" in bad.output
    with NightbankClient(server.url, token=reviewer_token) as client, \
            NightbankClient(server.url, token=make_token("reviewer", study_id=study)) as other, \
            NightbankClient(server.url, token=make_token("analyst", study_id=study)) as analyst:
        assert [i["night_id"] for i in client.review_queue(study)][:2] == [i["night_id"] for i in items]
        nid = items[0]["night_id"]
        context = client.review_context(study, "P-01", nid)
        n = len(context["calls"])
        preview = client.preview_review(study, "P-01", nid, sleep_intervals=[{"start_epoch": 0, "end_epoch": n}])
        assert preview["labels_summary"]["sleep_epochs"] == n
        first = client.post_review(study, "P-01", nid, reviewer="ana", wake_intervals=[{"start_epoch": 0,
                                                                                        "end_epoch": 20}])
        with pytest.raises(Conflict):
            client.post_review(study, "P-01", nid, reviewer="ana", labels=[1] * n)
        other.post_review(study, "P-01", nid, reviewer="ben", labels=[1] * n, note="all asleep")
        assert client.night_reviews(study, "P-01", nid)["discrepancy"]["epochs_compared"] > 0
        done = analyst.adjudicate(study, "P-01", nid, adjudicator="chief", accept=first["review_id"])
        assert done["status"] == "adjudicated"
        assert analyst.review_agreement(study)["n_nights_reviewed"] == 1
        assert client.review_queue(study, status="adjudicated")[0]["night_id"] == nid


def test_validation_report_has_the_reviewed_nights_section(http: Any, study: str, admin: dict[str, str],
                                                           make_token: Any) -> None:
    import re

    from sklearn.metrics import cohen_kappa_score

    bodies = cohort_bodies(n_participants=1, nights=2, seed=5)["P-01"]
    assert http.post(NIGHTS.format(pid="P-01"), json=bodies[0], headers=admin).status_code == 201
    nid = http.post(NIGHTS.format(pid="P-01"), json={k: v for k, v in bodies[1].items() if k != "reference"},
                    headers=admin).json()["night_id"]
    n = int(http.get(_night_url("P-01", nid), headers=admin).json()["n_epochs"])
    a, b = _labels(n, 31), _labels(n, 32)
    for name, labels in (("ana", a), ("ben", b)):
        http.post(f"{_night_url('P-01', nid)}/reviews", json={"reviewer": name, "labels": labels},
                  headers={"Authorization": f"Bearer {make_token('reviewer', 's1')}"})
    page = http.get("/v1/studies/s1/report", headers=admin)
    assert page.status_code == 200
    section = page.text.split('<h2 id="reviews">')[1].split("<h2")[0]
    assert "1 with both reviews in (2 reviews), 0 adjudicated" in section
    both = [i for i in range(n) if a[i] is not None and b[i] is not None]
    kappa = cohen_kappa_score([a[i] for i in both], [b[i] for i in both])  # scikit-learn reference
    row = re.search(r"Reviewer vs reviewer</td><td class=\"n\">1</td><td class=\"n\">([-0-9.]+)</td>", section)
    assert row is not None and float(row.group(1)) == pytest.approx(kappa, abs=5e-4)


@pytest.mark.slow
def test_pooled_training_fits_corrected_nights_in_the_final_model_only(
        http: Any, study: str, admin: dict[str, str], settings: Any, factory: Any, make_token: Any) -> None:
    from sqlalchemy import select

    from service.jobs.queue import JobState, claim_job, finish_job
    from service.jobs.training import run_training_job
    from service.store import db, versions
    from service.store.registry import find_study

    psg, corrected = [], []
    for pid, bodies in cohort_bodies(n_participants=3, nights=3, seed=12).items():
        for i, body in enumerate(bodies):
            if pid == "P-01" and i == 2:
                body = {k: v for k, v in body.items() if k != "reference"}
            r = http.post(NIGHTS.format(pid=pid), json=body, headers=admin)
            (corrected if pid == "P-01" and i == 2 else psg).append(r.json()["night_id"])
    nid = corrected[0]
    url = f"{_night_url('P-01', nid)}/reviews"
    n = int(http.get(_night_url("P-01", nid), headers=admin).json()["n_epochs"])
    first = http.post(url, json={"reviewer": "ana", "labels": _labels(n, 3)},
                      headers={"Authorization": f"Bearer {make_token('reviewer', 's1')}"}).json()
    http.post(url, json={"reviewer": "ben", "labels": _labels(n, 4)},
              headers={"Authorization": f"Bearer {make_token('reviewer', 's1')}"})
    assert http.post(f"{url}/adjudication", json={"reviewer": "chief", "accept": first["review_id"]},
                     headers=admin).status_code == 201
    job_id = http.post("/v1/studies/s1/pooled/training", headers=admin).json()["job_id"]
    job = claim_job(factory, worker_id="here", lease_s=60, max_attempts=3)
    assert job.job_id == job_id
    result = run_training_job(job, factory=factory, settings=settings, progress=lambda *_: None)
    assert finish_job(factory, job_id, worker_id="here", state=JobState.succeeded, result=result)
    with db.session_scope(factory) as session:
        version = versions.active_version(session, study=find_study(session, "s1"), participant=None)
        hashes = dict(session.execute(select(db.Night.night_id, db.Night.content_hash)).all())
    assert version is not None
    meta = version.metadata
    assert meta.corrected_nights == 1 and meta.correction_weight == 0.5  # the study's default weight
    assert {r["night_hash"] for r in meta.night_metrics} == {hashes[i] for i in psg}  # held out: PSG only
    assert hashes[nid] in meta.training_hashes


def test_queue_weighs_the_minutes_the_deployed_model_expects_to_relabel(world: World) -> None:
    from trained import train_here

    for pid, bodies in cohort_bodies(n_participants=3, nights=5, seed=5).items():
        for i, body in enumerate(bodies):  # three nights with PSG, two without
            r = world.http.post(NIGHTS.format(pid=pid), json=body if i < 3 else
                                {k: v for k, v in body.items() if k != "reference"})
            assert r.status_code == 201, r.text
    train_here(world)
    queue = world.http.get("/v1/studies/s1/review-queue", params={"limit": 500}).json()["data"]
    assert len(queue) == 6
    shown = 0
    for item in queue:
        scoring = world.http.get(f"{_night_url(item['participant_id'], item['night_id'])}/scoring").json()
        first, stop = scoring["in_bed"]
        # computed here from the served scoring: over the in-bed epochs, P(the other state) summed, in minutes
        # (the expected number of misclassified epochs; common practice)
        pairs = [(p, c) for p, c in zip(scoring["p_sleep"][first:stop], scoring["sleep"][first:stop], strict=True)
                 if p is not None and c is not None]
        minutes = sum(1 - p if c == 1 else p for p, c in pairs) * scoring["epoch_seconds"] / 60
        relabel = [r for r in item["reasons"] if r.startswith("the model expects about")]
        if minutes >= 20:  # enough to add a reason with the fitted weight
            shown += 1
            assert relabel and relabel[0].startswith(f"the model expects about {minutes:.0f} min"), (minutes, relabel)
    assert shown >= 1
