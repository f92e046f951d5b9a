"""Stored import profiles over real HTTP, on SQLite and PostgreSQL: save, list, read, replace, delete, and
every bad field named in a 422 with nothing stored."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from backends import BACKENDS, World, live_world

URL = "/v1/studies/s1/import-profiles"
PROFILE = {"name": "lab-export", "delimiter": ";", "skip_rows": 2, "decimal": ",",
           "columns": {"date": "Date", "time": "Time", "counts": "Activity", "reference": "Stage"},
           "datetime_format": "%d.%m.%Y %H:%M:%S", "tz": "Europe/Berlin", "stage_codes": {"0": "W", "5": "R"}}


@pytest.fixture(params=BACKENDS)
def world(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[World]:
    with live_world(request.param, tmp_path) as out:
        yield out


def test_profile_is_saved_listed_read_replaced_and_deleted(world: World) -> None:
    from models import ImportProfile
    from service.store.audit import list_audit
    from service.store.db import session_scope
    from service.store.profiles import get_profile

    http, ingest = world.http, world.token("ingest", "s1")
    r = http.post(URL, json=PROFILE, headers=ingest)
    assert r.status_code == 201, r.text
    saved = r.json()
    assert saved["name"] == "lab-export" and saved["profile"] == ImportProfile.from_dict(PROFILE).to_dict()
    assert saved["created_by"] == ingest["Authorization"].split("_")[1]
    assert http.get(f"{URL}/lab-export").json() == saved
    assert http.get(URL).json() == [saved]
    with session_scope(world.factory) as session:  # what the ingest route reads for ?profile=NAME
        profile = get_profile(session, "s1", "lab-export")
    assert profile == ImportProfile.from_dict(PROFILE) and profile.stage_code(" 5 ") == "R"
    again = http.post(URL, json=PROFILE)
    assert again.status_code == 409 and again.json()["code"] == "profile_exists" and "lab-export" in again.text
    changed = {**PROFILE, "skip_rows": 0, "tz": "Europe/Oslo"}
    replaced = http.post(URL, json=changed, params={"replace": "true"})
    assert replaced.status_code == 200 and replaced.json()["profile"]["tz"] == "Europe/Oslo"
    assert "skip_rows" not in replaced.json()["profile"]  # the default is not written out
    second = {"name": "plain"}
    assert http.post(URL, json=second).status_code == 201
    assert [p["name"] for p in http.get(URL).json()] == ["lab-export", "plain"]
    deleted = http.delete(f"{URL}/lab-export", headers=ingest)
    assert deleted.status_code == 200 and deleted.json()["profile"]["tz"] == "Europe/Oslo"
    missing = http.get(f"{URL}/lab-export")
    assert missing.status_code == 404 and "'lab-export'" in missing.json()["detail"]
    assert http.delete(f"{URL}/lab-export").status_code == 404
    with session_scope(world.factory) as session:
        actions = [e.action for e in list_audit(session, study_id="s1") if e.action.startswith("profile.")]
    assert actions == ["profile.delete", "profile.create", "profile.replace", "profile.create"]


def test_bad_profiles_get_a_422_naming_each_field_and_nothing_is_stored(world: World) -> None:
    http = world.http
    cases = {  # body -> fields the problems must name
        "tz": ({**PROFILE, "tz": "Mars/Olympus"}, {"tz"}),
        "two values": ({**PROFILE, "delimiter": "#", "tz": "Nowhere"}, {"delimiter", "tz"}),
        "two keys": ({**PROFILE, "colour": "blue", "skip_rows": "2"}, {"colour", "skip_rows"}),
        "format": ({**PROFILE, "datetime_format": "%H:%M"}, {"datetime_format"}),
        "role": ({**PROFILE, "columns": {"light": "Lux"}}, {"columns.light"}),
        "type": ({**PROFILE, "skip_rows": "2"}, {"skip_rows"}),
        "name": ({"delimiter": ","}, {"name"}),
    }
    for case, (body, fields) in cases.items():
        r = http.post(URL, json=body)
        assert r.status_code == 422 and r.json()["code"] == "invalid_profile", (case, r.text)
        assert {p["location"]["field"] for p in r.json()["problems"]} == fields, case
        assert all(p["location"]["field"] in p["message"] or p["code"] == "missing_field"
                   for p in r.json()["problems"]), case
    for body in ([PROFILE], "lab-export", None):
        assert http.post(URL, json=body).status_code == 422
    assert http.get(f"{URL}/bad name!").status_code in (404, 422)
    assert http.get(URL).json() == []
    assert http.get(URL, headers=world.token("admin", "s2")).status_code == 404  # another study's token


def test_a_guessed_profile_reads_the_lab_export_it_was_guessed_from(world: World) -> None:
    import pandas as pd

    # a day-first export with a metadata preamble, as written here; pandas with explicit arguments is the
    # outside reading of the same bytes
    times = pd.date_range("2031-03-02 22:41:00", periods=240, freq="30s")
    rows = [f"{t:%d.%m.%Y};{t:%H:%M:%S};{k % 9};{'2' if k % 4 else '0'}" for k, t in enumerate(times)]
    data = ("device;simulated\nserial;0000\nDate;Time;Activity;Stage\n" + "\n".join(rows) + "\n").encode()
    http, ingest = world.http, world.token("ingest", "s1")
    r = http.post(f"{URL}/guess", content=data, headers={**ingest, "content-type": "text/csv"})
    assert r.status_code == 200, r.text
    guess = r.json()
    assert guess["profile"]["skip_rows"] == 2 and guess["profile"]["delimiter"] == ";"
    assert set(guess["stage_codes_found"]) == {"0", "2"}
    profile = {**guess["profile"], "name": "guessed-lab", "tz": "Europe/Berlin"}
    assert http.post(URL, json=profile, headers=ingest).status_code == 201
    night = http.post("/v1/studies/s1/participants/P01/nights", params={"profile": "guessed-lab"}, content=data,
                      headers={**ingest, "content-type": "text/csv"})
    assert night.status_code == 201, night.text
    stored = http.get(f"/v1/studies/s1/participants/P01/nights/{night.json()['night_id']}",
                      params={"epochs": "true"}, headers=ingest).json()
    expected = pd.read_csv(__import__("io").BytesIO(data), sep=";", skiprows=2)
    assert stored["counts"] == expected["Activity"].astype(float).tolist()
    assert stored["n_epochs"] == len(expected)


def test_a_sample_no_profile_can_read_is_a_422(world: World) -> None:
    http, ingest = world.http, world.token("ingest", "s1")
    r = http.post(f"{URL}/guess", content=b"[]", headers={**ingest, "content-type": "text/csv"})
    assert r.status_code == 422 and r.json()["code"] == "profile_not_guessed"
    assert http.get(URL, headers=ingest).json() == []  # a guess saves nothing
