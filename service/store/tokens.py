"""Bearer tokens: creation, verification, listing and revocation.

A token reads ``nb_<token id>_<secret>``. Only the token id (public, 12 hex digits), a random salt
and SHA-256(salt + secret) are stored; the secret is shown once, when the token is created.
Secrets carry 256 random bits, so a fast salted hash suffices (slow password hashes protect
guessable secrets, which these are not) and keeps verification cheap on every request; the
comparison is constant-time (:func:`hmac.compare_digest`).

Roles, each including the ones before it:

- ``ingest``: posts nights, reads and corrects them (label, exclusion from training), saves import profiles;
- ``reviewer``: also reads the review queue and a night's review context, and posts reviews of nights;
- ``analyst``: also scores, trains, lists jobs, compares and exports, and adjudicates reviews;
- ``admin``: also creates studies, activates versions, deletes nights and participants, renames
  participants, manages tokens.

A token is scoped to one study, or lab-wide (admin only). A study-scoped token never sees another
study: those requests get 404, like a missing resource.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
import threading
from dataclasses import dataclass
from datetime import datetime
from enum import IntEnum

from cachetools import TTLCache
from sqlalchemy import select
from sqlalchemy.orm import Session

from ..errors import BadRequest, NotFound, Unauthorized
from . import db
from .audit import record_audit

__all__ = ["Principal", "Role", "TokenCache", "TokenInfo", "create_token", "list_tokens", "revoke_token",
           "verify_token"]

_PREFIX = "nb_"
_ID_HEX = 12


class Role(IntEnum):
    """Token roles, ordered: a higher role may do everything a lower one may."""

    ingest = 1
    reviewer = 2
    analyst = 3
    admin = 4

    @classmethod
    def parse(cls, name: str) -> Role:
        try:
            return cls[name]
        except KeyError:
            raise BadRequest(f"unknown role {name!r}; choose ingest, reviewer, analyst or admin") from None


@dataclass(frozen=True)
class Principal:
    """The caller behind a verified token."""

    token_id: str
    role: Role
    study_id: str | None

    def sees(self, study_id: str) -> bool:
        """Whether the token may see ``study_id`` at all (lab-wide tokens see every study)."""
        return self.study_id is None or self.study_id == study_id


@dataclass(frozen=True)
class TokenInfo:
    """A stored token without its secret."""

    token_id: str
    role: str
    study_id: str | None
    label: str | None
    created_at: datetime
    revoked_at: datetime | None


def _digest(salt: str, secret: str) -> str:
    return hashlib.sha256(bytes.fromhex(salt) + secret.encode()).hexdigest()


def _info(row: db.Token) -> TokenInfo:
    return TokenInfo(token_id=row.token_id, role=row.role, study_id=row.study_id, label=row.label,
                     created_at=row.created_at, revoked_at=row.revoked_at)


def create_token(session: Session, *, role: str, study_id: str | None = None, label: str | None = None,
                 actor: str = "cli") -> tuple[TokenInfo, str]:
    """Create a token and return its description and the full token text (shown once).

    Parameters
    ----------
    session : Session
    role : {"ingest", "reviewer", "analyst", "admin"}
    study_id : str, optional
        Scope the token to this study (which need not exist yet). Without it only an admin token
        may be created (lab-wide).
    label : str, optional
        A note to recognise the token by in listings.
    actor : str, default="cli"
        Who creates it, for the audit log.

    Raises
    ------
    BadRequest
        If the role is unknown, or a non-admin token has no study.
    """
    parsed = Role.parse(role)
    if study_id is None and parsed is not Role.admin:
        raise BadRequest("a lab-wide token must have the admin role; give a study for ingest, reviewer or analyst "
                         "tokens")
    token_id = secrets.token_hex(_ID_HEX // 2)
    secret = secrets.token_urlsafe(32)
    salt = secrets.token_hex(16)
    row = db.Token(token_id=token_id, study_id=study_id, role=parsed.name, salt=salt,
                   secret_hash=_digest(salt, secret), label=label, created_at=db.utcnow())
    session.add(row)
    record_audit(session, actor=actor, action="token.create", study_id=study_id, subject=token_id,
                 detail={"role": parsed.name})
    session.flush()
    return _info(row), f"{_PREFIX}{token_id}_{secret}"


_DUMMY_SALT = "00" * 16


def verify_token(session: Session, token: str) -> Principal:
    """The principal of a presented token.

    Raises
    ------
    Unauthorized
        If the token is malformed, unknown, wrong or revoked (one message for all).
    """
    malformed = not (token.startswith(_PREFIX) and len(token) > len(_PREFIX) + _ID_HEX + 1
                     and token[len(_PREFIX) + _ID_HEX] == "_")
    token_id = token[len(_PREFIX): len(_PREFIX) + _ID_HEX]
    secret = token[len(_PREFIX) + _ID_HEX + 1:]
    row = None if malformed else session.scalar(select(db.Token).where(db.Token.token_id == token_id))
    expected = row.secret_hash if row is not None else _digest(_DUMMY_SALT, "")
    given = _digest(row.salt if row is not None else _DUMMY_SALT, secret)
    if not hmac.compare_digest(expected, given) or row is None or row.revoked_at is not None:
        raise Unauthorized("the bearer token is not valid")
    return Principal(token_id=row.token_id, role=Role[row.role], study_id=row.study_id)


def list_tokens(session: Session, *, study_id: str | None = None, include_lab_wide: bool = True) -> list[TokenInfo]:
    """Stored tokens (never their secrets), optionally only those of one study."""
    query = select(db.Token).order_by(db.Token.pk)
    if study_id is not None:
        query = query.where(db.Token.study_id == study_id)
    elif not include_lab_wide:
        query = query.where(db.Token.study_id.is_not(None))
    return [_info(row) for row in session.scalars(query)]


def revoke_token(session: Session, token_id: str, *, actor: str = "cli", study_id: str | None = None) -> TokenInfo:
    """Revoke a token; servers refuse it once their :class:`TokenCache` entry expires (seconds).

    Parameters
    ----------
    token_id : str
    actor : str, default="cli"
    study_id : str, optional
        Only revoke if the token belongs to this study (a study admin's limit).

    Raises
    ------
    NotFound
        If no such token exists (within ``study_id`` when given).
    """
    row = session.scalar(select(db.Token).where(db.Token.token_id == token_id))
    if row is None or (study_id is not None and row.study_id != study_id):
        raise NotFound(f"no token {token_id!r}")
    if row.revoked_at is None:
        row.revoked_at = db.utcnow()
        record_audit(session, actor=actor, action="token.revoke", study_id=row.study_id, subject=token_id)
    return _info(row)


class TokenCache:
    """Verified tokens remembered for ``ttl_s`` seconds (keyed by their SHA-256, never the text).

    Saves a database lookup per request; a revoked token stops working within ``ttl_s``.
    ``ttl_s=0`` disables the cache. Past ``max_entries`` tokens the least recently used goes.
    """

    def __init__(self, ttl_s: float, *, max_entries: int = 4096) -> None:
        self.ttl_s = ttl_s
        self._entries: TTLCache[bytes, Principal] | None = (
            TTLCache(maxsize=max_entries, ttl=ttl_s) if ttl_s > 0 else None)
        self._lock = threading.Lock()

    def get(self, token: str) -> Principal | None:
        """The principal of a token verified less than ``ttl_s`` seconds ago, else None."""
        if self._entries is None:
            return None
        with self._lock:
            return self._entries.get(hashlib.sha256(token.encode()).digest())

    def put(self, token: str, principal: Principal) -> None:
        """Remember a verified token."""
        if self._entries is None:
            return
        with self._lock:
            self._entries[hashlib.sha256(token.encode()).digest()] = principal
