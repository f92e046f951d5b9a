"""``nightbank push`` with recording, diary and PSG files beside the nights, and ``nightbank days``, against a
live server (the typer app in-process, HTTP to the server)."""

from __future__ import annotations

import io
import json
from pathlib import Path
from typing import Any

import pandas as pd
from harness import cohort_bodies
from test_api_recordings import hypnogram_csv, recording_csv, simulated, sqlite_world  # noqa: F401


def _folder(tmp_path: Path) -> tuple[Path, Any]:
    sim = simulated(6, seed=13, psg_nights=1)[0]
    root = tmp_path / "upload"
    person = root / "P-01"
    person.mkdir(parents=True)
    (person / "recording.csv").write_bytes(recording_csv(sim.recording))
    (person / "diary.csv").write_text(sim.diary_csv)
    (person / "psg1.csv").write_bytes(hypnogram_csv(sim.psg[0]))
    night = cohort_bodies(n_participants=1, nights=1, seed=31)["P-01"][0]
    (person / "night-a.json").write_text(json.dumps(night))
    return root, sim


def _invoke(*args: str) -> Any:
    from typer.testing import CliRunner

    from service.cli import app

    return CliRunner().invoke(app, list(args))


def test_push_posts_a_folder_with_a_recording_its_diary_and_psg_beside_nights(sqlite_world, tmp_path) -> None:  # noqa: F811
    root, sim = _folder(tmp_path)
    token = sqlite_world.http.headers["Authorization"].split()[1]
    dry = _invoke("push", str(root), "--study", "s1", "--server", sqlite_world.url, "--token", token, "--dry-run",
                  "--json")
    assert dry.exit_code == 0, dry.output
    planned = [json.loads(line) for line in dry.stdout.splitlines() if line.startswith("{")]
    assert {r["file"] for r in planned} == {"P-01/night-a.json", "P-01/recording.csv", "P-01/diary.csv",
                                            "P-01/psg1.csv"}
    assert sqlite_world.http.get("/v1/studies/s1/participants").json()["count"] == 0  # a dry run sends nothing

    out = _invoke("push", str(root), "--study", "s1", "--server", sqlite_world.url, "--token", token, "--json")
    assert out.exit_code == 0, out.output
    rows = {r["file"]: r for r in (json.loads(line) for line in out.stdout.splitlines() if line.startswith("{"))}
    assert rows["P-01/recording.csv"]["status"] == "created"
    rid = rows["P-01/recording.csv"]["night_id"]
    assert rows["P-01/diary.csv"]["status"] == "created" and rows["P-01/psg1.csv"]["status"] == "created"
    recording = sqlite_world.http.get(f"/v1/studies/s1/participants/P-01/recordings/{rid}").json()
    assert recording["has_diary"] and recording["labelled_night_ids"] == [rows["P-01/psg1.csv"]["night_id"]]
    assert recording["n_epochs"] == sim.recording.n_epochs

    again = _invoke("push", str(root), "--study", "s1", "--server", sqlite_world.url, "--token", token, "--json")
    repeat = {r["file"]: r for r in (json.loads(line) for line in again.stdout.splitlines() if line.startswith("{"))}
    assert repeat["P-01/recording.csv"]["status"] == "stored_before" and repeat["P-01/recording.csv"]["night_id"] == rid

    target = tmp_path / "days.csv"
    days = _invoke("days", "--study", "s1", "--participant", "P-01", "-o", str(target), "--method", "sadeh",
                   "--server", sqlite_world.url, "--token", token)
    assert days.exit_code == 0, days.output
    frame = pd.read_csv(io.BytesIO(target.read_bytes()))
    assert len(frame) == len(sim.days) and set(frame["method"].dropna()) == {"sadeh"}
    bad = _invoke("days", "--study", "s1", "-o", str(tmp_path / "days.txt"), "--server", sqlite_world.url,
                  "--token", token)
    assert bad.exit_code == 2 and ".csv or .parquet" in bad.output
