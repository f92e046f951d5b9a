"""The web pages as a sub-application mounted under ``/ui`` of the service app.

A separate ASGI app keeps the pages apart from the API: its own error pages (HTML, or a
redirect to sign-in, instead of problem+json), its own security headers, its static files, and
no entries in the API's OpenAPI document. It shares the service's settings and database
sessions (``app.state``), so pages and API read the same registry.
"""

from __future__ import annotations

import logging
from collections.abc import Awaitable, Callable
from pathlib import Path
from urllib.parse import quote

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse, RedirectResponse, Response
from fastapi.staticfiles import StaticFiles
from starlette.exceptions import HTTPException as StarletteHTTPException

from models import NightbankError

from ..config import Settings
from . import actions, downloads, pages, recording_view, review_pages
from .access import UI_PREFIX, SignInRequired, page_principal_or_none
from .templating import page

__all__ = ["CONTENT_SECURITY_POLICY", "mount_ui"]

#: Pages load only this site's own scripts, styles and images; no inline script or style.
CONTENT_SECURITY_POLICY = ("default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self'; "
                           "connect-src 'self'; form-action 'self'; frame-ancestors 'none'; base-uri 'none'; "
                           "object-src 'none'")
_STATUS_HEADINGS = {400: "Bad request", 401: "Sign-in needed", 403: "Not allowed", 404: "Not found",
                    409: "Conflict", 422: "Cannot do that yet", 500: "Error", 503: "Database unavailable"}
log = logging.getLogger("nightbank.ui")


def _wants_json(request: Request) -> bool:
    return request.url.path.endswith(".json")


def _error(request: Request, status: int, detail: str) -> Response:
    if _wants_json(request):
        return JSONResponse({"status": status, "detail": detail}, status_code=status)
    principal = page_principal_or_none(request)
    return page(request, "message.html", principal=principal, status_code=status,
                heading=_STATUS_HEADINGS.get(status, "Error"), detail=detail)


async def _sign_in_required(request: Request, exc: Exception) -> Response:
    if _wants_json(request) or request.method != "GET":
        return _error(request, 401, str(exc))
    target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
    return RedirectResponse(f"{UI_PREFIX}/signin?next={quote(target, safe='')}", status_code=303)


async def _nightbank_error(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, NightbankError)
    return _error(request, int(getattr(exc, "status", 422)), exc.message)


async def _validation_error(request: Request, exc: Exception) -> Response:
    return _error(request, 404 if request.method == "GET" else 400, "the address or form is not valid")


async def _http_error(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, StarletteHTTPException)
    return _error(request, exc.status_code, "no such page" if exc.status_code == 404 else str(exc.detail))


async def _unexpected(request: Request, exc: Exception) -> Response:
    log.error("page %s failed", request.url.path, exc_info=exc)
    return _error(request, 500, "the page failed unexpectedly; the error was logged on the server")


def _ui_app(settings: Settings, parent: FastAPI) -> FastAPI:
    ui = FastAPI(title="nightbank pages", openapi_url=None, docs_url=None, redoc_url=None)
    ui.state.settings = settings
    ui.state.factory = parent.state.factory
    ui.state.api = parent  # the review pages pass their requests on to the API (review_bridge)
    ui.mount("/static", StaticFiles(directory=Path(__file__).parent / "static"), name="static")
    for router in (pages.router, actions.router, downloads.router, recording_view.router, review_pages.router):
        ui.include_router(router)
    ui.add_exception_handler(SignInRequired, _sign_in_required)
    ui.add_exception_handler(NightbankError, _nightbank_error)
    ui.add_exception_handler(RequestValidationError, _validation_error)
    ui.add_exception_handler(StarletteHTTPException, _http_error)
    ui.add_exception_handler(Exception, _unexpected)

    @ui.middleware("http")
    async def security_headers(request: Request, call_next: Callable[[Request], Awaitable[Response]]) -> Response:
        response = await call_next(request)
        response.headers.setdefault("X-Content-Type-Options", "nosniff")
        response.headers.setdefault("Referrer-Policy", "same-origin")
        if not request.url.path.startswith(f"{UI_PREFIX}/static/"):
            response.headers.setdefault("Cache-Control", "no-store")
        if response.headers.get("content-type", "").startswith("text/html"):
            response.headers["Content-Security-Policy"] = CONTENT_SECURITY_POLICY
            response.headers["X-Frame-Options"] = "DENY"
        return response
    return ui


def mount_ui(app: FastAPI, settings: Settings) -> None:
    """Serve the web pages under ``/ui`` of ``app`` (call after ``app.state.factory`` is set).

    Parameters
    ----------
    app : FastAPI
        The service app built by :func:`service.app.create_app`.
    settings : Settings
        The same settings the app was built with.
    """
    app.mount(UI_PREFIX, _ui_app(settings, app), name="ui")
