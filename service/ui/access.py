"""Sign-in for the web pages: a token given once in a form, then kept in a session cookie.

What the cookie holds, and why
------------------------------
The cookie holds the token itself, not a server-side session id. Every page request verifies it
with :func:`service.store.tokens.verify_token`, exactly like an API request with
``Authorization: Bearer``, so the pages have the API's roles and study scoping by construction,
and a revoked token stops working on the next page load. No session table or in-memory session
store is needed, so the pages work the same behind several HTTP worker processes and across
restarts. A nightbank token is a 256-bit random secret (never a password someone reuses
elsewhere), so keeping it in the browser's cookie jar exposes nothing beyond that token.

The cookie is protected the way a session id would be:

- ``HttpOnly``: page scripts cannot read it;
- ``SameSite=Strict``: the browser never sends it on a request started from another site, which
  stops cross-site form posts (the training button) and cross-site reads;
- ``Path=/ui``: it is sent to the pages only, never to the API routes;
- ``Secure`` whenever the page was requested over HTTPS (directly or behind a proxy that sets
  ``X-Forwarded-Proto: https``);
- a lifetime of :data:`COOKIE_MAX_AGE_S` (8 hours); signing out deletes it.

State-changing requests (sign-in, sign-out, training) are POST forms, checked by :func:`check_form`:

- the forms of a signed-in browser (sign-out, training) carry a form token (field
  :data:`CSRF_FIELD`) that must match the session: an HMAC-SHA256 of the session cookie, a
  per-session synchroniser token that needs no server state (the pages work behind several HTTP
  processes) and that another site cannot compute, the cookie being unreadable to it;
- every form (sign-in included, which has no session yet to bind a token to) is refused when its
  ``Origin`` names another site, when it has no ``Origin`` and its ``Referer`` names another site,
  or when the browser marks it ``Sec-Fetch-Site: cross-site``.
"""

from __future__ import annotations

import hashlib
import hmac
from contextvars import ContextVar
from dataclasses import dataclass
from typing import Annotated, cast
from urllib.parse import urlsplit

from fastapi import Depends, Path, Request
from fastapi.responses import Response
from sqlalchemy.orm import Session, sessionmaker

from ..errors import Forbidden, NotFound, Unauthorized
from ..store.db import session_scope
from ..store.registry import ID_PATTERN
from ..store.tokens import Principal, Role, verify_token

__all__ = [
    "COOKIE_MAX_AGE_S",
    "COOKIE_NAME",
    "COOKIE_PATH",
    "CSRF_FIELD",
    "RENDERING",
    "PageAccess",
    "SignInRequired",
    "StudyPage",
    "UI_PREFIX",
    "check_form",
    "clear_cookie",
    "csrf_token",
    "page_principal",
    "page_principal_or_none",
    "safe_next",
    "set_cookie",
    "sign_in",
    "study_page",
]

#: Where the pages are mounted; also the cookie's path.
UI_PREFIX = "/ui"
COOKIE_NAME = "nightbank_ui"
COOKIE_PATH = UI_PREFIX
COOKIE_MAX_AGE_S = 8 * 3600
#: Name of the hidden form field that carries the form token.
CSRF_FIELD = "csrf_token"
#: The request whose page is being rendered (set around template rendering, read by ``csrf_token()``).
RENDERING: ContextVar[Request | None] = ContextVar("nightbank_rendering", default=None)


class SignInRequired(Unauthorized):
    """The page needs a signed-in browser (no cookie, or its token is no longer valid)."""

    code = "sign_in_required"


def _factory(request: Request) -> sessionmaker[Session]:
    return cast(sessionmaker[Session], request.app.state.factory)


def _is_https(request: Request) -> bool:
    forwarded = request.headers.get("x-forwarded-proto", "").split(",")[0].strip().lower()
    return request.url.scheme == "https" or forwarded == "https"


def sign_in(request: Request, token: str) -> Principal:
    """Verify a token typed into the sign-in form.

    Raises
    ------
    Unauthorized
        If the token is malformed, unknown or revoked.
    """
    with session_scope(_factory(request)) as session:
        return verify_token(session, token.strip())


def set_cookie(response: Response, request: Request, token: str) -> None:
    """Put the session cookie on ``response`` (see the module docstring for its attributes)."""
    response.set_cookie(COOKIE_NAME, token.strip(), max_age=COOKIE_MAX_AGE_S, path=COOKIE_PATH, httponly=True,
                        samesite="strict", secure=_is_https(request))


def clear_cookie(response: Response, request: Request) -> None:
    """Delete the session cookie."""
    response.delete_cookie(COOKIE_NAME, path=COOKIE_PATH, httponly=True, samesite="strict",
                           secure=_is_https(request))


def _session_form_token(session_token: str) -> str:
    return hmac.new(session_token.encode(), b"nightbank form token v1", hashlib.sha256).hexdigest()


def csrf_token(request: Request | None = None) -> str:
    """The form token of ``request``'s session (default: the page being rendered); empty when signed out."""
    request = request or RENDERING.get()
    session = None if request is None else request.cookies.get(COOKIE_NAME)
    return _session_form_token(session) if session else ""


def _cross_site(request: Request) -> str | None:
    own = {f"{request.url.scheme}://{request.url.netloc}", f"https://{request.url.netloc}"}
    if request.headers.get("sec-fetch-site", "").strip().lower() == "cross-site":
        return "the browser reports that this form was sent from another site"
    origin = request.headers.get("origin")
    if origin is not None:
        return None if origin in own else "this form may only be sent from nightbank's own pages"
    referer = request.headers.get("referer")
    if referer:
        parts = urlsplit(referer)
        if f"{parts.scheme}://{parts.netloc}" not in own:
            return "this form may only be sent from nightbank's own pages (it came from another site)"
    return None


def check_form(request: Request, submitted: str | None, *, signin: bool = False) -> None:
    """Refuse a form post from another site or without this browser's form token.

    Parameters
    ----------
    submitted : str or None
        The :data:`CSRF_FIELD` value of the form.
    signin : bool, default=False
        The sign-in form: only the cross-site checks (there is no session to bind a token to).

    Raises
    ------
    Forbidden
        If the request is cross-site (``Sec-Fetch-Site``, ``Origin`` or ``Referer``) or the token is
        missing or wrong.
    """
    why = _cross_site(request)
    if why is not None:
        raise Forbidden(why)
    if signin:
        return
    expected = csrf_token(request)
    if not expected or not submitted or not hmac.compare_digest(expected.encode(), submitted.encode()):
        raise Forbidden("this form has expired or was not sent from nightbank's pages; reload the page and "
                        "send it again")


def safe_next(target: str | None, default: str) -> str:
    """``target`` if it is a page of this site (``/ui/...``), else ``default`` (no open redirects)."""
    if target and target.startswith(f"{COOKIE_PATH}/") and not target.startswith("//") and "\\" not in target:
        return target
    return default


def page_principal(request: Request) -> Principal:
    """The principal behind the browser's session cookie.

    Raises
    ------
    SignInRequired
        If there is no cookie or its token is not valid any more.
    """
    token = request.cookies.get(COOKIE_NAME)
    if not token:
        raise SignInRequired("sign in with your access token to see this page")
    try:
        with session_scope(_factory(request)) as session:
            return verify_token(session, token)
    except Unauthorized:
        raise SignInRequired("your sign-in has ended or the token was revoked; sign in again") from None


def page_principal_or_none(request: Request) -> Principal | None:
    """The signed-in principal, or None (for pages that also show to visitors, like errors)."""
    try:
        return page_principal(request)
    except SignInRequired:
        return None


PrincipalPage = Annotated[Principal, Depends(page_principal)]


@dataclass(frozen=True)
class PageAccess:
    """A signed-in viewer of one study's pages."""

    study_id: str
    principal: Principal

    @property
    def actor(self) -> str:
        return self.principal.token_id

    @property
    def can_analyse(self) -> bool:
        """Whether the viewer may see scorings and comparisons and start training (analyst or above)."""
        return self.principal.role >= Role.analyst

    def require(self, role: Role) -> None:
        """Raise :class:`~service.errors.Forbidden` if the viewer's role is below ``role``."""
        if self.principal.role < role:
            raise Forbidden(f"this needs the {role.name} role; your token has {self.principal.role.name}")


def study_page(principal: PrincipalPage,
               study: Annotated[str, Path(pattern=ID_PATTERN, description="study id")]) -> PageAccess:
    """Dependency of every page under ``/ui/studies/{study}``: the same scoping as the API.

    A token scoped to another study gets 404, as if the study did not exist.
    """
    if not principal.sees(study):
        raise NotFound(f"no study {study!r}")
    return PageAccess(study_id=study, principal=principal)


StudyPage = Annotated[PageAccess, Depends(study_page)]
