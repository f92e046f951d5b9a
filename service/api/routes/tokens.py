"""Token management over HTTP (admin): create, list, revoke."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, Path

from ...errors import Forbidden
from ...store import tokens
from ...store.db import session_scope
from ...store.tokens import Principal, Role
from ..deps import FactoryDep, ReadSession, require_lab_role
from ..schemas import TokenCreated, TokenIn, TokenOut

__all__ = ["router"]

router = APIRouter(prefix="/v1/tokens", tags=["tokens"])
AdminDep = Annotated[Principal, Depends(require_lab_role(Role.admin))]


@router.post("", status_code=201, response_model=TokenCreated)
def create_token(body: TokenIn, factory: FactoryDep, principal: AdminDep) -> Any:
    """Create a token; the response is the only time its secret is shown (admin)."""
    study_id = body.study_id if principal.study_id is None else principal.study_id
    if body.study_id not in (None, study_id):
        raise Forbidden(f"this token is scoped to study {principal.study_id!r}")
    with session_scope(factory, write=True) as session:
        info, token = tokens.create_token(session, role=body.role, study_id=study_id, label=body.label,
                                          actor=principal.token_id)
    return TokenCreated(**vars(info), token=token)


@router.get("", response_model=list[TokenOut])
def list_tokens(session: ReadSession, principal: AdminDep) -> Any:
    """Tokens (never their secrets): every token for a lab-wide admin, the study's otherwise (admin)."""
    return [TokenOut(**vars(t)) for t in tokens.list_tokens(session, study_id=principal.study_id,
                                                             include_lab_wide=principal.study_id is None)]


@router.delete("/{token_id}", response_model=TokenOut)
def revoke_token(token_id: Annotated[str, Path(pattern=r"^[0-9a-f]{12}$")], factory: FactoryDep,
                 principal: AdminDep) -> Any:
    """Revoke a token (admin; a study admin only its study's tokens)."""
    with session_scope(factory, write=True) as session:
        return TokenOut(**vars(tokens.revoke_token(session, token_id, actor=principal.token_id,
                                                   study_id=principal.study_id)))
