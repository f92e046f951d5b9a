"""Metrics in Prometheus text format, request ids, and logs that name no participant, token or counts."""

from __future__ import annotations

import logging
import re

from factories import night_json


def test_metrics_count_requests_by_route_template_and_jobs_by_state(http, study, admin) -> None:
    http.post(f"/v1/studies/{study}/participants/secret-pid/nights", json=night_json(240), headers=admin)
    text = http.get("/metrics", headers=admin).text
    assert 'nightbank_http_requests_total{method="POST",route="/v1/studies/{study}/participants/{pid}/nights",' \
           'status="201"} 1' in text
    assert "secret-pid" not in text
    assert re.search(r'nightbank_http_request_duration_seconds_bucket\{method="POST",route="/v1/studies",'
                     r'le="\+Inf"\} 1', text)
    for state in ("queued", "running", "succeeded", "failed", "cancelled"):
        assert f'nightbank_jobs{{state="{state}"}} 0' in text
    assert http.get("/metrics").status_code == 401


def test_info_logs_name_no_participant_token_or_counts(http, study, admin, caplog) -> None:
    caplog.set_level(logging.INFO)
    body = night_json(240, seed=1)
    body["counts"][0] = 987654
    r = http.post(f"/v1/studies/{study}/participants/PID-4471/nights", json=body, headers=admin)
    night_id = r.json()["night_id"]
    http.get(f"/v1/studies/{study}/participants/PID-4471/nights/{night_id}/scoring", params={"method": "sadeh"},
             headers=admin)
    http.post(f"/v1/studies/{study}/participants/PID-4471/nights", json={"counts": [-1]}, headers=admin)
    server_side = [rec for rec in caplog.records if not rec.name.startswith(("httpx", "httpcore"))]  # test client
    logged = "\n".join(rec.getMessage() for rec in server_side)
    assert "/v1/studies/{study}/participants/{pid}/nights" in logged  # the template is logged
    token = admin["Authorization"].split()[1]
    for secret in ("PID-4471", token, token.split("_")[2], "987654", night_id):
        assert secret not in logged


def test_responses_carry_a_request_id_and_errors_never_a_traceback(http, admin) -> None:
    r = http.get("/v1/studies/missing/participants", headers=admin)
    assert r.status_code == 404 and len(r.headers["x-request-id"]) == 16
    assert r.json()["request_id"] == r.headers["x-request-id"]
    assert "Traceback" not in r.text and "sqlalchemy" not in r.text.lower()
    r = http.get("/v1/nowhere", headers=admin)
    assert r.status_code == 404 and r.headers["content-type"] == "application/problem+json"
