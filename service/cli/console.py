"""Shared Rich console and option types for the command line."""

from __future__ import annotations

from typing import Annotated

import typer
from rich.console import Console

console = Console(highlight=False)
err_console = Console(stderr=True, highlight=False)

TzOption = Annotated[str | None, typer.Option("--tz", help="IANA time zone for timestamps without UTC offset.")]
FillGapsOption = Annotated[bool, typer.Option("--fill-gaps", help="Accept whole-epoch gaps as missing epochs.")]
JsonOption = Annotated[bool, typer.Option("--json", help="Machine-readable JSON output.")]
