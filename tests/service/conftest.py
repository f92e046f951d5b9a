"""Service fixtures: a migrated SQLite file per test, the app served by uvicorn, tokens by role.

Heavy imports (FastAPI, SQLAlchemy, uvicorn) happen inside the fixtures, not at collection.
"""

from __future__ import annotations

import subprocess
import sys
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
from harness import LiveServer, bearer, free_port, worker_env

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture
def settings(tmp_path: Path, request: pytest.FixtureRequest) -> Any:
    """Settings of a fresh, migrated SQLite database under ``tmp_path`` (short leases, few trials).

    Trainings leave the review queue unprepared unless the test is marked ``prepared_review_queue``
    (preparing it scores every unlabelled night, which only tests of the queue need)."""
    from service.config import Settings
    from service.store.schema import upgrade

    prepare = request.node.get_closest_marker("prepared_review_queue") is not None
    s = Settings(db=f"sqlite:///{tmp_path / 'nightbank.db'}", port=free_port(), lease_s=3.0, heartbeat_s=0.5,
                 poll_s=0.2, n_trials=2, job_workers=1, token_cache_s=0.5, prepare_review_queue=prepare)
    upgrade(s)
    return s


@pytest.fixture
def factory(settings: Any) -> Any:
    from service.store.db import make_engine, make_session_factory

    engine = make_engine(settings)
    yield make_session_factory(engine)
    engine.dispose()


@pytest.fixture
def make_token(factory: Any) -> Callable[..., str]:
    """``make_token(role, study_id=None)`` -> bearer token stored in the test database."""
    from service.store.db import session_scope
    from service.store.tokens import create_token

    def make(role: str = "admin", study_id: str | None = None) -> str:
        with session_scope(factory, write=True) as session:
            return create_token(session, role=role, study_id=study_id, actor="test")[1]

    return make


@pytest.fixture
def server(settings: Any) -> Iterator[LiveServer]:
    with LiveServer(settings) as live:
        yield live


@pytest.fixture
def http(server: LiveServer) -> Iterator[Any]:
    """An httpx client of the live server, without a token."""
    import httpx

    with httpx.Client(base_url=server.url, timeout=60) as client:
        yield client


@pytest.fixture
def admin(make_token: Callable[..., str]) -> dict[str, str]:
    """Headers of a lab-wide admin token."""
    return bearer(make_token("admin"))


@pytest.fixture
def study(http: Any, admin: dict[str, str]) -> str:
    """A created study ``s1``."""
    assert http.post("/v1/studies", json={"study_id": "s1", "name": "Study one"}, headers=admin).status_code == 201
    return "s1"


@pytest.fixture
def start_worker(settings: Any) -> Iterator[Callable[[], subprocess.Popen[bytes]]]:
    """Start real worker processes (``python -m service.jobs.workers``); all are stopped after the test."""
    started: list[subprocess.Popen[bytes]] = []

    def start() -> subprocess.Popen[bytes]:
        proc = subprocess.Popen([sys.executable, "-m", "service.jobs.workers"], env=worker_env(settings), cwd=ROOT)
        started.append(proc)
        return proc

    yield start
    from service.jobs.workers import stop_worker_processes

    stop_worker_processes(started, timeout_s=10)


