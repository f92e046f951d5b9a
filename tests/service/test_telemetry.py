"""Metrics in Prometheus text format, request ids, and logs that name no participant, token or counts."""

from __future__ import annotations

import logging
import os
import shutil
import signal
import subprocess
import sys
import threading
from pathlib import Path

import httpx
import pytest
from factories import night_json
from harness import bearer, free_port, wait_for

EXE = shutil.which("nightbank", path=str(Path(sys.executable).parent)) or "nightbank"


def _samples(text: str) -> dict[tuple[str, frozenset[tuple[str, str]]], float]:
    """Every sample of a Prometheus text body, read with prometheus_client's own parser."""
    from prometheus_client.parser import text_string_to_metric_families

    return {(s.name, frozenset(s.labels.items())): s.value
            for family in text_string_to_metric_families(text) for s in family.samples}


def _key(name: str, **labels: str) -> tuple[str, frozenset[tuple[str, str]]]:
    return name, frozenset(labels.items())


def test_metrics_count_requests_by_route_template_and_jobs_by_state(http, study, admin) -> None:
    http.post(f"/v1/studies/{study}/participants/secret-pid/nights", json=night_json(240), headers=admin)
    r = http.get("/metrics", headers=admin)
    assert r.headers["content-type"].startswith("text/plain; version=0.0.4")
    samples = _samples(r.text)
    route = "/v1/studies/{study}/participants/{pid}/nights"
    assert samples[_key("nightbank_http_requests_total", method="POST", route=route, status="201")] == 1
    assert "secret-pid" not in r.text
    assert samples[_key("nightbank_http_request_duration_seconds_bucket", method="POST", route="/v1/studies",
                        le="+Inf")] == 1
    assert samples[_key("nightbank_http_request_duration_seconds_count", method="POST", route="/v1/studies")] == 1
    for state in ("queued", "running", "succeeded", "failed", "cancelled"):
        assert samples[_key("nightbank_jobs", state=state)] == 0
    assert http.get("/metrics").status_code == 401


def test_info_logs_name_no_participant_token_or_counts(http, study, admin, caplog) -> None:
    caplog.set_level(logging.INFO)
    body = night_json(240, seed=1)
    body["counts"][0] = 298761
    r = http.post(f"/v1/studies/{study}/participants/PID-4471/nights", json=body, headers=admin)
    night_id = r.json()["night_id"]
    http.get(f"/v1/studies/{study}/participants/PID-4471/nights/{night_id}/scoring", params={"method": "sadeh"},
             headers=admin)
    http.post(f"/v1/studies/{study}/participants/PID-4471/nights", json={"counts": [-1]}, headers=admin)
    server_side = [rec for rec in caplog.records if not rec.name.startswith(("httpx", "httpcore"))]  # test client
    logged = "\n".join(rec.getMessage() for rec in server_side)
    assert "/v1/studies/{study}/participants/{pid}/nights" in logged  # the template is logged
    token = admin["Authorization"].split()[1]
    for secret in ("PID-4471", token, token.split("_", 2)[2], "298761", night_id):
        assert secret not in logged


def test_responses_carry_a_request_id_and_errors_never_a_traceback(http, admin) -> None:
    r = http.get("/v1/studies/missing/participants", headers=admin)
    assert r.status_code == 404 and len(r.headers["x-request-id"]) == 16
    assert r.json()["request_id"] == r.headers["x-request-id"]
    assert "Traceback" not in r.text and "sqlalchemy" not in r.text.lower()
    r = http.get("/v1/nowhere", headers=admin)
    assert r.status_code == 404 and r.headers["content-type"] == "application/problem+json"


@pytest.mark.slow
def test_metrics_of_several_http_workers_add_up_whichever_worker_answers(tmp_path: Path) -> None:
    db = f"sqlite:///{tmp_path / 'm.db'}"
    assert subprocess.run([EXE, "migrate", "--db", db], capture_output=True, timeout=120).returncode == 0
    made = subprocess.run([EXE, "token", "create", "--role", "admin", "--db", db], capture_output=True, text=True,
                          timeout=120)
    headers = bearer(made.stdout.strip().splitlines()[-1])
    temp = tmp_path / "tmp"
    temp.mkdir()
    port = free_port()
    url = f"http://127.0.0.1:{port}"
    env = {**os.environ, "TMPDIR": str(temp), "NIGHTBANK_LOG_LEVEL": "WARNING"}
    env.pop("PROMETHEUS_MULTIPROC_DIR", None)
    proc = subprocess.Popen([EXE, "serve", "--db", db, "--port", str(port), "--workers", "2", "--job-workers", "0",
                             "--no-migrate"], env=env)
    answered = 0  # every 200 of /healthz, the start-up probes included
    lock = threading.Lock()

    def health(timeout_s: float) -> bool:
        nonlocal answered
        try:
            ok = httpx.get(f"{url}/healthz", timeout=timeout_s).status_code == 200  # a new connection each time
        except httpx.TransportError:
            return False
        with lock:
            answered += ok
        return ok

    def up() -> bool:
        assert proc.poll() is None, "serve exited"
        return health(5)

    def both_workers_counted() -> bool:
        threads = [threading.Thread(target=health, args=(30,)) for _ in range(8)]
        for th in threads:
            th.start()
        for th in threads:
            th.join()
        return len(list(temp.glob("nightbank-metrics-*/counter_*.db"))) >= 2  # one file per process

    def counted() -> float:
        samples = _samples(httpx.get(f"{url}/metrics", headers=headers, timeout=30).text)
        return samples[_key("nightbank_http_requests_total", method="GET", route="/healthz", status="200")]

    try:
        wait_for(up, timeout_s=90)
        wait_for(both_workers_counted, timeout_s=60)
        wait_for(lambda: counted() == answered, timeout_s=10)  # a count lands just after its response
        assert [counted() for _ in range(6)] == [answered] * 6  # the same sum, whichever process answers
    finally:
        proc.send_signal(signal.SIGINT)
        proc.wait(60)
    assert not list(temp.glob("nightbank-metrics-*"))  # the folder goes with the server
