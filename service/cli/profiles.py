"""``nightbank profile create | list | show | delete | guess``: import profiles, and how commands load one.

An import profile (:class:`models.ImportProfile`) says how a lab's CSV export is laid out. The
commands that read night files (``check``, ``push --dry-run``) take one from a JSON file or, by
name, from the study on the server.
"""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Mapping
from pathlib import Path
from typing import Annotated, Any

import typer
from rich.markup import escape
from rich.table import Table

from models import ImportProfile, InvalidProfileError, Night, NightOptions, guess_profile, read_night

from ..errors import BadRequest, Unprocessable
from .application import app
from .console import DEFAULT_URL, JsonOption, ServerOption, TokenOption, YesOption, connect, console

__all__ = ["fetch_profile", "load_profile_file", "profile_app", "read_night_file", "resolve_profile"]

profile_app = typer.Typer(no_args_is_help=True, help="Import profiles: how a lab's CSV export is laid out.")
app.add_typer(profile_app, name="profile")

StudyArgument = Annotated[str, typer.Argument(help="Study id.")]
NameArgument = Annotated[str, typer.Argument(help="Profile name.")]
_PROFILE_FIELDS = tuple(f.name for f in dataclasses.fields(ImportProfile))


def _invalid(where: str, exc: InvalidProfileError) -> Unprocessable:
    """An invalid profile as a command error naming where it came from; ``problems`` name each field."""
    out = Unprocessable(f"{where}: {exc.message}", code=exc.code)
    vars(out)["problems"] = exc.problems
    return out


def load_profile_file(path: Path) -> ImportProfile:
    """The profile in a JSON file.

    Raises
    ------
    BadRequest
        ``file_not_found`` or ``invalid_profile_file`` (not JSON: with line and column).
    Unprocessable
        ``invalid_profile``: the JSON is not a valid profile; ``problems`` name every bad field.
    """
    if not path.is_file():
        raise BadRequest(f"no such profile file: {path}", code="file_not_found")
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError as exc:
        raise BadRequest(f"{path}: not UTF-8 text (byte {exc.start})", code="invalid_profile_file") from None
    except json.JSONDecodeError as exc:
        raise BadRequest(f"{path}: not JSON: {exc.msg} (line {exc.lineno}, column {exc.colno})",
                         code="invalid_profile_file") from None
    try:
        return ImportProfile.from_dict(data)
    except InvalidProfileError as exc:
        raise _invalid(str(path), exc) from None


def _body(answer: Mapping[str, Any]) -> Mapping[str, Any]:
    """The profile in a server answer: the answer itself, or a record holding the profile under ``profile``."""
    inner = answer.get("profile")
    return inner if isinstance(inner, Mapping) else answer


def _from_answer(answer: Mapping[str, Any], where: str) -> ImportProfile:
    """The profile of a server answer; fields other than a profile's (timestamps, ids) are left out."""
    try:
        return ImportProfile.from_dict({k: v for k, v in _body(answer).items() if k in _PROFILE_FIELDS})
    except InvalidProfileError as exc:
        raise _invalid(where, exc) from None


def fetch_profile(study: str, name: str, *, server: str, token: str) -> ImportProfile:
    """A profile saved in ``study`` on the server (:class:`NotFound` if there is none of that name)."""
    with connect(server, token) as client:
        answer = client.get_profile(study, name)
    return _from_answer(answer, f"profile {name!r} of study {study}")


def resolve_profile(value: str, *, study: str | None, server: str, token: str) -> ImportProfile:
    """``--profile``: a JSON profile file when ``value`` is an existing file or ends in ``.json``, else a saved name."""
    path = Path(value)
    if path.is_file() or path.suffix.lower() == ".json":
        return load_profile_file(path)
    if not study:
        raise typer.BadParameter(f"{value!r} is not a profile file; to use a profile saved on the server give "
                                 "--study (and --server/--token)", param_hint="--profile")
    return fetch_profile(study, value, server=server, token=token)


def read_night_file(path: Path, *, participant_id: str, options: NightOptions,
                    profile: ImportProfile | None = None) -> Night:
    """Read and check a night file with the science readers, applying ``profile`` if given."""
    return read_night(path, participant_id=participant_id, options=options, profile=profile)


# ---- commands ----------------------------------------------------------------------------------
@profile_app.command("create")
def create(
    study: StudyArgument,
    file: Annotated[Path, typer.Argument(help="JSON profile file.")],
    replace: Annotated[bool, typer.Option("--replace", help="Replace a saved profile of the same name.")] = False,
    server: ServerOption = DEFAULT_URL,
    token: TokenOption = "",
) -> None:
    """Check a JSON profile file and save it in a study (refused if the name is taken, unless --replace)."""
    profile = load_profile_file(file)
    with connect(server, token) as client:
        client.create_profile(study, profile.to_dict(), replace=replace)
    console.print(f"saved import profile [bold]{escape(profile.name)}[/bold] in study {escape(study)}")


def _columns(p: Mapping[str, Any]) -> str:
    return ", ".join(f"{role}={header}" for role, header in (p.get("columns") or {}).items())


@profile_app.command("list")
def list_(study: StudyArgument, server: ServerOption = DEFAULT_URL, token: TokenOption = "",
          as_json: JsonOption = False) -> None:
    """List the import profiles saved in a study."""
    with connect(server, token) as client:
        rows = client.list_profiles(study)
    if as_json:
        console.print_json(json.dumps(rows))
        return
    table = Table(title=f"Import profiles of {study}")
    for col in ("name", "delimiter", "skip rows", "columns", "time format", "zone", "stage codes"):
        table.add_column(col)
    for row in rows:
        p = _body(row)
        table.add_row(str(p.get("name", "")), repr(p.get("delimiter")) if p.get("delimiter") else "(sniffed)",
                      str(p.get("skip_rows", 0)), _columns(p) or "(aliases)", str(p.get("datetime_format") or "ISO"),
                      str(p.get("tz") or ""), str(len(p.get("stage_codes") or {})))
    console.print(table)
    if not rows:
        console.print(f"no import profiles saved in study {escape(study)}")


@profile_app.command("show")
def show(study: StudyArgument, name: NameArgument, server: ServerOption = DEFAULT_URL,
         token: TokenOption = "") -> None:
    """Print a saved import profile as JSON."""
    with connect(server, token) as client:
        console.print_json(json.dumps(client.get_profile(study, name)))


@profile_app.command("delete")
def delete(study: StudyArgument, name: NameArgument, yes: YesOption = False, server: ServerOption = DEFAULT_URL,
           token: TokenOption = "") -> None:
    """Delete a saved import profile (asks first unless --yes; nights stored with it stay as they are)."""
    if not yes:
        typer.confirm(f"delete import profile {name!r} of study {study}?", abort=True)
    with connect(server, token) as client:
        client.delete_profile(study, name)
    console.print(f"deleted import profile {escape(name)} of study {escape(study)}")


def _preview_table(rows: list[Any], n_rows: int) -> Table:
    table = Table(title=f"First {min(n_rows, len(rows))} row(s) as read with this profile")
    shown = rows[:n_rows]
    if shown and isinstance(shown[0], Mapping):
        columns = list(dict.fromkeys(k for r in shown for k in r))
        for col in columns:
            table.add_column(str(col))
        for r in shown:
            table.add_row(*("" if r.get(c) is None else str(r.get(c)) for c in columns))
    else:
        width = max((len(r) for r in shown), default=0)
        for k in range(width):
            table.add_column(str(k + 1))
        for r in shown:
            table.add_row(*(str(v) for v in r))
    return table


@profile_app.command("guess")
def guess(
    file: Annotated[Path, typer.Argument(help="A CSV export of one night.")],
    study: Annotated[str | None, typer.Option("--study", help="Study to save the profile in.")] = None,
    save: Annotated[str | None, typer.Option("--save", help="Save the proposed profile under this name.")] = None,
    yes: YesOption = False,
    n_rows: Annotated[int, typer.Option("--rows", min=1, max=1000, help="Preview rows to show.")] = 10,
    server: ServerOption = DEFAULT_URL,
    token: TokenOption = "",
) -> None:
    """Propose an import profile for a CSV export: print it as JSON with the first rows it reads; --save keeps it."""
    if save and not study:
        raise typer.BadParameter("saving the profile needs --study", param_hint="--save")
    if not file.is_file():
        raise BadRequest(f"no such file: {file}", code="file_not_found")
    data = file.read_bytes()
    result = guess_profile(data).to_dict()
    console.print_json(json.dumps(result["profile"]))
    console.print(_preview_table(result["preview"], n_rows))
    for note in result["notes"]:
        console.print(f"[dim]note: {escape(str(note))}[/dim]")
    if result["stage_codes_found"]:
        console.print("reference codes found: " + ", ".join(escape(str(c)) for c in result["stage_codes_found"]))
    if not save:
        return
    assert study is not None  # checked above
    try:
        profile = ImportProfile.from_dict({**result["profile"], "name": save})
    except InvalidProfileError as exc:
        raise _invalid(f"the proposed profile for {file}", exc) from None
    if not yes:
        typer.confirm(f"save this profile as {save!r} in study {study}?", abort=True)
    with connect(server, token) as client:
        client.create_profile(study, profile.to_dict())
    console.print(f"saved import profile [bold]{escape(save)}[/bold] in study {escape(study)}")
