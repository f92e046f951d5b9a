"""The validation report over HTTP and from the command line, on a trained study (real worker)."""

from __future__ import annotations

import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import httpx
import pytest
from harness import LiveServer, bearer, cohort_bodies, free_port, wait_for, worker_env

pytestmark = pytest.mark.slow
ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    """Two participants of three labelled nights each and one unlabelled; pooled model and P-01's personal
    model trained; a protocol set."""
    from service.config import Settings
    from service.jobs.workers import stop_worker_processes
    from service.store.db import make_engine, make_session_factory, session_scope
    from service.store.schema import upgrade
    from service.store.tokens import create_token

    path = tmp_path_factory.mktemp("report") / "nightbank.db"
    settings = Settings(db=f"sqlite:///{path}", port=free_port(), lease_s=5, heartbeat_s=0.5, poll_s=0.2, n_trials=2)
    upgrade(settings)
    engine = make_engine(settings)
    with session_scope(make_session_factory(engine), write=True) as session:
        token = create_token(session, role="admin")[1]
        ingest = create_token(session, role="ingest", study_id="r")[1]
    engine.dispose()
    bodies = cohort_bodies(n_participants=3, nights=4, seed=5)
    worker = subprocess.Popen([sys.executable, "-m", "service.jobs.workers"], env=worker_env(settings), cwd=ROOT)
    try:
        with LiveServer(settings) as live, httpx.Client(base_url=live.url, headers=bearer(token), timeout=300) as http:
            assert http.post("/v1/studies", json={"study_id": "r", "name": "Report study"}).status_code == 201
            for pid, nights in bodies.items():
                for b in nights:
                    assert http.post(f"/v1/studies/r/participants/{pid}/nights", json=b).status_code == 201
            for url in ("/v1/studies/r/pooled/training", "/v1/studies/r/participants/P-01/training"):
                job_id = http.post(url, json={"n_trials": 2}).json()["job_id"]
                job = wait_for(lambda j=job_id: (x := http.get(f"/v1/jobs/{j}").json())["state"] in
                               ("succeeded", "failed") and x)
                assert job["state"] == "succeeded", job["error"]
            assert http.put("/v1/studies/r/protocol", json={"waso_end": "final_awakening"}).status_code == 200
            yield http, live.url, token, ingest
    finally:
        stop_worker_processes([worker])


class _Assets(HTMLParser):
    """Every element that could load something from elsewhere, and every id."""

    def __init__(self) -> None:
        super().__init__()
        self.external: list[str] = []
        self.ids: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        found = dict(attrs)
        if found.get("id"):
            self.ids.append(str(found["id"]))
        for key in ("src", "href", "xlink:href"):
            value = found.get(key) or ""
            if value and not value.startswith("#"):
                self.external.append(f"{tag} {key}={value}")
        if tag in ("link", "script", "iframe", "img"):
            self.external.append(tag)


def test_report_is_one_self_contained_page_with_the_study_figures(trained) -> None:
    import numpy

    http, _, _, ingest = trained
    out = http.get("/v1/studies/r/report")
    assert out.status_code == 200 and out.headers["content-type"].startswith("text/html")
    html = out.text
    parser = _Assets()
    parser.feed(html)
    assert parser.external == []  # nothing fetched from elsewhere
    assert len(parser.ids) == len(set(parser.ids))  # inline SVGs keep their element ids apart
    svgs = re.findall(r"<svg.*?</svg>", html, flags=re.S)
    assert len(svgs) >= 4
    for svg in svgs:  # each inline figure is well-formed SVG (W3C SVG 1.1 namespace)
        assert ET.fromstring(svg).tag == "{http://www.w3.org/2000/svg}svg"
    comparison = http.get("/v1/studies/r/comparison").json()
    protocol = http.get("/v1/studies/r/protocol").json()
    assert protocol["fingerprint"] in html and "final_awakening" in html
    assert "not a medical device" in html and "not for diagnosis" in html
    for pid in ("P-01", "P-02", "P-03"):
        assert pid in html
    row = next(r for r in comparison["repeated_bland_altman"] if r["method"] == "sadeh" and r["parameter"] == "tst_min")
    assert f"{row['bias']:.1f} [{row['bias_ci'][0]:.1f}, {row['bias_ci'][1]:.1f}]" in html
    assert f"<td>numpy</td><td>{numpy.__version__}</td>" in html
    assert "Pooled model v1" in html and "Personal model v1 of participant P-01" in html
    assert html.count('id="agreement-') == 5 and "auto" in html
    assert http.get("/v1/studies/r/report", headers=bearer(ingest)).status_code == 403


def test_report_command_writes_the_page(trained, tmp_path: Path) -> None:
    from typer.testing import CliRunner

    from service.cli import app

    _, url, token, _ = trained
    target = tmp_path / "report.html"
    done = CliRunner().invoke(app, ["report", "--study", "r", "-o", str(target), "--server", url, "--token", token])
    assert done.exit_code == 0, done.output
    assert target.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    pdf = tmp_path / "report.pdf"
    done = CliRunner().invoke(app, ["report", "--study", "r", "-o", str(pdf), "--server", url, "--token", token])
    assert done.exit_code == 0, done.output
    data = pdf.read_bytes()
    # PDF 1.7 (ISO 32000-1): the header, and one page object per page (text, 5 tables, 7 Bland-Altman, figures)
    assert data.startswith(b"%PDF-") and data.count(b"/Type /Page\n") + data.count(b"/Type /Page ") >= 12
    missing = CliRunner().invoke(app, ["report", "--study", "nope", "-o", str(tmp_path / "x.html"), "--server", url,
                                       "--token", token])
    assert missing.exit_code == 1 and not (tmp_path / "x.html").exists()
