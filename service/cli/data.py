"""Commands on night files: ``check``."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated, Any

import typer
from rich.table import Table

from models import InvalidNightError, NightOptions, Problem, quality_flags

from ..errors import Incomplete
from .application import app
from .console import DEFAULT_URL, FillGapsOption, JsonOption, ServerOption, TokenOption, TzOption, console, problem_line
from .profiles import read_night_file, resolve_profile

__all__ = ["check", "night_summary"]


def night_summary(night: Any) -> dict[str, Any]:
    """Per-night QC summary row (epochs, hours, reference coverage, flags)."""
    coverage = None
    if night.reference is not None:
        coverage = round(100.0 * float((night.reference != "?").mean()), 1)
    return {
        "label": night.label,
        "start": night.start.isoformat(),
        "epoch_seconds": night.epoch_seconds,
        "epochs": night.n_epochs,
        "hours": round(night.duration_hours, 2),
        "reference_coverage_pct": coverage,
        "content_hash": night.content_hash,
        "qc": [f.to_dict() for f in quality_flags(night)],
    }


@app.command()
def check(
    files: Annotated[list[Path], typer.Argument(help="Night files (JSON, CSV or Parquet).", exists=False)],
    tz: TzOption = None,
    fill_gaps: FillGapsOption = False,
    aggregate_to: Annotated[int | None, typer.Option(help="Sum epochs into 30- or 60-s epochs.")] = None,
    movement_time: Annotated[str, typer.Option(help="R&K movement time as wake, sleep or exclude.")] = "wake",
    profile: Annotated[str | None, typer.Option(
        "--profile", help="Import profile: a JSON profile file, or the name of a profile saved in --study.")] = None,
    study: Annotated[str | None, typer.Option("--study", help="Study whose saved profile --profile names.")] = None,
    server: ServerOption = DEFAULT_URL,
    token: TokenOption = "",
    as_json: JsonOption = False,
) -> None:
    """Validate night files and print their quality report (exit 1 if any file is invalid)."""
    options = NightOptions(tz=tz, fill_gaps=fill_gaps, aggregate_to=aggregate_to,
                           movement_time=movement_time)  # type: ignore[arg-type]
    layout = None if profile is None else resolve_profile(profile, study=study, server=server, token=token)
    results: list[dict[str, Any]] = []
    for path in files:
        try:
            if not path.is_file():
                raise InvalidNightError([_missing(path)], source=str(path))
            night = read_night_file(path, participant_id=path.parent.name, options=options, profile=layout)
            results.append({"file": str(path), "valid": True, **night_summary(night)})
        except InvalidNightError as exc:
            results.append({"file": str(path), "valid": False, "problems": [p.to_dict() for p in exc.problems]})
    if as_json:
        console.print_json(json.dumps(results))
    else:
        _print_check(results)
    if invalid := sum(not r["valid"] for r in results):
        raise Incomplete(f"{invalid} of {len(results)} file(s) are invalid", code="invalid_files")


def _missing(path: Path) -> Problem:
    return Problem("file_not_found", f"no such file: {path}", {"field": str(path)})


def _print_check(results: list[dict[str, Any]]) -> None:
    table = Table(title="Night check", show_lines=False)
    for col in ("file", "epochs", "hours", "ref %", "QC flags"):
        table.add_column(col, justify="right" if col in ("epochs", "hours", "ref %") else "left")
    for r in results:
        if r["valid"]:
            flags = ", ".join(f"{f['code']} ({f['n_epochs']} ep)" for f in r["qc"]) or "-"
            ref = "-" if r["reference_coverage_pct"] is None else f"{r['reference_coverage_pct']:.1f}"
            table.add_row(r["file"], str(r["epochs"]), f"{r['hours']:.2f}", ref, flags)
        else:
            table.add_row(r["file"], "[red]invalid[/red]", "", "", "")
    console.print(table)
    for r in results:
        if not r["valid"]:
            console.print(f"[bold red]{r['file']}[/bold red] is invalid:")
            for p in r["problems"]:
                console.print(f"  {problem_line(p)}")
