"""Shared Rich consoles, option types, the server connection, and how an error shows on the command line."""

from __future__ import annotations

from collections.abc import Callable, Iterable
from typing import TYPE_CHECKING, Annotated, Any

import typer
from rich.console import Console
from rich.markup import escape
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

from models import NightbankError, Problem

from ..errors import DEFAULT_EXIT_CODE

if TYPE_CHECKING:
    from ..client import NightbankClient

__all__ = [
    "DEFAULT_URL",
    "FillGapsOption",
    "JsonOption",
    "ServerOption",
    "TokenOption",
    "TzOption",
    "YesOption",
    "connect",
    "download_progress",
    "console",
    "err_console",
    "exit_code_of",
    "problem_line",
    "report_error",
]

console = Console(highlight=False)
err_console = Console(stderr=True, highlight=False)

TzOption = Annotated[str | None, typer.Option("--tz", help="IANA time zone for timestamps without UTC offset.")]
FillGapsOption = Annotated[bool, typer.Option("--fill-gaps", help="Accept whole-epoch gaps as missing epochs.")]
JsonOption = Annotated[bool, typer.Option("--json", help="Machine-readable JSON output.")]
ServerOption = Annotated[str, typer.Option("--server", envvar="NIGHTBANK_URL", help="Server URL.")]
TokenOption = Annotated[str, typer.Option("--token", envvar="NIGHTBANK_TOKEN", help="Bearer token.")]
YesOption = Annotated[bool, typer.Option("--yes", "-y", help="Do not ask for confirmation.")]
#: the server of ``--server`` when neither the option nor ``NIGHTBANK_URL`` is given
DEFAULT_URL = "http://127.0.0.1:8765"
#: location keys shown beside a problem, in this order
_WHERE = ("field", "row", "column", "epoch", "time")


def connect(server: str, token: str) -> NightbankClient:
    """A client of ``server`` with ``token`` (close it, or use it in a ``with`` block)."""
    from ..client import NightbankClient

    return NightbankClient(server, token=token)


def download_progress(description: str) -> tuple[Progress, Callable[[int, int | None], None]]:
    """A progress bar for a streamed download and the ``progress(done, total)`` callback that moves it
    (rows received; the bar fills once the server has announced the total)."""
    bar = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
                   console=console)
    task = bar.add_task(description, total=None)

    def advance(done: int, total: int | None) -> None:
        bar.update(task, completed=done, total=total)

    return bar, advance


def exit_code_of(exc: NightbankError) -> int:
    """The exit code of an error: its class's ``exit_code`` (1 for errors without one)."""
    return int(getattr(exc, "exit_code", DEFAULT_EXIT_CODE))


def problem_line(problem: Problem | dict[str, Any]) -> str:
    """One problem as Rich markup: its code, message and where it is (field, row, column, epoch, time)."""
    p = problem if isinstance(problem, dict) else problem.to_dict()
    location = p.get("location") or {}
    where = ", ".join(f"{k} {location[k]}" for k in _WHERE if k in location)
    return (f"[red]{escape(str(p.get('code', '')))}[/red]: {escape(str(p.get('message', '')))}"
            + (f"  [dim]({escape(where)})[/dim]" if where else ""))


def report_error(exc: NightbankError) -> None:
    """Print an error on stderr without traceback: its code and message, then each of its ``problems``."""
    err_console.print(f"[bold red]error[/bold red] ({escape(exc.code)}): {escape(exc.message)}")
    problems: Iterable[Problem] = getattr(exc, "problems", None) or ()
    for p in problems:
        err_console.print(f"  {problem_line(p)}")
