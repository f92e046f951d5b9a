"""The bad-input corpus posted over HTTP: 4xx naming the defect, and the database unchanged."""

from __future__ import annotations

import hashlib
import json
import sqlite3
import sys
from pathlib import Path
from typing import Any

CORPUS = Path(__file__).resolve().parents[1] / "corpus"
sys.path.insert(0, str(CORPUS))


def _snapshot(db_path: str) -> dict[str, str]:
    """Row count and content digest of every table except the audit log (which records refusals)."""
    con = sqlite3.connect(db_path)
    try:
        out = {}
        for (table,) in con.execute("SELECT name FROM sqlite_master WHERE type='table' AND name NOT IN "
                                    "('audit_log', 'alembic_version') AND name NOT LIKE 'sqlite_%'"):
            rows = con.execute(f'SELECT * FROM "{table}" ORDER BY 1').fetchall()
            out[table] = f"{len(rows)}:{hashlib.sha256(repr(rows).encode()).hexdigest()}"
        return out
    finally:
        con.close()


def _content_type(name: str) -> str:
    return "application/json" if name.endswith(".json") else "text/csv"


def test_corpus_refused_over_http_and_nothing_stored(settings: Any, http: Any, admin: dict[str, str], study: str,
                                                     tmp_path: Path) -> None:
    from build import LARGE, write_large

    db_path = settings.db.removeprefix("sqlite:///")
    before = _snapshot(db_path)
    expected = json.loads((CORPUS / "expected.json").read_text())
    wrong = {}
    for name, code in expected.items():
        r = http.post(f"/v1/studies/{study}/participants/P01/nights", content=(CORPUS / name).read_bytes(),
                      headers={**admin, "Content-Type": _content_type(name)})
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
                  headers={**admin, "Content-Type": "application/json"})
    assert r.status_code in (413, 422), r.status_code
    assert r.json()["code"] in ("payload_too_large", "body_too_large", "invalid_night", *LARGE.values())
    assert _snapshot(db_path) == before
