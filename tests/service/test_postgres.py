"""The same code on PostgreSQL (psycopg 3): migrations and the main API flow.

Each run creates its own database on the server at 127.0.0.1:5432 and drops it afterwards
(``tests/pg_support.py``); without a reachable server the test is skipped with a message, unless
``NIGHTBANK_REQUIRE_POSTGRES=1`` (CI), where it fails.
"""

from __future__ import annotations

import httpx
import pytest
from factories import night_json
from harness import LiveServer, bearer, free_port
from pg_support import throwaway_database

pytestmark = pytest.mark.postgres


@pytest.fixture
def pg_settings():
    from service.config import Settings
    from service.store.schema import downgrade, upgrade

    with throwaway_database() as url:
        settings = Settings(db=url, port=free_port(), token_cache_s=0)
        upgrade(settings)
        downgrade(settings, "base")  # round trip on PostgreSQL too
        upgrade(settings)
        yield settings


def test_postgres_migrations_and_api_flow(pg_settings) -> None:
    from service.store.db import make_engine, make_session_factory, session_scope
    from service.store.tokens import create_token

    engine = make_engine(pg_settings)
    with session_scope(make_session_factory(engine), write=True) as session:
        token = create_token(session, role="admin")[1]
    engine.dispose()
    with LiveServer(pg_settings) as live, httpx.Client(base_url=live.url, headers=bearer(token)) as http:
        assert http.post("/v1/studies", json={"study_id": "s", "name": "S"}).status_code == 201
        first = http.post("/v1/studies/s/participants/p/nights", json=night_json(240))
        again = http.post("/v1/studies/s/participants/p/nights", json=night_json(240))
        assert (first.status_code, again.status_code) == (201, 200)
        assert again.json()["night_id"] == first.json()["night_id"]
        scored = http.get(f"/v1/studies/s/participants/p/nights/{first.json()['night_id']}/scoring",
                          params={"method": "sadeh"})
        assert scored.status_code == 200 and len(scored.json()["sleep"]) == 240
        assert http.post("/v1/studies/s/participants/p/training").status_code == 422  # one labelled night
        live.app.state.cache_writer.flush()
        assert http.delete("/v1/studies/s/participants/p").json()["scorings"] == 1
