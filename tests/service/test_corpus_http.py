"""The bad-input corpus posted over HTTP: 4xx naming the defect, and the database unchanged.

Run on both backends (a SQLite file and a throwaway PostgreSQL database): each answers alike.
"""

from __future__ import annotations

import hashlib
import json
import sys
from pathlib import Path
from typing import Any

import pytest
from backends import BACKENDS, live_world

CORPUS = Path(__file__).resolve().parents[1] / "corpus"
sys.path.insert(0, str(CORPUS))


def _snapshot(factory: Any) -> dict[str, str]:
    """Row count and content digest of every table except the audit log (which records refusals)."""
    from sqlalchemy import inspect, text

    with factory() as session:
        bind = session.get_bind()
        out = {}
        for table in inspect(bind).get_table_names():
            if table in ("audit_log", "alembic_version") or table.startswith("sqlite_"):
                continue
            rows = sorted(repr(tuple(row)) for row in session.execute(text(f'SELECT * FROM "{table}"')))
            out[table] = f"{len(rows)}:{hashlib.sha256(repr(rows).encode()).hexdigest()}"
        return out


def _content_type(name: str) -> str:
    return "application/json" if name.endswith(".json") else "text/csv"


@pytest.mark.parametrize("backend", BACKENDS)
def test_corpus_refused_over_http_and_nothing_stored(backend: str, tmp_path: Path) -> None:
    with live_world(backend, tmp_path) as world:
        _post_corpus(world.http, world.factory, "s1", tmp_path)


def _post_corpus(http: Any, factory: Any, study: str, tmp_path: Path) -> None:
    from build import LARGE, write_large

    before = _snapshot(factory)
    assert {"studies", "nights"} <= set(before), sorted(before)  # the snapshot sees the stored tables
    expected = json.loads((CORPUS / "expected.json").read_text())
    wrong = {}
    for name, code in expected.items():
        r = http.post(f"/v1/studies/{study}/participants/P01/nights", content=(CORPUS / name).read_bytes(),
                      headers={"Content-Type": _content_type(name)})
        body = r.json()
        codes = {p["code"] for p in body.get("problems", [])} | {body.get("code")}
        if not (400 <= r.status_code < 500 and code in codes):
            wrong[name] = (r.status_code, sorted(c for c in codes if c))
        assert r.headers["content-type"].startswith("application/problem+json")
        assert "Traceback" not in r.text and "SELECT" not in r.text
    assert not wrong, wrong
    # ten million epochs: refused by the body limit (413) or the epoch limit (422), never stored
    big = write_large(tmp_path)
    r = http.post(f"/v1/studies/{study}/participants/P01/nights", content=big.read_bytes(),
                  headers={"Content-Type": "application/json"})
    assert r.status_code in (413, 422), r.status_code
    assert r.json()["code"] in ("payload_too_large", "body_too_large", "invalid_night", *LARGE.values())
    assert _snapshot(factory) == before
