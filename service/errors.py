"""Errors of the service layer, each with a stable ``code``, an HTTP ``status`` and an ``exit_code``.

Hierarchy (HTTP status, command-line exit code)::

    models.NightbankError(ValueError)       code; science errors map to 422 and exit code 1
    └── ServiceError                        400  1
        ├── BadRequest                      400  1  malformed request (wrong content type, bad query)
        │   └── InvalidSettings             400  2  settings or options that do not fit together
        ├── Unauthorized                    401  1  missing, unknown or revoked token
        ├── Forbidden                       403  1  the token's role is too low
        ├── NotFound                        404  1  missing resource, or one outside the token's study
        ├── Conflict                        409  1  the request contradicts stored state
        ├── PayloadTooLarge                 413  1  request body over the configured limit
        ├── UnsupportedMediaType            415  1  body in a format the route does not read
        ├── Unprocessable                   422  1  well-formed request that cannot be carried out
        │   └── Incomplete                  422  1  a command failed for some of its items
        └── StorageError                    503  1  the database refused or is unreachable

An error may carry ``problems`` (:class:`models.Problem`, each naming where with its
``location``), listed in the problem response like the problems of an invalid night.

The HTTP layer turns every one of them into ``application/problem+json``; the command line
prints the code and message and exits with ``exit_code`` (:mod:`service.cli`, one handler, as
click does with its ``ClickException.exit_code``); :mod:`service.client` raises the same classes
from problem responses. No FastAPI import here.
"""

from __future__ import annotations

from collections.abc import Sequence

from models import NightbankError, Problem

__all__ = [
    "BadRequest",
    "Conflict",
    "DEFAULT_EXIT_CODE",
    "Forbidden",
    "Incomplete",
    "InvalidSettings",
    "NotFound",
    "PayloadTooLarge",
    "ServiceError",
    "StorageError",
    "Unauthorized",
    "Unprocessable",
    "UnsupportedMediaType",
]


#: Exit code of the command line for an error without its own (every science error).
DEFAULT_EXIT_CODE = 1


class ServiceError(NightbankError):
    """Base class of service errors: ``code``, HTTP ``status`` and ``exit_code`` are class attributes."""

    code = "service_error"
    status = 400
    exit_code = DEFAULT_EXIT_CODE

    def __init__(self, message: str, *, code: str | None = None, problems: Sequence[Problem] = ()) -> None:
        super().__init__(message, code=code)
        self.problems = list(problems)


class BadRequest(ServiceError):
    """The request is malformed (content type, query parameter, body encoding)."""

    code = "bad_request"
    status = 400


class InvalidSettings(BadRequest):
    """Settings or command-line options that are invalid or do not fit together (a usage error)."""

    code = "invalid_settings"
    exit_code = 2


class Unauthorized(ServiceError):
    """No bearer token, or the token is unknown or revoked."""

    code = "unauthorized"
    status = 401


class Forbidden(ServiceError):
    """The token is valid but its role does not allow the operation."""

    code = "forbidden"
    status = 403


class NotFound(ServiceError):
    """The resource does not exist or is outside the token's study (indistinguishable on purpose)."""

    code = "not_found"
    status = 404


class Conflict(ServiceError):
    """The request contradicts stored state (duplicate study, version already active, ...)."""

    code = "conflict"
    status = 409


class PayloadTooLarge(ServiceError):
    """The request body is larger than ``Settings.max_body_mb``."""

    code = "payload_too_large"
    status = 413


class UnsupportedMediaType(ServiceError):
    """The body's content type is not one the route reads."""

    code = "unsupported_media_type"
    status = 415


class Unprocessable(ServiceError):
    """The request is well-formed but cannot be carried out (no model trained yet, too few nights)."""

    code = "unprocessable"
    status = 422


class Incomplete(Unprocessable):
    """A command that handles many items failed for some of them (each is reported on its own)."""

    code = "incomplete"


class StorageError(ServiceError):
    """The database failed (locked for too long, unreachable, not migrated)."""

    code = "storage_error"
    status = 503
