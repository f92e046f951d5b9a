"""Streamed downloads of the client: exports read chunk by chunk, with progress."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import httpx

from .client_errors import problem_error
from .errors import ServiceError

__all__ = ["Progress", "download"]

#: ``progress(done, total)`` of a streamed download (total None when the server did not announce it)
Progress = Callable[[int, "int | None"], None]


def download(http: httpx.Client, url: str, *, params: Mapping[str, Any], total_header: str | None,
             progress: Progress | None = None) -> bytes:
    """A streamed body, read chunk by chunk: the client's timeout applies between chunks, not to the whole body.

    ``progress(done, total)`` is called after each chunk with the CSV lines received after the
    header and the total the server announced in ``total_header`` (None when not sent or not asked for).

    Raises
    ------
    NightbankError
        The server's problem (4xx), or ``server_unreachable`` when it cannot be reached or stops sending.
    """
    try:
        with http.stream("GET", url, params=params) as response:
            if response.is_error:
                response.read()
                raise problem_error(response)
            announced = None if total_header is None else response.headers.get(total_header)
            total = int(announced) if announced and announced.isdigit() else None
            chunks, lines = [], 0
            for chunk in response.iter_bytes():
                chunks.append(chunk)
                lines += chunk.count(b"\n")
                if progress is not None:
                    progress(max(lines - 1, 0), total)
    except httpx.TransportError as exc:
        raise ServiceError(f"cannot reach the server at {http.base_url} or it stopped sending: "
                           f"{exc or type(exc).__name__}", code="server_unreachable") from None
    return b"".join(chunks)
