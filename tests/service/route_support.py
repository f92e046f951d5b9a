"""What the service offers, read from a running server's ``/openapi.json``, for tests of routes still to come.

``needs_route(method, path, query=..., field=...)`` is a ``skipif`` mark whose condition is
evaluated when the test is set up (pytest calls ``bool`` on it then), so collecting tests starts
no server; the first evaluation serves the app once on a fresh SQLite file and keeps its OpenAPI
document.
"""

from __future__ import annotations

import re
import tempfile
from functools import cache
from typing import Any

import pytest
from harness import LiveServer, free_port


@cache
def served_openapi() -> dict[str, Any]:
    """The OpenAPI document of the app, as a running server serves it."""
    import httpx

    from service.config import Settings
    from service.store.schema import upgrade

    with tempfile.TemporaryDirectory() as tmp:
        settings = Settings(db=f"sqlite:///{tmp}/openapi.db", port=free_port(), job_workers=0)
        upgrade(settings)
        with LiveServer(settings) as live:
            return httpx.get(f"{live.url}/openapi.json", timeout=30).raise_for_status().json()


def _template(path: str) -> str:
    return re.sub(r"\{[^}]*\}", "{}", path)  # parameter names aside


def serves(method: str, path: str, *, query: str | None = None, field: str | None = None) -> bool:
    """Whether the server has ``method path``, with query parameter ``query`` and JSON body field ``field``."""
    doc = served_openapi()
    operation = next((ops.get(method.lower()) for p, ops in doc["paths"].items() if _template(p) == _template(path)),
                     None)
    if operation is None:
        return False
    if query is not None and query not in {p["name"] for p in operation.get("parameters", []) if p["in"] == "query"}:
        return False
    if field is not None:
        schema = operation.get("requestBody", {}).get("content", {}).get("application/json", {}).get("schema", {})
        if "$ref" in schema:
            schema = doc["components"]["schemas"][schema["$ref"].rsplit("/", 1)[1]]
        if field not in schema.get("properties", {}):
            return False
    return True


class _Missing:
    """True when the server lacks the route (asked only when pytest evaluates the mark)."""

    def __init__(self, method: str, path: str, query: str | None, field: str | None) -> None:
        self.args = (method, path, query, field)

    def __bool__(self) -> bool:
        method, path, query, field = self.args
        return not serves(method, path, query=query, field=field)


def needs_route(method: str, path: str, *, query: str | None = None, field: str | None = None) -> Any:
    """``skipif`` mark: skip until the server offers ``method path`` (with ``query`` / body ``field``)."""
    what = f"{method.upper()} {path}" + (f"?{query}=" if query else "") + (f" with field {field!r}" if field else "")
    return pytest.mark.skipif(_Missing(method, path, query, field), reason=f"the server has no {what} yet")
