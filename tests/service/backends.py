"""A live app over either database backend: a SQLite file or a throwaway PostgreSQL database."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
from harness import LiveServer, bearer, free_port

#: parametrize a fixture with these to run a test on both databases (PostgreSQL marked ``postgres``)
BACKENDS = ["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)]


@dataclass
class World:
    """The served app: ``http`` is a client with a lab-wide admin token; study ``s1`` exists."""

    http: Any
    url: str
    factory: Any
    server: LiveServer

    def token(self, role: str, study_id: str | None = None) -> dict[str, str]:
        """Headers of a new token of ``role``."""
        from service.store.db import session_scope
        from service.store.tokens import create_token

        with session_scope(self.factory, write=True) as session:
            return bearer(create_token(session, role=role, study_id=study_id, actor="test")[1])


@contextmanager
def live_world(backend: str, tmp_path: Path) -> Iterator[World]:
    """Migrate a fresh database of ``backend``, serve the app over HTTP, create study ``s1``."""
    import httpx

    from service.config import Settings
    from service.store.db import make_engine, make_session_factory
    from service.store.schema import upgrade

    with ExitStack() as stack:
        if backend == "sqlite":
            url = f"sqlite:///{tmp_path / 'nightbank.db'}"
        else:
            from pg_support import throwaway_database

            url = stack.enter_context(throwaway_database())
        settings = Settings(db=url, port=free_port(), token_cache_s=0.5, n_trials=2, job_workers=1,
                            prepare_review_queue=False)
        upgrade(settings)
        engine = make_engine(settings)
        stack.callback(engine.dispose)
        factory = make_session_factory(engine)
        server = stack.enter_context(LiveServer(settings))
        out = World(http=None, url=server.url, factory=factory, server=server)
        out.http = stack.enter_context(httpx.Client(base_url=server.url, timeout=60, headers=out.token("admin")))
        assert out.http.post("/v1/studies", json={"study_id": "s1", "name": "Study one"}).status_code == 201
        yield out
