"""Managing what the server stores: ``study create``, ``night delete | exclude``, ``jobs``, ``models``."""

from __future__ import annotations

import json
from enum import StrEnum
from typing import Annotated, Any

import typer
from rich.markup import escape
from rich.table import Table

from .application import app
from .console import DEFAULT_URL, JsonOption, ServerOption, TokenOption, YesOption, connect, console

__all__ = ["JobState", "night_app", "study_app"]

study_app = typer.Typer(no_args_is_help=True, help="Create studies.")
night_app = typer.Typer(no_args_is_help=True, help="Delete stored nights or leave them out of training.")
app.add_typer(study_app, name="study")
app.add_typer(night_app, name="night")

StudyArgument = Annotated[str, typer.Argument(help="Study id.")]
ParticipantArgument = Annotated[str, typer.Argument(help="Participant id.")]
NightArgument = Annotated[str, typer.Argument(help="Night id (from `push` or the API's night listing).")]
#: held-out figures shown per model version when the version has them (mean over held-out nights)
SHOWN_METRICS = {"balanced_accuracy": "bal. acc.", "kappa": "kappa", "auc": "AUC"}


class JobState(StrEnum):
    """States of a training job."""

    queued = "queued"
    running = "running"
    succeeded = "succeeded"
    failed = "failed"
    cancelled = "cancelled"


@study_app.command("create")
def create_study(
    study_id: Annotated[str, typer.Argument(metavar="ID", help="Study id: letters, digits, '_', '.', '-'.")],
    name: Annotated[str, typer.Option("--name", help="Display name of the study.")],
    epoch_seconds: Annotated[int, typer.Option("--epoch-seconds", min=1,
                                               help="Epoch length of the study's nights, seconds.")] = 30,
    server: ServerOption = DEFAULT_URL,
    token: TokenOption = "",
) -> None:
    """Create a study (admin token)."""
    with connect(server, token) as client:
        out = client.create_study(study_id, name, epoch_seconds=epoch_seconds)
    console.print(f"created study [bold]{escape(out['study_id'])}[/bold] ({escape(out.get('name', name))}, "
                  f"{out.get('epoch_seconds', epoch_seconds)}-s epochs)")


@night_app.command("delete")
def delete_night(study: StudyArgument, participant: ParticipantArgument, night_id: NightArgument,
                 yes: YesOption = False, server: ServerOption = DEFAULT_URL, token: TokenOption = "") -> None:
    """Delete a stored night with its features and cached scorings (asks first unless --yes; admin token)."""
    if not yes:
        typer.confirm(f"delete night {night_id} of participant {participant} in study {study}?", abort=True)
    with connect(server, token) as client:
        summary = client.delete_night(study, participant, night_id)
    details = ", ".join(f"{k}: {v}" for k, v in summary.items() if k != "night_id") if isinstance(summary, dict) \
        else str(summary)
    console.print(f"deleted night {escape(night_id)} of {escape(participant)}" + (f" ({escape(details)})"
                                                                                  if details else ""))


@night_app.command("exclude")
def exclude_night(
    study: StudyArgument, participant: ParticipantArgument, night_id: NightArgument,
    include: Annotated[bool, typer.Option("--include", help="Take the night into training again.")] = False,
    server: ServerOption = DEFAULT_URL, token: TokenOption = "",
) -> None:
    """Leave a stored night out of training (it stays stored and can be scored); --include undoes it."""
    with connect(server, token) as client:
        client.update_night(study, participant, night_id, excluded=not include)
    what = "is used in training again" if include else "is left out of training from now on"
    console.print(f"night {escape(night_id)} of {escape(participant)} {what}")


def _when(value: Any) -> str:
    return "" if not value else str(value).replace("T", " ")[:19]


@app.command()
def jobs(
    study: StudyArgument,
    state: Annotated[JobState | None, typer.Option("--state", help="Only jobs in this state.")] = None,
    server: ServerOption = DEFAULT_URL,
    token: TokenOption = "",
    as_json: JsonOption = False,
) -> None:
    """List a study's training jobs with their state and progress."""
    with connect(server, token) as client:
        rows = client.list_jobs(study, state=None if state is None else state.value)
    if as_json:
        console.print_json(json.dumps(rows))
        return
    table = Table(title=f"Jobs of {study}" + (f" ({state.value})" if state else ""))
    table.add_column("job id", no_wrap=True)
    for col in ("kind", "participant", "state", "progress", "created", "finished", "error"):
        table.add_column(col)
    for j in rows:
        p = j.get("progress") or {}
        progress = f"{p.get('done', 0)}/{p.get('total', 0)} {p.get('stage', '')}".strip()
        table.add_row(j["job_id"], str(j.get("kind", "")), j.get("participant_id") or "(pooled)", j["state"],
                      escape(progress), _when(j.get("created_at")), _when(j.get("finished_at")),
                      escape(j.get("error") or ""))
    console.print(table)
    console.print(f"{len(rows)} job(s)")


def _figure(metrics: dict[str, Any], name: str) -> str:
    found = metrics.get(name)
    mean = found.get("mean") if isinstance(found, dict) else found
    if mean is None:
        return "-"
    sd = found.get("sd") if isinstance(found, dict) else None
    return f"{mean:.3f}" + ("" if sd is None else f" ± {sd:.3f}")


def _selection(version: dict[str, Any]) -> str:
    chosen = version.get("selection")
    if not isinstance(chosen, dict) or not chosen.get("metric"):
        return ""
    value = chosen.get("value")
    return f"{chosen['metric']} = " + ("-" if value is None else f"{value:.3f}")


@app.command()
def models(
    study: StudyArgument,
    participant: Annotated[str | None, typer.Option("--participant", "-p",
                                                    help="A participant's personal models (default: pooled).")] = None,
    server: ServerOption = DEFAULT_URL,
    token: TokenOption = "",
    as_json: JsonOption = False,
) -> None:
    """List model versions, newest first: which is active and their held-out figures (mean ± SD over nights)."""
    with connect(server, token) as client:
        versions = client.list_models(study, participant)
    if as_json:
        console.print_json(json.dumps(versions))
        return
    owner = f"participant {participant}" if participant else "pooled"
    table = Table(title=f"Model versions of {study} ({owner}); figures on held-out nights")
    for col in ("version", "kind", "active", "created", "training nights", "held-out nights", *SHOWN_METRICS.values()):
        table.add_column(col, justify="right" if col not in ("kind", "active", "created") else "left")
    with_selection = any(_selection(v) for v in versions)
    if with_selection:
        table.add_column("selection")
    for v in versions:
        metrics = v.get("metrics") or {}
        cells = [str(v["version"]), str(v.get("kind", "")), "[green]active[/green]" if v.get("active") else "",
                 _when(v.get("created_at")), str(v.get("n_training_nights", "")), str(metrics.get("n_nights", "")),
                 *(_figure(metrics, m) for m in SHOWN_METRICS)]
        table.add_row(*cells, *([_selection(v)] if with_selection else []))
    console.print(table)
    if not versions:
        console.print(f"no model versions yet for {owner} models of study {escape(study)}")
