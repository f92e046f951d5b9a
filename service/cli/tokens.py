"""``nightbank token create | list | revoke``: bearer tokens, managed directly in the database."""

from __future__ import annotations

from typing import Annotated, Any

import typer
from rich.table import Table

from .application import app
from .console import console
from .server import DbOption, local_settings

__all__ = ["token_app"]

token_app = typer.Typer(no_args_is_help=True, help="Create, list and revoke bearer tokens.")
app.add_typer(token_app, name="token")

StudyOption = Annotated[str | None, typer.Option("--study", help="Scope the token to this study.")]


def _factory(db: str | None) -> Any:
    from ..store.db import make_engine, make_session_factory
    from ..store.schema import check_schema

    engine = make_engine(local_settings(db=db))
    check_schema(engine)
    return make_session_factory(engine)


@token_app.command("create")
def create(
    role: Annotated[str, typer.Option("--role", help="ingest, reviewer, analyst or admin.")],
    study: StudyOption = None,
    label: Annotated[str | None, typer.Option(help="A note to recognise the token by.")] = None,
    db: DbOption = None,
) -> None:
    """Create a token and print it once, as the last line (only a salted hash is stored)."""
    from ..store.db import session_scope
    from ..store.tokens import create_token

    with session_scope(_factory(db), write=True) as session:
        info, token = create_token(session, role=role, study_id=study, label=label, actor="cli")
    scope = f"study {info.study_id}" if info.study_id else "lab-wide"
    console.print(f"created {info.role} token {info.token_id} ({scope}); store it now, it is not shown again:")
    print(token)  # plain print: the token alone on the last line, easy to capture


@token_app.command("list")
def list_(study: StudyOption = None, db: DbOption = None) -> None:
    """List tokens (ids, roles, scopes; never secrets)."""
    from ..store.db import session_scope
    from ..store.tokens import list_tokens

    with session_scope(_factory(db)) as session:
        rows = list_tokens(session, study_id=study)
    table = Table(title="Tokens")
    for col in ("token id", "role", "study", "label", "created", "revoked"):
        table.add_column(col)
    for t in rows:
        table.add_row(t.token_id, t.role, t.study_id or "(lab-wide)", t.label or "", f"{t.created_at:%Y-%m-%d %H:%M}",
                      "" if t.revoked_at is None else f"{t.revoked_at:%Y-%m-%d %H:%M}")
    console.print(table)


@token_app.command("revoke")
def revoke(token_id: Annotated[str, typer.Argument(help="Token id (12 hex digits) from `token list`.")],
           db: DbOption = None) -> None:
    """Revoke a token; it is refused from the next request on."""
    from ..store.db import session_scope
    from ..store.tokens import revoke_token

    with session_scope(_factory(db), write=True) as session:
        revoke_token(session, token_id, actor="cli")
    console.print(f"token {token_id} revoked")
