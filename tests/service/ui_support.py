"""Fixtures of the web-page tests: Chromium, the service in a uvicorn subprocess, a trained demo subset.

Chromium comes from the Debian ``chromium`` package. When it is missing, the fixture installs it
with apt if the tests run as root; otherwise the tests are skipped with a message saying how to
enable them. Playwright drives that browser (its own browser downloads are never used).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest
from harness import bearer, free_port, wait_for, worker_env

ROOT = Path(__file__).resolve().parents[2]
ARTIFACTS = ROOT / "test-artifacts" / "ui"
CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = ["--no-sandbox", "--headless", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-quic"]
ENABLE_HINT = ("install the Debian chromium package (as root: apt-get install -y chromium) and the test extras "
               "(pip install -e '.[test]') to run the web-page tests")
STUDY = "gullwing"  # the simulated demo study's id
#: Demo participants loaded: trained before the tests, trained through the page, too few labels.
TRAINED, UNTRAINED, FEW_LABELS = "GW-05", "GW-08", "GW-03"
N_TRIALS = 2


def ensure_chromium() -> str:
    """Path of the Debian Chromium, installed with apt when missing and running as root; else skip."""
    if Path(CHROMIUM).exists():
        return CHROMIUM
    if os.geteuid() != 0 or shutil.which("apt-get") is None:
        pytest.skip(f"Chromium not found at {CHROMIUM}: {ENABLE_HINT}")
    install = ["apt-get", "install", "-y", "--no-install-recommends", "chromium"]
    env = {**os.environ, "DEBIAN_FRONTEND": "noninteractive"}
    if subprocess.run(install, env=env, capture_output=True).returncode != 0:
        subprocess.run(["apt-get", "update"], env=env, capture_output=True)
        subprocess.run(install, env=env, capture_output=True)
    if not Path(CHROMIUM).exists():
        pytest.skip(f"installing Chromium with apt failed: {ENABLE_HINT}")
    return CHROMIUM


@dataclass
class Site:
    """The running service: its URL, settings and bearer tokens by name."""

    url: str
    settings: Any
    tokens: dict[str, str]
    night_ids: dict[str, list[str]] = field(default_factory=dict)


def _serve(settings: Any, log: Path) -> subprocess.Popen[bytes]:
    env = {**worker_env(settings), "PYTHONPATH": os.pathsep.join([str(Path(__file__).parent), str(ROOT)])}
    with log.open("wb") as out:
        return subprocess.Popen([sys.executable, "-m", "uvicorn", "ui_support:site_app", "--factory", "--host",
                                 "127.0.0.1", "--port", str(settings.port), "--log-level", "warning"],
                                cwd=ROOT, env=env, stdout=out, stderr=subprocess.STDOUT)


def site_app() -> Any:
    """The service app with the pages (``uvicorn --factory`` entry; settings from ``NIGHTBANK_*``).

    ``create_app`` mounts the pages itself once it calls ``mount_ui``; until then they are mounted here.
    """
    from service.app import app_from_env
    from service.config import get_settings
    from service.ui import mount_ui

    app = app_from_env()
    if not any(getattr(route, "path", None) == "/ui" for route in app.routes):
        mount_ui(app, get_settings())
    return app


def _stop(proc: subprocess.Popen[bytes]) -> None:
    if proc.poll() is None:
        proc.terminate()
        try:
            proc.wait(15)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def _load_demo_subset(http: Any, admin: dict[str, str]) -> dict[str, list[str]]:
    from models import demo_nights, night_to_json

    assert http.post("/v1/studies", json={"study_id": STUDY, "name": "Gullwing Ferries crew-rest study (SIMULATED)"},
                     headers=admin).status_code == 201
    ids: dict[str, list[str]] = {}
    for sim in demo_nights():
        pid = sim.night.participant_id
        if pid in (TRAINED, UNTRAINED, FEW_LABELS):
            r = http.post(f"/v1/studies/{STUDY}/participants/{pid}/nights", json=night_to_json(sim.night),
                          headers=admin)
            assert r.status_code == 201, r.text
            ids.setdefault(pid, []).append(r.json()["night_id"])
    return ids


def _train(http: Any, admin: dict[str, str], path: str) -> None:
    job_id = http.post(path, json={"n_trials": N_TRIALS}, headers=admin).json()["job_id"]

    def finished() -> Any:
        job = http.get(f"/v1/jobs/{job_id}", headers=admin).json()
        return job if job["state"] in ("succeeded", "failed", "cancelled") else None

    job = wait_for(finished, timeout_s=300, poll_s=0.5)
    assert job["state"] == "succeeded", job


@pytest.fixture(scope="module")
def site(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Site]:
    """The service (uvicorn subprocess, SQLite under a temporary folder, one training worker) with
    three demo participants; the pooled model and one participant's personal model are trained."""
    import httpx

    from service.config import Settings
    from service.jobs.workers import start_worker_processes, stop_worker_processes
    from service.store.db import make_engine, make_session_factory, session_scope
    from service.store.schema import upgrade
    from service.store.tokens import create_token

    folder = tmp_path_factory.mktemp("ui")
    settings = Settings(db=f"sqlite:///{folder / 'nightbank.db'}", port=free_port(), lease_s=30.0, heartbeat_s=1.0,
                        poll_s=0.2, n_trials=N_TRIALS, job_workers=1, log_level="WARNING")
    upgrade(settings)
    engine = make_engine(settings)
    tokens: dict[str, str] = {}
    with session_scope(make_session_factory(engine), write=True) as session:
        for name, role, study in (("admin", "admin", None), ("analyst", "analyst", STUDY), ("ingest", "ingest", STUDY),
                                  ("other", "admin", "other-study")):
            tokens[name] = create_token(session, role=role, study_id=study, actor="test")[1]
    engine.dispose()
    server = _serve(settings, folder / "server.log")
    workers = start_worker_processes(settings, 1)
    url = f"http://127.0.0.1:{settings.port}"
    try:
        with httpx.Client(base_url=url, timeout=120) as http:
            wait_for(lambda: _healthy(http, server, folder), timeout_s=120, poll_s=0.1)
            admin = bearer(tokens["admin"])
            night_ids = _load_demo_subset(http, admin)
            _train(http, admin, f"/v1/studies/{STUDY}/pooled/training")
            _train(http, admin, f"/v1/studies/{STUDY}/participants/{TRAINED}/training")
        yield Site(url=url, settings=settings, tokens=tokens, night_ids=night_ids)
    finally:
        stop_worker_processes(workers)
        _stop(server)


def _healthy(http: Any, server: subprocess.Popen[bytes], folder: Path) -> bool:
    import httpx

    if server.poll() is not None:
        raise RuntimeError(f"the server stopped: {(folder / 'server.log').read_text()[-2000:]}")
    try:
        return http.get("/healthz").status_code == 200
    except httpx.TransportError:
        return False


@pytest.fixture(scope="module")
def browser() -> Iterator[Any]:
    """Headless Debian Chromium driven by Playwright."""
    executable = ensure_chromium()
    sync_api = pytest.importorskip("playwright.sync_api", reason=ENABLE_HINT)
    with sync_api.sync_playwright() as p:
        launched = p.chromium.launch(executable_path=executable, args=CHROMIUM_ARGS)
        yield launched
        launched.close()


class Tab:
    """One browser context and page; collects console errors and uncaught page errors."""

    def __init__(self, browser: Any, url: str) -> None:
        self.url = url
        self.context = browser.new_context(viewport={"width": 1280, "height": 900}, accept_downloads=True)
        self.page = self.context.new_page()
        self.errors: list[str] = []
        self.page.on("console", lambda msg: self.errors.append(msg.text) if msg.type == "error" else None)
        self.page.on("pageerror", lambda exc: self.errors.append(str(exc)))

    def goto(self, path: str) -> Any:
        return self.page.goto(self.url + path)

    def sign_in(self, token: str) -> None:
        self.goto("/ui/signin")
        self.page.get_by_label("Access token").fill(token)
        self.page.get_by_role("button", name="Sign in").click()
        self.page.wait_for_load_state()

    def shot(self, name: str) -> None:
        ARTIFACTS.mkdir(parents=True, exist_ok=True)
        self.page.screenshot(path=str(ARTIFACTS / f"{name}.png"), full_page=True)

    def close(self) -> None:
        self.context.close()


@pytest.fixture
def tab(browser: Any, site: Site) -> Iterator[Callable[[str | None], Tab]]:
    """``tab(token_name)`` -> a fresh browser tab, signed in with that token (None: not signed in).

    Every tab is checked for console errors when the test ends.
    """
    opened: list[Tab] = []

    def open_tab(token_name: str | None) -> Tab:
        t = Tab(browser, site.url)
        opened.append(t)
        if token_name is not None:
            t.sign_in(site.tokens[token_name])
        return t

    yield open_tab
    errors = [e for t in opened for e in t.errors]
    for t in opened:
        t.close()
    assert not errors, errors


def wait_until(predicate: Callable[[], Any], *, timeout_s: float = 60) -> Any:
    """Poll ``predicate`` (e.g. a page query) until it returns a truthy value."""
    deadline = time.monotonic() + timeout_s
    while not (value := predicate()):
        if time.monotonic() > deadline:
            raise TimeoutError("condition not met in time")
        time.sleep(0.2)
    return value
