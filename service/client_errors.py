"""How :mod:`service.client` reads a problem response (RFC 9457) back into the typed error the server raised."""

from __future__ import annotations

from collections.abc import Mapping

import httpx

from models import InvalidNightError, NightbankError, Problem

from .errors import (
    BadRequest,
    Conflict,
    Forbidden,
    NotFound,
    PayloadTooLarge,
    ServiceError,
    StorageError,
    Unauthorized,
    Unprocessable,
    UnsupportedMediaType,
)

__all__ = ["problem_error"]

_BY_STATUS: dict[int, type[ServiceError]] = {
    400: BadRequest, 401: Unauthorized, 403: Forbidden, 404: NotFound, 409: Conflict, 413: PayloadTooLarge,
    415: UnsupportedMediaType, 422: Unprocessable, 503: StorageError,
}


def _problems(listed: object) -> list[Problem]:
    """The problems of a problem response as :class:`models.Problem` objects (malformed entries kept as text)."""
    if not isinstance(listed, list):
        return []
    out = []
    for p in listed:
        if isinstance(p, Mapping):
            location = p.get("location")
            out.append(Problem(str(p.get("code", "")), str(p.get("message", "")),
                               dict(location) if isinstance(location, Mapping) else {}))
        else:
            out.append(Problem("problem", str(p), {}))
    return out


def problem_error(response: httpx.Response) -> NightbankError:
    """The typed error for a problem response.

    Returns
    -------
    error : NightbankError
        :class:`~models.InvalidNightError` for code ``invalid_night``, else the :mod:`service.errors`
        class of the status (:class:`ServiceError` for others), with the server's ``code`` and
        ``detail`` as message. Attached: ``problem`` (the response body as sent), ``status`` (int)
        and ``problems`` (list of :class:`models.Problem`, one per entry of the body's ``problems``).
    """
    try:
        problem = response.json()
        if not isinstance(problem, dict):
            raise ValueError
    except ValueError:
        problem = {"code": "http_error", "detail": response.text[:300] or response.reason_phrase}
    code, detail = str(problem.get("code", "http_error")), str(problem.get("detail", response.reason_phrase))
    problems = _problems(problem.get("problems"))
    exc: NightbankError
    if code == "invalid_night":
        exc = InvalidNightError(problems)
    else:
        exc = _BY_STATUS.get(response.status_code, ServiceError)(detail, code=code)
    # the server's problem details, kept as sent, and its problems as objects
    vars(exc).update(problem=problem, status=response.status_code, problems=problems)
    return exc
