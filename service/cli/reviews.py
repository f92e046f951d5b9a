"""``nightbank queue``: a study's review queue on the server, highest priority first."""

from __future__ import annotations

import json
from typing import Annotated

import typer
from rich.markup import escape
from rich.table import Table

from .application import app
from .console import DEFAULT_URL, JsonOption, ServerOption, TokenOption, connect, console

__all__ = ["queue"]

StudyOption = Annotated[str, typer.Option("--study", help="Study id.")]
_STATUSES = ("open", "in_review", "reviewed", "adjudicated")


@app.command("queue")
def queue(study: StudyOption,
          limit: Annotated[int, typer.Option("--limit", min=1, max=500, help="Nights to show.")] = 20,
          status: Annotated[str | None, typer.Option(
              "--status", help="Only nights of this status: open, in_review, reviewed or adjudicated.")] = None,
          server: ServerOption = DEFAULT_URL, token: TokenOption = "", as_json: JsonOption = False) -> None:
    """Nights without PSG to review, highest priority first, with why (needs the reviewer role)."""
    if status is not None and status not in _STATUSES:
        raise typer.BadParameter(f"{status!r}; choose one of {', '.join(_STATUSES)}", param_hint="--status")
    with connect(server, token) as client:
        items = client.review_queue(study, limit=limit, status=status)
    if as_json:
        console.print_json(json.dumps(items))
        return
    table = Table(title=f"Review queue of study {study} (research software, not for diagnosis)")
    for name in ("#", "participant", "night", "status", "priority", "expected change (min)", "why"):
        table.add_column(name)
    for rank, item in enumerate(items, start=1):
        table.add_row(str(rank), escape(item["participant_id"]), item["night_id"][:12], item["status"],
                      f"{item['priority']:.1f}", f"{item['expected_change_min']:.0f}",
                      escape("; ".join(item["reasons"])) or "–")
    console.print(table)
    if not items:
        console.print("No nights to review.")
