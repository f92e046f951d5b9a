"""Commands that talk to a running server: ``push``, ``train``, ``export``."""

from __future__ import annotations

from collections.abc import Iterable
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Annotated, Any

import typer
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TaskID, TextColumn, TimeElapsedColumn
from rich.table import Table

from models import InvalidNightError, NightbankError

from ..errors import Incomplete
from .application import app
from .console import TzOption, console

__all__ = ["NIGHT_SUFFIXES", "night_files", "progress_bar", "push_folder", "train_and_wait"]

ServerOption = Annotated[str, typer.Option("--server", envvar="NIGHTBANK_URL", help="Server URL.")]
TokenOption = Annotated[str, typer.Option("--token", envvar="NIGHTBANK_TOKEN", help="Bearer token.")]
StudyOption = Annotated[str, typer.Option("--study", help="Study id.")]
NIGHT_SUFFIXES = (".json", ".csv", ".parquet")
DEFAULT_URL = "http://127.0.0.1:8765"


def progress_bar() -> Progress:
    """The progress bar used by every long command."""
    return Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
                    console=console)


def night_files(folder: Path) -> list[tuple[str, Path]]:
    """``(participant id, file)`` for every night file in the sub-folders of ``folder``, sorted."""
    return [(p.parent.name, p) for p in sorted(folder.glob("*/*")) if p.suffix.lower() in NIGHT_SUFFIXES]


def push_folder(client: Any, study: str, folder: Path, *, tz: str | None = None, jobs: int = 4) -> list[dict[str, Any]]:
    """Post every night file under ``folder`` (participant = sub-folder name) with a progress bar.

    Returns one report row per file: ``file``, ``participant``, ``status`` (created, stored
    before, invalid, failed), ``night_id``, ``qc`` (flag codes) and ``problems``.
    """
    files = night_files(folder)

    def one(item: tuple[str, Path]) -> dict[str, Any]:
        pid, path = item
        row: dict[str, Any] = {"file": str(path.relative_to(folder)), "participant": pid, "night_id": None,
                               "qc": [], "problems": []}
        try:
            out = client.push_file(study, pid, path, tz=tz)
            row |= {"status": "created" if out["created"] else "stored before", "night_id": out["night_id"],
                    "qc": [f["code"] for f in out["qc"]]}
        except InvalidNightError as exc:
            row |= {"status": "invalid", "problems": [f"{p.code}: {p.message}" for p in exc.problems]}
        except NightbankError as exc:
            row |= {"status": "failed", "problems": [f"{exc.code}: {exc}"]}
        return row

    rows = []
    with progress_bar() as bar, ThreadPoolExecutor(max_workers=max(1, jobs)) as pool:
        task = bar.add_task(f"pushing {len(files)} nights", total=len(files))
        for row in pool.map(one, files):
            rows.append(row)
            bar.advance(task)
    return rows


def _push_table(rows: Iterable[dict[str, Any]]) -> Table:
    table = Table(title="Pushed nights")
    for col in ("file", "participant", "status", "night id", "QC flags / problems"):
        table.add_column(col)
    for r in rows:
        colour = {"created": "green", "stored before": "cyan"}.get(r["status"], "red")
        notes = ", ".join(r["qc"]) if r["status"] in ("created", "stored before") else "; ".join(r["problems"])
        table.add_row(r["file"], r["participant"], f"[{colour}]{r['status']}[/{colour}]", r["night_id"] or "", notes)
    return table


@app.command()
def push(
    folder: Annotated[Path, typer.Argument(help="Folder with one sub-folder of night files per participant.")],
    study: StudyOption,
    server: ServerOption = DEFAULT_URL,
    token: TokenOption = "",
    tz: TzOption = None,
    jobs: Annotated[int, typer.Option(min=1, max=16, help="Parallel uploads.")] = 4,
) -> None:
    """Post a folder of CSV/JSON/Parquet nights (idempotent: stored nights are recognised)."""
    from ..client import NightbankClient

    if not folder.is_dir():
        raise typer.BadParameter(f"{folder} is not a folder", param_hint="FOLDER")
    with NightbankClient(server, token=token) as client:
        rows = push_folder(client, study, folder, tz=tz, jobs=jobs)
    console.print(_push_table(rows))
    bad = [r for r in rows if r["status"] in ("invalid", "failed")]
    console.print(f"{len(rows) - len(bad)} of {len(rows)} nights stored")
    if bad:
        raise Incomplete(f"{len(bad)} of {len(rows)} night(s) were not stored", code="nights_refused")


def train_and_wait(client: Any, study: str, requests: list[tuple[str, str | None]], *, n_trials: int | None = None,
                   poll_s: float = 0.5) -> dict[str, dict[str, Any]]:
    """Queue trainings and follow them with one progress bar each until all finish.

    Parameters
    ----------
    requests : list of (label, participant id or None)
        None trains the pooled model.

    Returns
    -------
    jobs : dict
        Final job state per label.
    """
    import time

    with progress_bar() as bar:
        tasks: dict[str, tuple[str, TaskID]] = {}
        for label, pid in requests:
            out = (client.train_pooled(study, n_trials=n_trials) if pid is None
                   else client.train_personal(study, pid, n_trials=n_trials))
            tasks[label] = (out["job_id"], bar.add_task(f"{label}: queued", total=None))
        final: dict[str, dict[str, Any]] = {}
        while len(final) < len(tasks):
            for label, (job_id, task) in tasks.items():
                if label in final:
                    continue
                job = client.get_job(job_id)
                p = job["progress"]
                bar.update(task, total=p["total"] or None, completed=p["done"], description=f"{label}: {p['stage']}")
                if job["state"] in ("succeeded", "failed", "cancelled"):
                    final[label] = job
                    bar.update(task, description=f"{label}: {job['state']}")
            time.sleep(poll_s)
    return final


@app.command()
def train(
    study: StudyOption,
    participant: Annotated[list[str] | None,
                           typer.Option("--participant", "-p", help="Participant (repeatable).")] = None,
    pooled: Annotated[bool, typer.Option("--pooled", help="Train the study's pooled model.")] = False,
    all_: Annotated[bool, typer.Option("--all", help="Pooled model, then every participant with enough labelled "
                                                     "nights.")] = False,
    n_trials: Annotated[int | None, typer.Option(min=1, help="Hyper-parameter trials per search.")] = None,
    server: ServerOption = DEFAULT_URL,
    token: TokenOption = "",
) -> None:
    """Train models on the server and follow the jobs with progress bars."""
    from ..client import NightbankClient

    with NightbankClient(server, token=token) as client:
        if all_ or pooled:
            jobs = train_and_wait(client, study, [("pooled", None)], n_trials=n_trials)
        else:
            jobs = {}
        pids = list(participant or [])
        if all_:
            pids += [p["participant_id"] for p in client.list_participants(study) if p["n_labelled_nights"] >= 3]
        if pids:
            jobs |= train_and_wait(client, study, [(pid, pid) for pid in dict.fromkeys(pids)], n_trials=n_trials)
    table = Table(title="Training")
    for col in ("model", "state", "version", "active", "error"):
        table.add_column(col)
    for label, job in jobs.items():
        result = job.get("result") or {}
        table.add_row(label, job["state"], str(result.get("model_version", "")), str(result.get("active", "")),
                      job.get("error") or "")
    console.print(table)
    if failed := sum(j["state"] != "succeeded" for j in jobs.values()):
        raise Incomplete(f"{failed} of {len(jobs)} training(s) did not succeed", code="trainings_failed")


@app.command()
def export(
    study: StudyOption,
    output: Annotated[Path, typer.Option("--output", "-o", help="File to write.")],
    fmt: Annotated[str, typer.Option("--format", help="csv or parquet.")] = "csv",
    server: ServerOption = DEFAULT_URL,
    token: TokenOption = "",
) -> None:
    """Download the sleep parameters of every night and method (CSV or Parquet)."""
    from ..client import NightbankClient

    if fmt not in ("csv", "parquet"):
        raise typer.BadParameter("choose csv or parquet", param_hint="--format")
    with NightbankClient(server, token=token) as client, console.status("computing the export"):
        data = client.export_parameters(study, fmt=fmt)
    output.write_bytes(data)
    console.print(f"wrote {output} ({len(data)} bytes)")
