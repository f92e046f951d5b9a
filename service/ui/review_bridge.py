"""The review pages' way to the service's review routes: the API itself, called in-process.

The review page's script cannot call ``/v1/...`` directly: the session cookie is HttpOnly and
limited to ``/ui``, so the script never holds the bearer token. The page routes of
:mod:`service.ui.review_pages` therefore pass each request on to the API app this page app is
mounted in (an in-process ASGI call, no network), with the signed-in browser's token as
``Authorization: Bearer``. The API then applies its own checks (roles, study scoping, the
blind-review visibility, body validation, audit) exactly as for any other client; the page
routes add the checks every page action has (sign-in, form token, same-site origin).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import httpx
from fastapi import Request
from fastapi.responses import JSONResponse

from ..errors import Forbidden, NotFound, ServiceError
from .access import COOKIE_NAME, SignInRequired

__all__ = ["ApiAnswer", "api_error", "call_api"]

#: Host name of the in-process calls (never resolved: the transport is the app itself).
_INTERNAL_BASE = "http://nightbank.internal"
#: Longest time one in-process call may take (a preview is computed in well under a second).
_TIMEOUT_S = 60.0


@dataclass(frozen=True)
class ApiAnswer:
    """Status and JSON body (``None`` when the body is empty or not JSON) of one API call."""

    status: int
    body: Any

    @property
    def ok(self) -> bool:
        return 200 <= self.status < 300

    @property
    def detail(self) -> str:
        """The problem's ``detail`` (or a generic sentence naming the status)."""
        if isinstance(self.body, dict) and isinstance(self.body.get("detail"), str):
            return str(self.body["detail"])
        return f"the service answered with status {self.status}"

    def json_response(self) -> JSONResponse:
        """The answer as the page route's own JSON response (problem bodies are passed on unchanged)."""
        body = self.body if self.body is not None else {"status": self.status, "detail": self.detail}
        return JSONResponse(body, status_code=self.status)


def _token(request: Request) -> str:
    token = request.cookies.get(COOKIE_NAME)
    if not token:
        raise SignInRequired("sign in with your access token to see this page")
    return token


async def call_api(request: Request, method: str, path: str, *, params: dict[str, Any] | None = None,
                   body: bytes | None = None) -> ApiAnswer:
    """Call the service API on behalf of the signed-in browser.

    Parameters
    ----------
    request : Request
        The page request (its session cookie gives the bearer token).
    method : str
        ``"GET"`` or ``"POST"``.
    path : str
        API path, e.g. ``/v1/studies/s1/review-queue``.
    params : dict, optional
        Query parameters (``None`` values are left out).
    body : bytes, optional
        A JSON body, passed on as sent by the page.

    Returns
    -------
    ApiAnswer
        The API's status and JSON body.

    Raises
    ------
    SignInRequired
        If the browser is not signed in.
    """
    headers = {"Authorization": f"Bearer {_token(request)}", "Accept": "application/json"}
    if body is not None:
        headers["Content-Type"] = "application/json"
    query = {k: v for k, v in (params or {}).items() if v is not None}
    transport = httpx.ASGITransport(app=request.app.state.api, client=("127.0.0.1", 0))
    async with httpx.AsyncClient(transport=transport, base_url=_INTERNAL_BASE, timeout=_TIMEOUT_S) as client:
        response = await client.request(method, path, params=query, content=body, headers=headers)
    try:
        parsed = response.json() if response.content else None
    except ValueError:
        parsed = None
    return ApiAnswer(status=response.status_code, body=parsed)


def api_error(answer: ApiAnswer) -> ServiceError:
    """The page error for a failed API answer (the page shows its ``detail`` with the same status)."""
    if answer.status in (401,):
        return SignInRequired(answer.detail)
    if answer.status == 403:
        return Forbidden(answer.detail)
    if answer.status == 404:
        return NotFound(answer.detail)
    error = ServiceError(answer.detail)
    error.status = answer.status if 400 <= answer.status < 600 else 502
    return error
