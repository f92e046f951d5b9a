"""A throwaway PostgreSQL database per test session on the server at 127.0.0.1:5432.

The server is reached with trust authentication through its ``test`` database; each test session
creates its own database ``nightbank_t_<random>`` and drops it afterwards. Where no server answers,
PostgreSQL tests are skipped with a message saying how to run them — unless
``NIGHTBANK_REQUIRE_POSTGRES=1`` (set by ``.ci/run``), in which case they fail.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from contextlib import contextmanager

import pytest

ADMIN_URL = os.environ.get("NIGHTBANK_TEST_PG", "postgresql://postgres@127.0.0.1:5432/test")
HOW_TO = ("PostgreSQL tests need a server at 127.0.0.1:5432 with trust authentication and a database "
          "'test' (or set NIGHTBANK_TEST_PG to an admin URL); start one and re-run make test")


def _sqlalchemy_url(dbname: str) -> str:
    base = ADMIN_URL.rsplit("/", 1)[0].replace("postgresql://", "postgresql+psycopg://", 1)
    return f"{base}/{dbname}"


@contextmanager
def throwaway_database() -> Iterator[str]:
    """Create a fresh database; yield its SQLAlchemy URL; drop it (even after a failure)."""
    import psycopg

    try:
        admin = psycopg.connect(ADMIN_URL, autocommit=True, connect_timeout=3)
    except psycopg.OperationalError as exc:
        if os.environ.get("NIGHTBANK_REQUIRE_POSTGRES") == "1":
            pytest.fail(f"PostgreSQL expected but unreachable ({exc}). {HOW_TO}")
        pytest.skip(f"{HOW_TO} ({exc.__class__.__name__})")
    name = f"nightbank_t_{uuid.uuid4().hex[:12]}"
    with admin:
        admin.execute(f'CREATE DATABASE "{name}"')
        try:
            yield _sqlalchemy_url(name)
        finally:
            admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
