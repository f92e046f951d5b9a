"""Shared Rich consoles, option types, and how an error shows on the command line."""

from __future__ import annotations

from typing import Annotated

import typer
from rich.console import Console
from rich.markup import escape

from models import InvalidNightError, NightbankError

from ..errors import DEFAULT_EXIT_CODE

__all__ = ["FillGapsOption", "JsonOption", "TzOption", "console", "err_console", "exit_code_of", "report_error"]

console = Console(highlight=False)
err_console = Console(stderr=True, highlight=False)

TzOption = Annotated[str | None, typer.Option("--tz", help="IANA time zone for timestamps without UTC offset.")]
FillGapsOption = Annotated[bool, typer.Option("--fill-gaps", help="Accept whole-epoch gaps as missing epochs.")]
JsonOption = Annotated[bool, typer.Option("--json", help="Machine-readable JSON output.")]


def exit_code_of(exc: NightbankError) -> int:
    """The exit code of an error: its class's ``exit_code`` (1 for errors without one)."""
    return int(getattr(exc, "exit_code", DEFAULT_EXIT_CODE))


def report_error(exc: NightbankError) -> None:
    """Print an error on stderr without traceback: its code and message, then every problem of a night."""
    err_console.print(f"[bold red]error[/bold red] ({escape(exc.code)}): {escape(exc.message)}")
    if isinstance(exc, InvalidNightError):
        for p in exc.problems:
            where = ", ".join(f"{k} {v}" for k, v in p.location.items() if k in ("row", "epoch", "field", "time"))
            err_console.print(f"  [red]{escape(p.code)}[/red]: {escape(p.message)}"
                              + (f"  [dim]({escape(where)})[/dim]" if where else ""))
