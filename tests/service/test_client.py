"""The Python client against a live server: operations and typed errors with the problem details."""

from __future__ import annotations

import time

import pytest
from factories import night_json
from route_support import needs_route


@pytest.fixture
def client(server, make_token):
    from service.client import NightbankClient

    with NightbankClient(server.url, token=make_token("admin")) as nb:
        yield nb


def test_client_round_trip(client, tmp_path) -> None:
    import json

    assert client.health()["status"] == "ok"
    assert client.create_study("s1", "One")["study_id"] == "s1"
    first = client.post_night("s1", "p1", night_json(240, seed=1))
    assert first["created"] is True
    path = tmp_path / "n.json"
    path.write_text(json.dumps(night_json(240, seed=1)))
    again = client.push_file("s1", "p1", path)
    assert again == {**first, "created": False}
    assert [p["participant_id"] for p in client.list_participants("s1")] == ["p1"]
    assert client.list_nights("s1", "p1")[0]["night_id"] == first["night_id"]
    scored = client.score("s1", "p1", first["night_id"], method="cole-kripke")
    assert scored["method"] == "cole-kripke" and len(scored["sleep"]) == 240
    assert client.export_parameters("s1").startswith(b"study_id,participant_id,night_id")
    assert "nightbank_http_requests_total" in client.metrics()


def test_client_raises_typed_errors_carrying_the_problem(client, make_token, server) -> None:
    from models import InvalidNightError
    from service.client import NightbankClient
    from service.errors import Conflict, Forbidden, NotFound, Unauthorized, Unprocessable

    client.create_study("s1", "One")
    with pytest.raises(Conflict) as conflict:
        client.create_study("s1", "One")
    assert conflict.value.status == 409 and conflict.value.problem["code"] == "conflict"
    with pytest.raises(NotFound):
        client.list_participants("nope")
    bad = night_json(240)
    bad["counts"][3] = -1
    with pytest.raises(InvalidNightError) as invalid:
        client.post_night("s1", "p1", bad)
    assert invalid.value.code == "invalid_night"
    assert invalid.value.problems[0].code == "negative_count" and invalid.value.problems[0].location["epoch"] == 3
    night_id = client.post_night("s1", "p1", night_json(240))["night_id"]
    with pytest.raises(Unprocessable) as no_model:
        client.score("s1", "p1", night_id)
    assert no_model.value.code == "no_model"
    with NightbankClient(server.url, token=make_token("ingest", "s1")) as ingest, pytest.raises(Forbidden):
        ingest.delete_participant("s1", "p1")
    with NightbankClient(server.url, token="nb_000000000000_nope") as anonymous, pytest.raises(Unauthorized):
        anonymous.list_studies()


def test_token_management_over_http(client, server) -> None:
    from service.client import NightbankClient
    from service.errors import Forbidden, Unauthorized

    client.create_study("s1", "One")
    made = client.create_token("analyst", study_id="s1", label="lab script")
    assert made["token"].startswith("nb_") and made["study_id"] == "s1"
    listed = {t["token_id"]: t for t in client.list_tokens()}
    assert made["token_id"] in listed and "token" not in listed[made["token_id"]]
    with NightbankClient(server.url, token=made["token"]) as analyst:
        assert [s["study_id"] for s in analyst.list_studies()] == ["s1"]
        with pytest.raises(Forbidden):
            analyst.create_token("admin")
    client.revoke_token(made["token_id"])
    time.sleep(server.app.state.settings.token_cache_s + 0.1)  # verified tokens are remembered that long
    with NightbankClient(server.url, token=made["token"]) as analyst, pytest.raises(Unauthorized):
        analyst.list_studies()


# ---- problems as objects, unreachable servers, and the routes of night and profile management ----
NIGHT = "/v1/studies/{study}/participants/{pid}/nights/{night_id}"
PROFILES = "/v1/studies/{study}/import-profiles"


def test_problems_come_back_as_problem_objects_naming_where(client) -> None:
    from models import InvalidNightError, Problem
    from service.errors import Unprocessable

    with pytest.raises(Unprocessable) as bad_request:
        client.create_study("no spaces allowed", "")
    assert bad_request.value.code == "invalid_request" and bad_request.value.status == 422
    problems = bad_request.value.problems
    assert all(isinstance(p, Problem) for p in problems)
    assert {p.location["field"] for p in problems} == {"study_id", "name"}  # both fields break the rules
    client.create_study("s1", "One")
    bad = night_json(240)
    bad["counts"][7] = -2
    with pytest.raises(InvalidNightError) as invalid:
        client.post_night("s1", "p1", bad)
    assert all(isinstance(p, Problem) for p in invalid.value.problems)
    assert [p.to_dict() for p in invalid.value.problems] == invalid.value.problem["problems"]  # as the server sent
    assert invalid.value.problems[0].location["epoch"] == 7


def test_an_unreachable_server_is_an_error_not_a_transport_exception() -> None:
    from harness import free_port

    from service.client import NightbankClient
    from service.errors import ServiceError

    with NightbankClient(f"http://127.0.0.1:{free_port()}", token="nb_x") as nb, pytest.raises(ServiceError) as down:
        nb.list_studies()
    assert down.value.code == "server_unreachable" and "127.0.0.1" in down.value.message


def test_update_night_needs_something_to_change(client) -> None:
    from service.errors import BadRequest

    with pytest.raises(BadRequest) as nothing:
        client.update_night("s1", "p1", "ab" * 10)
    assert nothing.value.code == "nothing_to_change"


def _stored(client, **extra) -> str:
    if not client.list_studies():
        client.create_study("s1", "One")
    return client.post_night("s1", "p1", night_json(240, **extra))["night_id"]


@needs_route("POST", "/v1/studies", field="epoch_seconds")
def test_create_study_with_an_epoch_length(client) -> None:
    assert client.create_study("m", "Minute epochs", epoch_seconds=60)["epoch_seconds"] == 60
    assert client.create_study("h", "Half-minute epochs")["epoch_seconds"] == 30  # the documented default


@needs_route("GET", NIGHT, query="epochs")
def test_get_night_with_epochs_gives_back_what_was_posted(client) -> None:
    body = night_json(240, seed=2)
    night_id = _stored(client, seed=2)
    plain = client.get_night("s1", "p1", night_id)
    assert "counts" not in plain
    full = client.get_night("s1", "p1", night_id, epochs=True)
    assert full["epoch_seconds"] == body["epoch_seconds"]
    assert full["counts"] == body["counts"] and full["reference"] == body["reference"]  # the posted arrays


@needs_route("DELETE", NIGHT)
@needs_route("PATCH", NIGHT)
def test_delete_and_update_night(client) -> None:
    from service.errors import NotFound

    night_id = _stored(client)
    other = _stored(client, seed=3, start="2031-03-05T22:00:00+01:00")
    assert client.update_night("s1", "p1", night_id, label="first night", excluded=True)["label"] == "first night"
    after = client.get_night("s1", "p1", night_id)
    assert after["label"] == "first night" and after["excluded"] is True
    client.update_night("s1", "p1", night_id, label=None)
    after = client.get_night("s1", "p1", night_id)
    assert after["label"] is None and after["excluded"] is True  # excluded kept: it was not sent
    assert isinstance(client.delete_night("s1", "p1", night_id), dict)
    assert [n["night_id"] for n in client.list_nights("s1", "p1")] == [other]
    with pytest.raises(NotFound):
        client.get_night("s1", "p1", night_id)


@needs_route("POST", "/v1/studies/{study}/participants/{pid}/rename")
def test_rename_participant(client) -> None:
    from service.errors import NotFound

    night_id = _stored(client)
    client.rename_participant("s1", "p1", "P01")
    assert [p["participant_id"] for p in client.list_participants("s1")] == ["P01"]
    assert [n["night_id"] for n in client.list_nights("s1", "P01")] == [night_id]
    with pytest.raises(NotFound):
        client.list_nights("s1", "p1")


@needs_route("GET", "/v1/studies/{study}/jobs", query="state")
def test_list_jobs_by_state(client) -> None:
    _stored(client)
    job_id = client.train_pooled("s1", n_trials=2)["job_id"]  # no worker runs: it stays queued
    assert [j["job_id"] for j in client.list_jobs("s1")] == [job_id]
    assert [j["job_id"] for j in client.list_jobs("s1", state="queued")] == [job_id]
    assert client.list_jobs("s1", state="succeeded") == []


def _profile_of(answer: dict) -> dict:
    """The JSON form of the profile in a server answer (the profile, or a record holding it under ``profile``)."""
    from models import ImportProfile

    body = answer.get("profile", answer)
    return ImportProfile.from_dict({k: v for k, v in body.items() if k in ImportProfile.__dataclass_fields__}).to_dict()


@needs_route("POST", PROFILES, query="replace")
@needs_route("GET", PROFILES)
@needs_route("GET", PROFILES + "/{name}")
@needs_route("DELETE", PROFILES + "/{name}")
def test_import_profile_round_trip(client) -> None:
    from models import ImportProfile
    from service.errors import Conflict, NotFound

    client.create_study("s1", "One")
    profile = ImportProfile.from_dict({"name": "lab", "delimiter": ";", "skip_rows": 2,
                                       "columns": {"time": "Zeit", "counts": "Aktivitaet"}}).to_dict()
    client.create_profile("s1", profile)
    assert _profile_of(client.get_profile("s1", "lab")) == profile
    with pytest.raises(Conflict):
        client.create_profile("s1", profile)
    client.create_profile("s1", {**profile, "skip_rows": 3}, replace=True)
    assert _profile_of(client.get_profile("s1", "lab")) == {**profile, "skip_rows": 3}
    assert [_profile_of(p)["name"] for p in client.list_profiles("s1")] == ["lab"]
    client.delete_profile("s1", "lab")
    assert client.list_profiles("s1") == []
    with pytest.raises(NotFound):
        client.get_profile("s1", "lab")


@needs_route("POST", PROFILES + "/guess")
def test_guess_profile_of_a_semicolon_export(client) -> None:
    from datetime import datetime, timedelta

    client.create_study("s1", "One")
    start = datetime(2031, 3, 2, 22, 41)
    rows = [f"{start + timedelta(seconds=30 * k):%d.%m.%Y %H:%M:%S};{k % 7};{'wach' if k % 3 else 'rem'}"
            for k in range(240)]
    data = ("Zeit;Aktivitaet;Stadium\n" + "\n".join(rows) + "\n").encode()
    guess = client.guess_profile("s1", data)
    assert guess["profile"]["delimiter"] == ";"  # as the file is written
    assert guess["profile"]["columns"]["counts"] == "Aktivitaet"
    assert set(guess["stage_codes_found"]) == {"wach", "rem"}  # the codes written in the file
    assert len(guess["preview"]) >= 1 and isinstance(guess["notes"], list)


@needs_route("POST", "/v1/studies/{study}/participants/{pid}/nights", query="allow_overlap")
def test_overlapping_night_is_refused_unless_allowed(client) -> None:
    from service.errors import Conflict

    _stored(client)
    later = night_json(240, seed=4, start="2031-03-02T23:41:00+01:00")  # starts 1 h into the stored 2-h night
    with pytest.raises(Conflict) as overlap:
        client.post_night("s1", "p1", later)
    assert overlap.value.code == "overlapping_night" and overlap.value.status == 409
    assert len(client.list_nights("s1", "p1")) == 1  # nothing stored
    assert client.post_night("s1", "p1", later, allow_overlap=True)["created"] is True
    assert len(client.list_nights("s1", "p1")) == 2
