"""Every error becomes ``application/problem+json`` (RFC 9457) with a stable ``code``.

- :class:`models.NightbankError` (and the service errors built on it): the error's ``status``
  (422 for science errors), its ``code`` and message; an error with ``problems`` (invalid
  nights, invalid import profiles, ...) lists every one with its location.
- Request validation: 422, ``code="invalid_request"``, one problem per field with its location.
- Unknown route or method: 404 / 405.
- Anything else: 500 with a request id and no traceback, SQL or internal detail.
"""

from __future__ import annotations

import logging
from typing import Any

from fastapi import FastAPI, Request
from fastapi.encoders import jsonable_encoder
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException

from models import InvalidNightError, NightbankError

__all__ = ["PROBLEM_RESPONSES", "install_problem_handlers", "problem_response", "problem_responses"]

log = logging.getLogger("nightbank.http")
MEDIA_TYPE = "application/problem+json"

_TITLES = {400: "Bad request", 401: "Unauthorized", 403: "Forbidden", 404: "Not found", 405: "Method not allowed",
           409: "Conflict", 413: "Payload too large", 415: "Unsupported media type", 422: "Unprocessable content",
           500: "Internal error", 503: "Service unavailable"}

_PROBLEM_SCHEMA = {"$ref": "#/components/schemas/Problem"}


def problem_responses(*statuses: int) -> dict[int | str, dict[str, Any]]:
    """OpenAPI ``responses`` entries of problem+json errors with these statuses."""
    return {status: {"description": _TITLES[status], "content": {MEDIA_TYPE: {"schema": _PROBLEM_SCHEMA}}}
            for status in statuses}


#: Responses every route may give, for the OpenAPI document.
PROBLEM_RESPONSES = problem_responses(400, 401, 403, 404, 422, 503)


def problem_response(request: Request, *, status: int, code: str, detail: str,
                     problems: list[dict[str, Any]] | None = None,
                     headers: dict[str, str] | None = None) -> JSONResponse:
    """A problem+json response."""
    body: dict[str, Any] = {"type": f"urn:nightbank:problem:{code}", "title": _TITLES.get(status, "Error"),
                            "status": status, "detail": detail, "code": code, "instance": request.url.path}
    if problems is not None:
        body["problems"] = problems
    request_id = getattr(request.state, "request_id", None)
    if request_id:
        body["request_id"] = request_id
    return JSONResponse(jsonable_encoder(body), status_code=status, media_type=MEDIA_TYPE, headers=headers)


def _location(loc: tuple[Any, ...] | list[Any]) -> dict[str, Any]:
    parts = [str(p) for p in loc]
    where = {"in": parts[0]} if parts and parts[0] in ("body", "query", "path", "header") else {}
    field = ".".join(parts[1:] if where else parts)
    return where | ({"field": field} if field else {})


async def _nightbank_error(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, NightbankError)
    status = int(getattr(exc, "status", 422))
    found = getattr(exc, "problems", None)
    listed = isinstance(exc, InvalidNightError) or (isinstance(found, list) and bool(found))
    problems = [p.to_dict() for p in found] if listed and found is not None else None
    headers = {"WWW-Authenticate": "Bearer"} if status == 401 else None
    if status >= 500:
        log.error("request failed: %s (%s)", exc.code, type(exc).__name__)
    return problem_response(request, status=status, code=exc.code, detail=exc.message, problems=problems,
                            headers=headers)


async def _validation_error(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, RequestValidationError)
    errors = jsonable_encoder(exc.errors())
    problems: list[dict[str, Any]] = [{"code": str(e.get("type", "invalid")), "message": str(e.get("msg", "")),
                                       "location": _location(e.get("loc", ()))} for e in errors]
    detail = f"the request has {len(problems)} problem(s): " + "; ".join(
        f"{p['location'].get('field', '?')}: {p['message']}" for p in problems[:3])
    return problem_response(request, status=422, code="invalid_request", detail=detail, problems=problems)


async def _http_error(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, StarletteHTTPException)
    code = {404: "not_found", 405: "method_not_allowed", 400: "bad_request"}.get(exc.status_code, "http_error")
    detail = exc.detail if isinstance(exc.detail, str) else _TITLES.get(exc.status_code, "error")
    return problem_response(request, status=exc.status_code, code=code, detail=detail,
                            headers=getattr(exc, "headers", None))


async def _unexpected(request: Request, exc: Exception) -> JSONResponse:
    log.error("unhandled %s on %s", type(exc).__name__, request.scope.get("route") and request.scope["route"].path,
              exc_info=exc)
    return problem_response(request, status=500, code="internal_error",
                            detail="the server failed to handle the request; quote the request id when reporting it")


def install_problem_handlers(app: FastAPI) -> None:
    """Register the problem handlers on ``app``."""
    app.add_exception_handler(NightbankError, _nightbank_error)
    app.add_exception_handler(RequestValidationError, _validation_error)
    app.add_exception_handler(StarletteHTTPException, _http_error)
    app.add_exception_handler(Exception, _unexpected)
