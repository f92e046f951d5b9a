"""The Python client against a live server: operations and typed errors with the problem details."""

from __future__ import annotations

import time

import pytest
from factories import night_json


@pytest.fixture
def client(server, make_token):
    from service.client import NightbankClient

    with NightbankClient(server.url, token=make_token("admin")) as nb:
        yield nb


def test_client_round_trip(client, tmp_path) -> None:
    import json

    assert client.health() == {"status": "ok"}
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
