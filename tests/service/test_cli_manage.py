"""Managing commands through the installed console script against a live server.

``study``, ``night``, ``jobs``, ``profile``, and ``push --json`` / ``--dry-run`` / ``--profile``:
every output is checked against what the server stores, read back over the API. Tests of routes
the server does not offer yet are skipped until its OpenAPI document lists them.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

import httpx
import pytest
from factories import night_json
from harness import bearer, cohort_bodies, free_port
from route_support import needs_route

EXE = shutil.which("nightbank", path=str(Path(sys.executable).parent)) or "nightbank"
NIGHTS = "/v1/studies/{study}/participants/{pid}/nights"
NIGHT = "/v1/studies/{study}/participants/{pid}/nights/{night_id}"
PROFILES = "/v1/studies/{study}/import-profiles"


def nb(*args: str, stdin: str | None = None) -> subprocess.CompletedProcess[str]:
    """``nightbank ARGS`` in a subprocess (wide terminal, so tables do not wrap ids)."""
    env = {**os.environ, "COLUMNS": "250"}
    return subprocess.run([EXE, *args], capture_output=True, text=True, timeout=180, input=stdin, env=env,
                          check=False)


@pytest.fixture
def remote(server: Any, make_token: Any) -> list[str]:
    """``--server URL --token T`` of a lab-wide admin token."""
    return ["--server", server.url, "--token", make_token("admin")]


def _api(server: Any, remote: list[str]) -> httpx.Client:
    return httpx.Client(base_url=server.url, headers=bearer(remote[3]), timeout=60)


def _night_ids(http: httpx.Client, study: str) -> dict[str, set[str]]:
    """Night ids per participant, as the API lists them."""
    people = http.get(f"/v1/studies/{study}/participants", params={"limit": 500}).json()["data"]
    return {p["participant_id"]: {n["night_id"] for n in http.get(NIGHTS.format(study=study, pid=p["participant_id"]),
                                                                   params={"limit": 500}).json()["data"]}
            for p in people}


def _folder(tmp_path: Path, *, invalid: bool = False) -> Path:
    folder = tmp_path / "nights"
    for pid, nights in cohort_bodies(n_participants=2, nights=2).items():
        (folder / pid).mkdir(parents=True)
        for k, body in enumerate(nights):
            (folder / pid / f"n{k}.json").write_text(json.dumps(body))
    if invalid:
        bad = night_json(240)
        bad["counts"][5] = -3
        (folder / "P-01" / "z-bad.json").write_text(json.dumps(bad))
    return folder


def _lines(out: subprocess.CompletedProcess[str]) -> list[dict[str, Any]]:
    """stdout as JSON Lines: fails on any line that is not one JSON object."""
    return [json.loads(line) for line in out.stdout.splitlines()]


def _no_traceback(out: subprocess.CompletedProcess[str]) -> None:
    assert "Traceback" not in out.stderr and "Traceback" not in out.stdout, out.stderr


# ---- push --json and --dry-run ----------------------------------------------------------------
def test_push_json_gives_one_result_per_file_with_the_ids_the_server_lists(server, remote, tmp_path) -> None:
    folder = _folder(tmp_path, invalid=True)
    assert nb("study", "create", "s", "--name", "S", *remote).returncode == 0
    first = nb("push", str(folder), "--study", "s", "--json", *remote)
    assert first.returncode == 1, first.stderr  # one file is invalid
    rows = _lines(first)
    files = sorted(str(p.relative_to(folder)) for p in folder.glob("*/*.json"))
    assert [r["file"] for r in rows] == files
    with _api(server, remote) as http:
        stored = _night_ids(http, "s")
    created = {r["participant"]: set() for r in rows}
    for r in rows:
        if r["status"] == "created":
            created[r["participant"]].add(r["night_id"])
    assert created == stored and sum(map(len, stored.values())) == len(files) - 1  # every valid file
    (bad,) = [r for r in rows if r["status"] == "invalid"]
    assert bad["file"] == "P-01/z-bad.json" and bad["night_id"] is None
    assert bad["problems"][0]["code"] == "negative_count"
    assert bad["problems"][0]["location"]["epoch"] == 5  # the count made negative above
    (folder / "P-01" / "z-bad.json").unlink()
    again = nb("push", str(folder), "--study", "s", "--json", *remote)
    assert again.returncode == 0, again.stderr
    assert {(r["participant"], r["night_id"], r["status"]) for r in _lines(again)} == {
        (pid, nid, "stored_before") for pid, ids in stored.items() for nid in ids}


def test_push_dry_run_checks_every_file_here_and_stores_nothing(server, remote, tmp_path) -> None:
    folder = _folder(tmp_path, invalid=True)
    assert nb("study", "create", "s", "--name", "S", *remote).returncode == 0
    with _api(server, remote) as http:
        before = _night_ids(http, "s")
        out = nb("push", str(folder), "--study", "s", "--dry-run", "--json", "--allow-overlap", *remote)
        after = _night_ids(http, "s")
    assert before == after == {}
    assert out.returncode == 1  # the invalid file
    rows = {r["file"]: r for r in _lines(out)}
    assert rows["P-01/z-bad.json"]["status"] == "invalid"
    assert rows["P-01/z-bad.json"]["problems"][0]["code"] == "negative_count"
    for name, r in rows.items():
        if name == "P-01/z-bad.json":
            continue
        body = json.loads((folder / name).read_text())
        assert r["status"] == "would_send" and r["night_id"] is None
        assert r["epochs"] == len(body["counts"])  # one epoch per count in the file
        assert datetime.fromisoformat(r["start"]) == datetime.fromisoformat(body["start"])
        assert r["request"] == {"method": "POST", "path": f"/v1/studies/s/participants/{r['participant']}/nights",
                                "params": {"allow_overlap": "true"}, "content_type": "application/json",
                                "bytes": os.path.getsize(folder / name)}
    # a dry run without --profile needs no server at all
    (folder / "P-01" / "z-bad.json").unlink()
    offline = nb("push", str(folder), "--study", "s", "--dry-run", "--server", f"http://127.0.0.1:{free_port()}")
    assert offline.returncode == 0, offline.stderr
    n = len(rows) - 1
    assert "Dry run: nothing was sent" in offline.stdout and f"{n} of {n} nights would be sent" in offline.stdout


def test_errors_name_the_problem_and_where_without_traceback(server, remote, tmp_path) -> None:
    folder = _folder(tmp_path)
    dead = nb("push", str(folder), "--study", "s", "--server", f"http://127.0.0.1:{free_port()}")
    assert dead.returncode == 1 and "server_unreachable" in dead.stderr
    _no_traceback(dead)
    missing = nb("push", str(folder), "--study", "nope", "--json", *remote)
    assert missing.returncode == 1 and {r["status"] for r in _lines(missing)} == {"failed"}
    assert {r["problems"][0]["code"] for r in _lines(missing)} == {"not_found"}
    _no_traceback(missing)
    profile = tmp_path / "lab.json"
    profile.write_text(json.dumps({"name": "lab", "delimiter": "#", "colour": "blue"}))
    night = tmp_path / "n.json"
    night.write_text(json.dumps(night_json(240)))
    checked = nb("check", str(night), "--profile", str(profile))
    assert checked.returncode == 1 and "invalid_profile" in checked.stderr and str(profile) in checked.stderr
    assert "field delimiter" in checked.stderr or "field colour" in checked.stderr
    saved = nb("profile", "create", "s", str(profile), *remote)
    assert saved.returncode == 1 and "field colour" in saved.stderr  # refused here, before any request
    profile.write_text('{"name": "lab",\n "skip_rows": }')
    broken = nb("check", str(night), "--profile", str(profile))
    assert broken.returncode == 1 and "line 2" in broken.stderr and "invalid_profile_file" in broken.stderr
    by_name = nb("check", str(night), "--profile", "lab")  # a name needs --study
    assert by_name.returncode == 2 and "--study" in by_name.stderr
    unsaved = nb("profile", "guess", str(night), "--save", "lab")
    assert unsaved.returncode == 2 and "--study" in unsaved.stderr
    for out in (checked, saved, broken, by_name, unsaved):
        _no_traceback(out)


def test_check_reads_nights_with_a_profile_file(tmp_path) -> None:
    body = night_json(240, seed=3)
    night = tmp_path / "P01" / "n.csv"
    night.parent.mkdir()
    start = datetime.fromisoformat(body["start"])
    lines = ["time,counts,reference"] + [f"{(start + timedelta(seconds=30 * k)).isoformat()},{c},{r}"
                                         for k, (c, r) in enumerate(zip(body["counts"], body["reference"],
                                                                        strict=True))]
    night.write_text("\n".join(lines) + "\n")
    profile = tmp_path / "plain.json"
    profile.write_text(json.dumps({"name": "plain", "delimiter": ",",
                                   "columns": {"time": "time", "counts": "counts", "reference": "reference"}}))
    out = nb("check", str(night), "--profile", str(profile), "--json")
    assert out.returncode == 0, out.stderr
    (report,) = json.loads(out.stdout)
    assert report["valid"] and report["epochs"] == 240  # one epoch per data row
    assert report["reference_coverage_pct"] == 100.0  # every row has a stage


# ---- studies and nights -------------------------------------------------------------------------
def test_study_create_makes_the_study_the_api_lists(server, remote) -> None:
    out = nb("study", "create", "crew", "--name", "Crew rest", *remote)
    assert out.returncode == 0, out.stderr
    assert "created study crew (Crew rest, 30-s epochs)" in out.stdout
    with _api(server, remote) as http:
        assert [(s["study_id"], s["name"]) for s in http.get("/v1/studies").json()] == [("crew", "Crew rest")]
    twice = nb("study", "create", "crew", "--name", "Crew rest", *remote)
    assert twice.returncode == 1 and "conflict" in twice.stderr
    _no_traceback(twice)


@needs_route("POST", "/v1/studies", field="epoch_seconds")
def test_study_create_with_an_epoch_length(server, remote) -> None:
    out = nb("study", "create", "slow", "--name", "Minute epochs", "--epoch-seconds", "60", *remote)
    assert out.returncode == 0, out.stderr
    with _api(server, remote) as http:
        (listed,) = http.get("/v1/studies").json()
    assert listed["study_id"] == "slow" and listed["epoch_seconds"] == 60


def _stored_night(server: Any, remote: list[str], **extra: Any) -> str:
    with _api(server, remote) as http:
        if http.get("/v1/studies").json() == []:
            http.post("/v1/studies", json={"study_id": "s", "name": "S"}).raise_for_status()
        return str(http.post(NIGHTS.format(study="s", pid="P01"), json=night_json(240, **extra)).json()["night_id"])


def test_night_delete_asks_first_and_a_no_keeps_the_night(server, remote) -> None:
    night_id = _stored_night(server, remote)
    declined = nb("night", "delete", "s", "P01", night_id, *remote, stdin="n\n")
    assert declined.returncode == 1 and "delete night" in declined.stdout
    with _api(server, remote) as http:
        assert _night_ids(http, "s") == {"P01": {night_id}}


@needs_route("DELETE", NIGHT)
def test_night_delete_removes_the_night(server, remote) -> None:
    night_id = _stored_night(server, remote)
    kept = _stored_night(server, remote, seed=9, start="2031-03-04T22:00:00+01:00")
    out = nb("night", "delete", "s", "P01", night_id, "--yes", *remote)
    assert out.returncode == 0, out.stderr
    assert f"deleted night {night_id}" in out.stdout
    with _api(server, remote) as http:
        assert _night_ids(http, "s") == {"P01": {kept}}
        assert http.get(NIGHT.format(study="s", pid="P01", night_id=night_id)).status_code == 404
    again = nb("night", "delete", "s", "P01", night_id, "--yes", *remote)
    assert again.returncode == 1 and "not_found" in again.stderr


@needs_route("PATCH", NIGHT)
def test_night_exclude_and_include(server, remote) -> None:
    night_id = _stored_night(server, remote)
    url = NIGHT.format(study="s", pid="P01", night_id=night_id)
    with _api(server, remote) as http:
        assert nb("night", "exclude", "s", "P01", night_id, *remote).returncode == 0
        assert http.get(url).json()["excluded"] is True
        assert nb("night", "exclude", "s", "P01", night_id, "--include", *remote).returncode == 0
        assert http.get(url).json()["excluded"] is False
    unknown = nb("night", "exclude", "s", "P01", "0" * 64, *remote)
    assert unknown.returncode == 1 and "not_found" in unknown.stderr


@needs_route("GET", "/v1/studies/{study}/jobs")
def test_jobs_lists_the_queued_trainings(server, remote) -> None:
    _stored_night(server, remote)
    with _api(server, remote) as http:  # no worker runs: the job stays queued
        job_id = http.post("/v1/studies/s/pooled/training", json={"n_trials": 2}).json()["job_id"]
        assert http.get(f"/v1/jobs/{job_id}").json()["state"] == "queued"
    listed = nb("jobs", "s", "--json", *remote)
    assert listed.returncode == 0, listed.stderr
    assert [(j["job_id"], j["state"], j["participant_id"]) for j in json.loads(listed.stdout)] == [
        (job_id, "queued", None)]
    table = nb("jobs", "s", "--state", "queued", *remote)
    assert job_id in table.stdout and "1 job(s)" in table.stdout
    assert "0 job(s)" in nb("jobs", "s", "--state", "running", *remote).stdout
    assert nb("jobs", "s", "--state", "asleep", *remote).returncode == 2


# ---- import profiles ----------------------------------------------------------------------------
def _lab_export(path: Path, body: dict[str, Any]) -> Path:
    """A night as a lab's own export: a preamble, ';' separated, day-first times, its own headers and codes."""
    start = datetime.fromisoformat(body["start"]).replace(tzinfo=None)
    codes = {"W": "wach", "N1": "1", "N2": "2", "N3": "3", "R": "rem"}
    rows = [f"{(start + timedelta(seconds=30 * k)):%d.%m.%Y %H:%M:%S};{c};{codes[r]}"
            for k, (c, r) in enumerate(zip(body["counts"], body["reference"], strict=True))]
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("Device: wrist unit 7 (simulated)\nSubject: P01\nZeitpunkt;Aktivitaet;Stadium\n"
                    + "\n".join(rows) + "\n", encoding="utf-8")
    return path


LAB_PROFILE = {"name": "lab7", "delimiter": ";", "skip_rows": 2, "datetime_format": "%d.%m.%Y %H:%M:%S",
               "tz": "Europe/Berlin", "columns": {"time": "Zeitpunkt", "counts": "Aktivitaet", "reference": "Stadium"},
               "stage_codes": {"wach": "W", "1": "N1", "2": "N2", "3": "N3", "rem": "R"}}


@needs_route("POST", PROFILES, query="replace")
@needs_route("GET", PROFILES + "/{name}")
@needs_route("DELETE", PROFILES + "/{name}")
def test_profile_create_list_show_delete(server, remote, tmp_path) -> None:
    _stored_night(server, remote)
    file = tmp_path / "lab7.json"
    file.write_text(json.dumps(LAB_PROFILE))
    assert nb("profile", "create", "s", str(file), *remote).returncode == 0
    with _api(server, remote) as http:
        stored = http.get(f"/v1/studies/s/import-profiles/{LAB_PROFILE['name']}").json()
    assert {k: stored.get("profile", stored)[k] for k in LAB_PROFILE} == LAB_PROFILE
    taken = nb("profile", "create", "s", str(file), *remote)
    assert taken.returncode == 1 and "Traceback" not in taken.stderr
    assert nb("profile", "create", "s", str(file), "--replace", *remote).returncode == 0
    shown = nb("profile", "show", "s", "lab7", *remote)
    with _api(server, remote) as http:  # replacing records a new creation time
        stored = http.get(f"/v1/studies/s/import-profiles/{LAB_PROFILE['name']}").json()
    assert shown.returncode == 0 and json.loads(shown.stdout) == stored
    listed = nb("profile", "list", "s", "--json", *remote)
    assert [p.get("profile", p)["name"] for p in json.loads(listed.stdout)] == ["lab7"]
    assert "lab7" in nb("profile", "list", "s", *remote).stdout
    assert nb("profile", "delete", "s", "lab7", "--yes", *remote).returncode == 0
    gone = nb("profile", "show", "s", "lab7", *remote)
    assert gone.returncode == 1 and "not_found" in gone.stderr


@needs_route("POST", PROFILES)
@needs_route("GET", PROFILES + "/{name}")
@needs_route("POST", NIGHTS, query="profile")
def test_push_with_a_saved_profile_and_its_dry_run(server, remote, tmp_path) -> None:
    body = night_json(240, seed=4)
    folder = tmp_path / "export"
    _lab_export(folder / "P01" / "night.csv", body)
    with _api(server, remote) as http:
        http.post("/v1/studies", json={"study_id": "s", "name": "S"}).raise_for_status()
        http.post("/v1/studies/s/import-profiles", json=LAB_PROFILE).raise_for_status()
        dry = nb("push", str(folder), "--study", "s", "--profile", "lab7", "--dry-run", "--json", *remote)
        assert _night_ids(http, "s") == {}
        pushed = nb("push", str(folder), "--study", "s", "--profile", "lab7", "--json", *remote)
        assert pushed.returncode == 0, pushed.stderr
        (row,) = _lines(pushed)
        night = http.get(NIGHT.format(study="s", pid="P01", night_id=row["night_id"])).json()
    assert night["n_epochs"] == len(body["counts"]) and night["labelled"]  # every data row, with its stage
    (planned,) = _lines(dry)
    assert planned["request"]["params"] == {"profile": "lab7"}
    # the readers apply the profile here as the server does
    assert dry.returncode == 0 and planned["status"] == "would_send" and planned["epochs"] == night["n_epochs"]
    unknown = nb("push", str(folder), "--study", "s", "--profile", "nope", "--dry-run", *remote)
    assert unknown.returncode == 1 and "not_found" in unknown.stderr


@needs_route("POST", PROFILES)
def test_profile_guess_proposes_the_layout_and_saves_it(server, remote, tmp_path) -> None:
    body = night_json(240, seed=5)
    export = _lab_export(tmp_path / "export.csv", body)
    _stored_night(server, remote)
    out = nb("profile", "guess", str(export), "--study", "s", "--save", "guessed", "--yes", *remote)
    assert out.returncode == 0, out.stderr
    with _api(server, remote) as http:
        saved = http.get("/v1/studies/s/import-profiles/guessed").json()
    saved = saved.get("profile", saved)
    assert saved["name"] == "guessed"
    assert saved["delimiter"] == ";" and saved.get("skip_rows") == 2  # as the file is written
    assert saved["columns"]["counts"] == "Aktivitaet"
    assert "Aktivitaet" in out.stdout  # the preview table's header


@needs_route("POST", NIGHTS, query="allow_overlap")
def test_push_refuses_an_overlapping_night_unless_allowed(server, remote, tmp_path) -> None:
    _stored_night(server, remote)
    later = night_json(240, seed=6, start="2031-03-02T23:41:00+01:00")  # starts 1 h into the stored 2-h night
    folder = tmp_path / "more"
    (folder / "P01").mkdir(parents=True)
    (folder / "P01" / "later.json").write_text(json.dumps(later))
    refused = nb("push", str(folder), "--study", "s", "--json", *remote)
    (row,) = _lines(refused)
    assert refused.returncode == 1 and row["status"] == "refused"
    assert row["problems"][0]["code"] == "overlapping_night"
    with _api(server, remote) as http:
        assert len(_night_ids(http, "s")["P01"]) == 1
        allowed = nb("push", str(folder), "--study", "s", "--json", "--allow-overlap", *remote)
        (row,) = _lines(allowed)
        assert allowed.returncode == 0 and row["status"] == "created"
        assert row["night_id"] in _night_ids(http, "s")["P01"]
