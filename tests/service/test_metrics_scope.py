"""What ``/metrics`` tells a token scoped to one study, over real HTTP.

A study token may scrape ``/metrics`` (ingest role and above) but learns nothing about other studies:
no series names a study, and the job counts it sees are those of its own study. A lab-wide admin
token also gets the per-study job series (``nightbank_study_jobs{study=...}``). Parsed with
``prometheus_client``'s own text parser.
"""

from __future__ import annotations

from harness import bearer, cohort_bodies
from prometheus_client.parser import text_string_to_metric_families


def _samples(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    return {(s.name, tuple(sorted(s.labels.items()))): s.value
            for family in text_string_to_metric_families(text) for s in family.samples}


def _jobs(samples, name: str = "nightbank_jobs", **labels: str) -> dict[str, float]:
    return {dict(k)["state"]: v for (n, k), v in samples.items()
            if n == name and all(dict(k).get(a) == b for a, b in labels.items())}


def test_study_tokens_see_no_other_study_in_metrics(http, admin, make_token) -> None:
    for study in ("alphasleep", "betawake"):
        assert http.post("/v1/studies", json={"study_id": study, "name": study}, headers=admin).status_code == 201
        for pid, nights in cohort_bodies(n_participants=2, nights=3).items():
            for body in nights:
                assert http.post(f"/v1/studies/{study}/participants/{pid}/nights", json=body,
                                 headers=admin).status_code == 201
    for pid in ("P-01", "P-02"):  # two queued jobs in betawake, none in alphasleep
        assert http.post(f"/v1/studies/betawake/participants/{pid}/training", headers=admin).status_code == 202
    for path in ("/v1/studies/betawake/participants", "/ui/studies/betawake", "/v1/studies/betawake/nope"):
        http.get(path, headers=admin)

    for role in ("ingest", "analyst", "admin"):
        scoped = http.get("/metrics", headers=bearer(make_token(role, study_id="alphasleep")))
        assert scoped.status_code == 200, scoped.text
        assert "betawake" not in scoped.text and "study=" not in scoped.text, role
        samples = _samples(scoped.text)
        assert _jobs(samples) == {"queued": 0, "running": 0, "succeeded": 0, "failed": 0, "cancelled": 0}
        assert any(n == "nightbank_http_requests_total" for n, _ in samples)  # the request series remain

    lab = _samples(http.get("/metrics", headers=admin).text)
    assert _jobs(lab)["queued"] == 2
    assert _jobs(lab, "nightbank_study_jobs", study="betawake")["queued"] == 2
    assert _jobs(lab, "nightbank_study_jobs", study="alphasleep")["queued"] == 0
