"""A bound on the request bodies the framework parses itself (JSON and form bodies).

FastAPI reads a JSON or form body completely before any dependency runs, so those routes
cannot use :func:`service.api.deps.read_body`. :class:`BodyLimit` is a pure ASGI middleware that
sits in front of them: a ``Content-Length`` above ``limit_bytes`` is refused with 413
``body_too_large`` before a byte is read, and a body without one (chunked) is counted as it
arrives and refused as soon as it passes the limit. Upload routes (an endpoint without a parsed
body, which reads it through ``read_body``) are left to their own, larger, limit.

After a refusal the rest of the body is read and dropped (never kept, at most
``DRAIN_LIMIT_BYTES``), so the client receives the answer and may reuse its connection.
"""

from __future__ import annotations

import json
from collections.abc import Awaitable, Callable, MutableMapping
from typing import Any

from fastapi.routing import APIRoute

from .problems import MEDIA_TYPE

__all__ = ["DRAIN_LIMIT_BYTES", "BodyLimit"]

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]

#: Most bytes of a refused body read (and dropped) before answering; past it the connection is closed.
DRAIN_LIMIT_BYTES = 64 * 2**20


def _parsed_body(scope: Scope) -> bool:
    """Whether the body of the routed request is parsed by the framework (not an upload route)."""
    route = scope.get("route")
    return not (isinstance(route, APIRoute) and route.body_field is None)


class _State:
    """What :class:`BodyLimit` knows of one request's body."""

    def __init__(self) -> None:
        self.size = 0
        self.started = self.over = self.done = False
        self.limited: bool | None = None


class _TooLarge(Exception):
    """Raised inside the wrapped ``receive`` once the body passes the limit."""


class BodyLimit:
    """Refuse (413 ``body_too_large``) parsed request bodies larger than ``limit_bytes``.

    Parameters
    ----------
    app
        The wrapped ASGI application.
    limit_bytes
        Largest body accepted on routes whose body the framework parses, bytes.
    """

    def __init__(self, app: Callable[..., Awaitable[None]], *, limit_bytes: int) -> None:
        self.app = app
        self.limit_bytes = limit_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        headers = dict(scope.get("headers") or [])
        declared_text = headers.get(b"content-length", b"").decode("latin-1").strip()
        declared = int(declared_text) if declared_text.isdigit() else None
        # decided at the first read of the body: by then the router has put the route in the scope
        state = _State()

        async def counted_receive() -> Message:
            if state.limited is None:
                state.limited = _parsed_body(scope)
                if state.limited and declared is not None and declared > self.limit_bytes:
                    state.over = True
                    raise _TooLarge
            if not state.limited:
                return await receive()
            if state.over:
                raise _TooLarge
            message = await receive()
            if message["type"] == "http.request":
                state.size += len(message.get("body", b""))
                state.done = not message.get("more_body", False)
                if state.size > self.limit_bytes:
                    state.over = True
                    raise _TooLarge
            return message

        async def guarded_send(message: Message) -> None:
            if state.over:
                return  # whatever the app answers to the cut body, the answer is the 413 below
            state.started = True
            await send(message)

        try:
            await self.app(scope, counted_receive, guarded_send)
        except _TooLarge:
            if state.started:
                raise
        if state.over and not state.started:
            await self._refuse(scope, receive, send, state.size, done=state.done)

    async def _refuse(self, scope: Scope, receive: Receive, send: Send, read: int, *, done: bool = False) -> None:
        while not done and read <= DRAIN_LIMIT_BYTES:
            message = await receive()
            if message["type"] != "http.request":
                return  # the client went away: nobody to answer
            read += len(message.get("body", b""))
            done = not message.get("more_body", False)
        limit_mb = self.limit_bytes / 2**20
        body: dict[str, Any] = {
            "type": "urn:nightbank:problem:body_too_large", "title": "Payload too large", "status": 413,
            "detail": f"the request body is larger than the limit of {limit_mb:g} MB for this route "
                      f"(NIGHTBANK_MAX_JSON_BODY_MB)", "code": "body_too_large", "instance": scope.get("path")}
        request_id = (scope.get("state") or {}).get("request_id")
        if request_id:
            body["request_id"] = request_id
        payload = json.dumps(body).encode()
        response_headers = [(b"content-type", MEDIA_TYPE.encode()), (b"content-length", str(len(payload)).encode())]
        if not done:
            response_headers.append((b"connection", b"close"))
        await send({"type": "http.response.start", "status": 413, "headers": response_headers})
        await send({"type": "http.response.body", "body": payload})
