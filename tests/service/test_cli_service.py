"""Service commands: token management, serve restarts with queued and interrupted jobs, push/train/export."""

from __future__ import annotations

import os
import re
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import httpx
import pytest
from harness import bearer, cohort_bodies, free_port, wait_for

EXE = shutil.which("nightbank", path=str(Path(sys.executable).parent)) or "nightbank"


def _run(*args: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    return subprocess.run([EXE, *args], capture_output=True, text=True, timeout=120, env=env, check=False)


def test_token_commands_show_the_secret_once_and_store_only_a_hash(tmp_path: Path) -> None:
    from sqlalchemy import create_engine, text
    from typer.testing import CliRunner

    from service.cli import app

    runner = CliRunner()
    db = f"sqlite:///{tmp_path / 'cli.db'}"
    unmigrated = runner.invoke(app, ["token", "list", "--db", db])
    assert unmigrated.exit_code == 1 and "nightbank migrate" in unmigrated.output.replace("\n", " ")
    assert runner.invoke(app, ["migrate", "--db", db]).exit_code == 0
    made = _run("token", "create", "--study", "s1", "--role", "analyst", "--label", "lab", "--db", db)
    assert made.returncode == 0, made.stderr
    token = made.stdout.strip().splitlines()[-1]
    token_id = token.split("_")[1]
    assert token.startswith("nb_") and len(token) > 40
    listed = runner.invoke(app, ["token", "list", "--db", db])
    assert token_id in listed.output and token.split("_", 2)[2] not in listed.output
    engine = create_engine(db)
    with engine.connect() as conn:
        stored = conn.execute(text("SELECT secret_hash, salt FROM tokens")).one()
    engine.dispose()
    assert token.split("_", 2)[2] not in "".join(stored) and len(stored[0]) == 64
    lab_wide = runner.invoke(app, ["token", "create", "--role", "ingest", "--db", db])
    assert lab_wide.exit_code == 1  # a lab-wide token must be an admin token
    assert runner.invoke(app, ["token", "revoke", token_id, "--db", db]).exit_code == 0
    assert runner.invoke(app, ["token", "revoke", "000000000000", "--db", db]).exit_code == 1


def test_serve_without_migrating_refuses_an_empty_database_and_names_the_command(tmp_path: Path) -> None:
    from typer.testing import CliRunner

    from service.cli import app

    out = CliRunner().invoke(app, ["serve", "--db", f"sqlite:///{tmp_path / 'empty.db'}", "--no-migrate",
                                   "--port", str(free_port()), "--job-workers", "0"])
    assert out.exit_code == 1 and "nightbank migrate" in out.output.replace("\n", " ")


class _Serve:
    """``nightbank serve`` in a subprocess."""

    def __init__(self, db: str, port: int, job_workers: int) -> None:
        env = {**os.environ, "NIGHTBANK_LEASE_S": "4", "NIGHTBANK_HEARTBEAT_S": "0.5", "NIGHTBANK_POLL_S": "0.2",
               "NIGHTBANK_LOG_LEVEL": "WARNING"}
        self.proc = subprocess.Popen([EXE, "serve", "--db", db, "--port", str(port), "--job-workers",
                                      str(job_workers)], env=env)
        self.url = f"http://127.0.0.1:{port}"
        wait_for(self._up, timeout_s=60)

    def _up(self) -> bool:
        assert self.proc.poll() is None, "serve exited"
        try:
            return httpx.get(f"{self.url}/healthz").status_code == 200
        except httpx.TransportError:
            return False

    def stop(self) -> None:
        self.proc.send_signal(signal.SIGINT)
        self.proc.wait(60)


@pytest.mark.slow
def test_serve_restart_resumes_queued_and_interrupted_jobs(tmp_path: Path) -> None:
    from sqlalchemy import create_engine, text

    db, port = f"sqlite:///{tmp_path / 'serve.db'}", free_port()
    assert _run("migrate", "--db", db).returncode == 0
    headers = bearer(_run("token", "create", "--role", "admin", "--db", db).stdout.strip().splitlines()[-1])
    server = _Serve(db, port, job_workers=0)
    try:
        http = httpx.Client(base_url=server.url, headers=headers, timeout=60)
        http.post("/v1/studies", json={"study_id": "s", "name": "S"}).raise_for_status()
        for pid, nights in cohort_bodies(n_participants=2, nights=3).items():
            for body in nights:
                http.post(f"/v1/studies/s/participants/{pid}/nights", json=body).raise_for_status()
        quick = http.post("/v1/studies/s/participants/P-01/training", json={"n_trials": 2}).json()["job_id"]
        slow = http.post("/v1/studies/s/participants/P-02/training", json={"n_trials": 400}).json()["job_id"]
    finally:
        server.stop()
    server = _Serve(db, port, job_workers=1)  # the queued jobs run after a restart
    try:
        job = wait_for(lambda: (j := http.get(f"/v1/jobs/{quick}").json())["state"] == "succeeded" and j)
        assert job["result"]["model_version"] == 1
        wait_for(lambda: http.get(f"/v1/jobs/{slow}").json()["progress"]["done"] > 0)
    finally:
        server.stop()  # interrupts the slow job: it goes back to the queue
    engine = create_engine(db)
    with engine.connect() as conn:
        assert conn.execute(text("SELECT state FROM jobs WHERE job_id = :j"), {"j": slow}).scalar() == "queued"
    engine.dispose()
    server = _Serve(db, port, job_workers=1)
    try:
        wait_for(lambda: http.get(f"/v1/jobs/{slow}").json()["state"] == "running")
        assert http.post(f"/v1/jobs/{slow}/cancel").json()["state"] in ("running", "cancelled")
        assert wait_for(lambda: (j := http.get(f"/v1/jobs/{slow}").json())["state"] != "running" and j)["state"] \
            == "cancelled"
    finally:
        server.stop()
        http.close()


@pytest.mark.slow
def test_push_train_and_export_commands(server, make_token, start_worker, tmp_path: Path) -> None:
    import json

    from typer.testing import CliRunner

    from service.cli import app

    token = make_token("admin")
    httpx.post(f"{server.url}/v1/studies", json={"study_id": "s", "name": "S"}, headers=bearer(token))
    folder = tmp_path / "nights"
    for pid, nights in cohort_bodies(n_participants=3, nights=3).items():
        (folder / pid).mkdir(parents=True)
        for k, body in enumerate(nights):
            (folder / pid / f"n{k}.json").write_text(json.dumps(body))
    (folder / "P-01" / "broken.json").write_text('{"counts": []}')
    common = ["--server", server.url, "--token", token]
    runner = CliRunner()
    pushed = runner.invoke(app, ["push", str(folder), "--study", "s", *common])
    assert pushed.exit_code == 1 and "9 of 10 nights stored" in pushed.output and "invalid" in pushed.output
    (folder / "P-01" / "broken.json").unlink()
    again = runner.invoke(app, ["push", str(folder), "--study", "s", *common])
    assert again.exit_code == 0 and "stored before" in again.output
    start_worker()
    trained = runner.invoke(app, ["train", "--study", "s", "--all", "--n-trials", "2", *common])
    assert trained.exit_code == 0, trained.output
    assert "pooled" in trained.output and "P-03" in trained.output
    printed = dict(re.findall(r"^(pooled|P-0\d): job ([0-9a-f]{32})", trained.output, flags=re.MULTILINE))
    assert sorted(printed) == ["P-01", "P-02", "P-03", "pooled"]
    for label, job_id in printed.items():  # each printed id is a finished job of that target on the server
        job = httpx.get(f"{server.url}/v1/jobs/{job_id}", headers=bearer(token)).json()
        assert job["state"] == "succeeded" and job["participant_id"] == (None if label == "pooled" else label)
    for owner, path in ((None, "pooled"), ("P-02", "participants/P-02")):
        stored = httpx.get(f"{server.url}/v1/studies/s/{path}/models", headers=bearer(token)).json()
        args = ["models", "s", *common] + (["--participant", owner] if owner else [])
        listed = runner.invoke(app, [*args, "--json"])
        assert listed.exit_code == 0 and json.loads(listed.output) == stored
        table = runner.invoke(app, args, env={"COLUMNS": "250"})
        assert table.exit_code == 0 and "active" in table.output
        assert {int(v) for v in re.findall(r"^│\s+(\d+) │", table.output, flags=re.MULTILINE)} == {
            v["version"] for v in stored}
    out = tmp_path / "parameters.csv"
    exported = runner.invoke(app, ["export", "--study", "s", "-o", str(out), *common])
    assert exported.exit_code == 0 and out.read_text().startswith("study_id,participant_id")
