"""Errors of the service layer, each with a stable ``code`` and an HTTP ``status``.

Hierarchy::

    models.NightbankError(ValueError)       code; science errors map to 422 (InvalidNightError too)
    └── ServiceError                        status 400
        ├── BadRequest                      400  malformed request (wrong content type, bad query)
        ├── Unauthorized                    401  missing, unknown or revoked token
        ├── Forbidden                       403  the token's role is too low
        ├── NotFound                        404  missing resource, or one outside the token's study
        ├── Conflict                        409  the request contradicts stored state
        ├── PayloadTooLarge                 413  request body over the configured limit
        ├── UnsupportedMediaType            415  body in a format the route does not read
        ├── Unprocessable                   422  well-formed request that cannot be carried out
        └── StorageError                    503  the database refused or is unreachable

The HTTP layer turns every one of them into ``application/problem+json``; the CLI prints the
message and exits non-zero; :mod:`service.client` raises the same classes from problem responses.
No FastAPI import here.
"""

from __future__ import annotations

from models import NightbankError

__all__ = [
    "BadRequest",
    "Conflict",
    "Forbidden",
    "NotFound",
    "PayloadTooLarge",
    "ServiceError",
    "StorageError",
    "Unauthorized",
    "UnsupportedMediaType",
    "Unprocessable",
]


class ServiceError(NightbankError):
    """Base class of service errors: ``code`` and HTTP ``status`` are class attributes."""

    code = "service_error"
    status = 400


class BadRequest(ServiceError):
    """The request is malformed (content type, query parameter, body encoding)."""

    code = "bad_request"
    status = 400


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


class StorageError(ServiceError):
    """The database failed (locked for too long, unreachable, not migrated)."""

    code = "storage_error"
    status = 503
