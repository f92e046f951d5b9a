"""The ``nightbank`` command line: one Typer app, commands grouped in small modules.

Errors are handled in one place, :class:`CommandGroup`: a :class:`models.NightbankError` (every
service error builds on it) raised by any command is printed with its code and message, without
traceback, and the command exits with the error's ``exit_code`` (see :mod:`service.errors`):
0 success, 1 failure (invalid input, refused request, part of the work failed), 2 invalid
settings or options (as for click's usage errors).
"""

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

from . import data as _data  # noqa: E402,F401  (registers commands, listed in this order)
from . import demo as _demo  # noqa: E402,F401
from . import remote as _remote  # noqa: E402,F401
from . import server as _server  # noqa: E402,F401
from . import tokens as _tokens  # noqa: E402,F401
from . import scoring as _scoring  # noqa: E402,F401
from . import compare as _compare  # noqa: E402,F401
