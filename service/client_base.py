"""What the client's resource mixins (:mod:`service.client_recordings`, :mod:`service.client_reviews`) call.

:class:`service.client.NightbankClient` provides these methods; a mixin inherits the declarations so each
resource module can be read and type-checked on its own.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping
from typing import Any

import httpx

__all__ = ["ClientCalls"]


class ClientCalls:
    """The client's request primitives, declared for its mixins (the client defines them)."""

    def _request(self, method: str, url: str, **kwargs: Any) -> httpx.Response:
        raise NotImplementedError

    def _json(self, method: str, url: str, **kwargs: Any) -> Any:
        raise NotImplementedError

    def _download(self, url: str, *, params: Mapping[str, Any], total_header: str | None,
                  progress: Callable[[int, int | None], None] | None = None) -> bytes:
        raise NotImplementedError

    def _pages(self, url: str, page_size: int = 500, params: Mapping[str, Any] | None = None
               ) -> Iterator[dict[str, Any]]:
        raise NotImplementedError
