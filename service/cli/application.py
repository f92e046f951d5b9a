"""The Typer app of ``nightbank`` and its command group, which turns nightbank errors into exit codes."""

from __future__ import annotations

from typing import Any

import typer
from typer.core import TyperGroup

from models import NightbankError

from .console import exit_code_of, report_error

__all__ = ["CommandGroup", "app"]


class CommandGroup(TyperGroup):
    """The command group of ``nightbank``: turns a nightbank error into a message and its exit code."""

    def invoke(self, ctx: Any) -> Any:  # ctx: the click context of typer's own click
        try:
            return super().invoke(ctx)
        except NightbankError as exc:
            report_error(exc)
            raise typer.Exit(exit_code_of(exc)) from None


app = typer.Typer(
    name="nightbank",
    cls=CommandGroup,
    no_args_is_help=True,
    add_completion=False,
    help="nightbank: sleep/wake scoring of actigraphy nights calibrated on PSG (research software, "
         "not for diagnosis).",
)
