"""Request dependencies: settings, sessions, the caller's token, and study access by role.

Access rules, checked in this order for routes under ``/v1/studies/{study}``:

1. no or invalid token -> 401 (verified tokens are remembered for ``Settings.token_cache_s``
   seconds per process, so a revocation takes effect within that time);
2. a token scoped to another study -> 404 (the study is invisible to it, as if missing);
3. a role below the route's role -> 403.
"""

from __future__ import annotations

import zlib
from collections.abc import Awaitable, Callable, Iterator
from dataclasses import dataclass
from typing import Annotated, Any

from fastapi import Depends, Path, Request, Security
from fastapi.concurrency import run_in_threadpool
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from sqlalchemy.orm import Session, sessionmaker

from models import Problem

from ..config import Settings
from ..errors import BadRequest, Forbidden, NotFound, PayloadTooLarge, Unauthorized, Unprocessable, UnsupportedMediaType
from ..store.db import session_scope
from ..store.registry import ID_PATTERN
from ..store.tokens import Principal, Role, TokenCache, verify_token

__all__ = [
    "BODY_ENCODINGS", "FactoryDep", "PrincipalDep", "ReadSession", "SettingsDep", "StudyAccess", "read_body",
    "refuse_nul", "require_lab_role", "study_access",
]

_bearer = HTTPBearer(auto_error=False, description="Token from `nightbank token create`.")


async def _factory(request: Request) -> sessionmaker[Session]:
    return request.app.state.factory  # type: ignore[no-any-return]


async def _settings(request: Request) -> Settings:
    return request.app.state.settings  # type: ignore[no-any-return]


FactoryDep = Annotated[sessionmaker[Session], Depends(_factory)]
SettingsDep = Annotated[Settings, Depends(_settings)]


def _read_session(factory: FactoryDep) -> Iterator[Session]:
    with session_scope(factory) as session:
        yield session


ReadSession = Annotated[Session, Depends(_read_session)]


async def _principal(request: Request,
                     credentials: Annotated[HTTPAuthorizationCredentials | None, Security(_bearer)]) -> Principal:
    if credentials is None:
        raise Unauthorized("this route needs a bearer token: send 'Authorization: Bearer <token>'")
    cache: TokenCache = request.app.state.token_cache
    found = cache.get(credentials.credentials)
    if found is not None:
        return found
    factory: sessionmaker[Session] = request.app.state.factory  # read here: one dependency less per request

    def verify() -> Principal:
        with session_scope(factory) as session:
            return verify_token(session, credentials.credentials)

    principal = await run_in_threadpool(verify)
    cache.put(credentials.credentials, principal)
    return principal


PrincipalDep = Annotated[Principal, Depends(_principal)]


def _check_role(principal: Principal, role: Role) -> None:
    if principal.role < role:
        raise Forbidden(f"this operation needs the {role.name} role; the token has {principal.role.name}")


@dataclass(frozen=True)
class StudyAccess:
    """A caller allowed into one study with at least the route's role."""

    study_id: str
    principal: Principal

    @property
    def actor(self) -> str:
        return self.principal.token_id


def study_access(role: Role) -> Callable[..., Awaitable[StudyAccess]]:
    """Dependency for routes under ``/v1/studies/{study}`` needing at least ``role``."""

    async def dependency(request: Request, principal: PrincipalDep,
                         study: Annotated[str, Path(pattern=ID_PATTERN, description="study id")]) -> StudyAccess:
        if not principal.sees(study):
            raise NotFound(f"no study {study!r}")
        _check_role(principal, role)
        refuse_nul(dict(request.query_params), "query")
        return StudyAccess(study_id=study, principal=principal)

    dependency.required_role = role  # type: ignore[attr-defined]  # read by the route-table access tests
    return dependency


def refuse_nul(values: dict[str, Any], where: str) -> None:
    """422 ``nul_character`` naming the first field of ``values`` (texts, nested) holding a NUL character.

    NUL cannot be stored in PostgreSQL text and is never meaningful in a label, name or header,
    so it is refused everywhere text is stored, on every backend alike.
    """
    stack: list[tuple[str, Any]] = [(k, v) for k, v in values.items()]
    while stack:
        field, value = stack.pop(0)
        if "\x00" in field or (isinstance(value, str) and "\x00" in value):
            raise Unprocessable(f"{field.replace(chr(0), '?')} contains a NUL character (\\u0000), which is not "
                                "stored", code="nul_character",
                                problems=[Problem("nul_character", f"{field.replace(chr(0), '?')} contains a NUL "
                                                  "character", {"in": where, "field": field.replace(chr(0), "?")})])
        if isinstance(value, dict):
            stack += [(f"{field}.{k}", v) for k, v in value.items()]
        elif isinstance(value, list):
            stack += [(f"{field}.{i}", v) for i, v in enumerate(value)]


def require_lab_role(role: Role) -> Callable[..., Awaitable[Principal]]:
    """Dependency for routes outside one study's path needing at least ``role``."""

    async def dependency(principal: PrincipalDep) -> Principal:
        _check_role(principal, role)
        return principal

    dependency.required_role = role  # type: ignore[attr-defined]  # read by the route-table access tests
    return dependency


#: ``Content-Encoding`` of a request body -> zlib window bits (gzip with its header, deflate as zlib data)
BODY_ENCODINGS = {"gzip": 16 + zlib.MAX_WBITS, "x-gzip": 16 + zlib.MAX_WBITS, "deflate": zlib.MAX_WBITS}
_INFLATE_STEP = 2**20  # bytes expanded per step: the expanded body grows by at most this past the limit


def _too_large(limit_bytes: int, what: str = "body") -> PayloadTooLarge:
    return PayloadTooLarge(f"the {what} is larger than the limit of {limit_bytes / 2**20:g} MB",
                           code="payload_too_large" if what == "body" else "decompressed_too_large")


async def read_body(request: Request, limit_bytes: int) -> bytes:
    """The request body, refused (413) as soon as it is larger than ``limit_bytes``.

    A body sent with ``Content-Encoding: gzip`` (or ``x-gzip``, ``deflate``) is expanded as it
    arrives, in steps of at most 1 MB, and refused with 413 ``decompressed_too_large`` as soon as
    the expanded size passes ``limit_bytes``; a broken stream gets 400 ``undecodable_body`` and
    any other encoding 415 ``unsupported_content_encoding``. A body's memory is therefore bounded
    by about twice ``limit_bytes`` whatever it expands to.
    """
    declared = request.headers.get("content-length")
    if declared is not None and declared.isdigit() and int(declared) > limit_bytes:
        raise _too_large(limit_bytes)
    encoding = request.headers.get("content-encoding", "identity").strip().lower()
    inflater = None
    if encoding not in ("", "identity"):
        if encoding not in BODY_ENCODINGS:
            raise UnsupportedMediaType(f"Content-Encoding {encoding[:40]!r} is not read; send the body as is or "
                                       f"with one of {', '.join(BODY_ENCODINGS)}", code="unsupported_content_encoding")
        inflater = zlib.decompressobj(BODY_ENCODINGS[encoding])
    chunks: list[bytes] = []
    size = expanded = 0
    try:
        async for chunk in request.stream():
            size += len(chunk)
            if size > limit_bytes:
                raise _too_large(limit_bytes)
            if inflater is None:
                chunks.append(chunk)
                continue
            data = chunk
            while data:
                part = inflater.decompress(data, _INFLATE_STEP)
                expanded += len(part)
                if expanded > limit_bytes:
                    raise _too_large(limit_bytes, "expanded body")
                chunks.append(part)
                data = inflater.unconsumed_tail
        if inflater is not None:
            if not inflater.eof:
                raise zlib.error("the compressed stream ends early")
            if inflater.unused_data.strip(b"\0"):
                raise zlib.error("data after the end of the compressed stream")
    except zlib.error as exc:
        raise BadRequest(f"the {encoding} body cannot be expanded: {exc}", code="undecodable_body") from None
    return b"".join(chunks)
