"""The ``nightbank`` command line: one Typer app, commands grouped in small modules."""

from __future__ import annotations

import typer

app = typer.Typer(
    name="nightbank",
    no_args_is_help=True,
    add_completion=False,
    help="nightbank: sleep/wake scoring of actigraphy nights calibrated on PSG (research software, "
         "not for diagnosis).",
)

from . import data as _data  # noqa: E402,F401  (registers commands)
from . import demo as _demo  # noqa: E402,F401

__all__ = ["app"]
from . import remote as _remote  # noqa: E402,F401
from . import server as _server  # noqa: E402,F401
from . import tokens as _tokens  # noqa: E402,F401
from . import scoring as _scoring  # noqa: E402,F401
from . import compare as _compare  # noqa: E402,F401
