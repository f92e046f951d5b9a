"""``nightbank protocol show | set``: a study's protocol on the server, and ``nightbank report``."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated, Any

import typer
from rich.table import Table

from .application import app
from .console import DEFAULT_URL, JsonOption, ServerOption, TokenOption, connect, console
from .protocol_options import (
    BootstrapOption,
    CiLevelOption,
    IntervalLevelOption,
    MarginOption,
    MinAwakeningOption,
    PersistentSleepOption,
    ProtocolSeedOption,
    SolOption,
    UnscoredBreaksOption,
    WasoEndOption,
    apply_protocol_options,
)

__all__ = ["protocol_app", "report", "set_protocol", "show_protocol"]

protocol_app = typer.Typer(no_args_is_help=True, help="A study's protocol: parameter definitions and agreement "
                                                      "settings of every figure.")
app.add_typer(protocol_app, name="protocol")

StudyOption = Annotated[str, typer.Option("--study", help="Study id.")]


def _print(info: dict[str, Any], *, as_json: bool) -> None:
    if as_json:
        console.print_json(json.dumps(info))
        return
    state = "default" if info["is_default"] else f"set {info['updated_at']} by {info['updated_by']}"
    table = Table(title=f"Protocol of study {info['study_id']} ({state}; fingerprint {info['fingerprint']})")
    table.add_column("setting")
    table.add_column("value")
    for name, value in info["protocol"].items():
        if isinstance(value, dict):
            value = ", ".join(f"{k} ±{v:g}" for k, v in value.items())
        table.add_row(name, str(value))
    console.print(table)


@protocol_app.command("show")
def show_protocol(study: StudyOption, server: ServerOption = DEFAULT_URL, token: TokenOption = "",
                  as_json: JsonOption = False) -> None:
    """Print the study's protocol."""
    with connect(server, token) as client:
        _print(client.get_protocol(study), as_json=as_json)


@protocol_app.command("set")
def set_protocol(
    study: StudyOption,
    waso_end: WasoEndOption = None,
    min_awakening_epochs: MinAwakeningOption = None,
    persistent_sleep_min: PersistentSleepOption = None,
    sol: SolOption = None,
    unscored_breaks_bouts: UnscoredBreaksOption = None,
    margin: MarginOption = None,
    ci_level: CiLevelOption = None,
    bootstrap_resamples: BootstrapOption = None,
    protocol_seed: ProtocolSeedOption = None,
    interval_level: IntervalLevelOption = None,
    default: Annotated[bool, typer.Option("--default", help="Start from the default protocol, not the study's.")]
    = False,
    server: ServerOption = DEFAULT_URL,
    token: TokenOption = "",
    as_json: JsonOption = False,
) -> None:
    """Change the study's protocol: options left out keep their current value. Models are kept; figures
    are computed again under the new protocol."""
    with connect(server, token) as client:
        base = {} if default else client.get_protocol(study)["protocol"]
        protocol = apply_protocol_options(base, waso_end=waso_end, min_awakening_epochs=min_awakening_epochs,
                                          persistent_sleep_min=persistent_sleep_min, sol=sol,
                                          unscored_breaks_bouts=unscored_breaks_bouts, margin=margin,
                                          ci_level=ci_level, bootstrap_resamples=bootstrap_resamples,
                                          seed=protocol_seed, interval_level=interval_level)
        _print(client.set_protocol(study, protocol.to_dict()), as_json=as_json)


@app.command()
def report(
    study: StudyOption,
    output: Annotated[Path, typer.Option("--output", "-o", help="File to write: .html (the page) or .pdf (its "
                                                                "tables and figures).")],
    server: ServerOption = DEFAULT_URL,
    token: TokenOption = "",
) -> None:
    """Download the study's validation report (one self-contained HTML page, or a PDF for a .pdf output)."""
    with connect(server, token) as client, console.status("computing the report"):
        data = client.study_report(study, fmt="pdf" if output.suffix.lower() == ".pdf" else "html")
    output.write_bytes(data)
    console.print(f"wrote {output} ({len(data)} bytes)")
