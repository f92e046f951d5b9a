"""Commands that talk to a running server: ``push``, ``train``, ``export``.

``push --json`` prints JSON Lines: one object per night file, in file order, and nothing else on
stdout (the progress bar and the summary go to stderr). Each object has ``file`` (relative to the
folder), ``participant``, ``status``, ``night_id`` (None unless stored), ``qc`` (flag codes),
``unused_columns`` and ``problems`` (objects with ``code``, ``message``, ``location``). ``status``
is one of :data:`PUSH_STATUSES`; a dry run adds ``request`` (what would be sent: ``method``,
``path``, ``params``, ``content_type``, ``bytes``), ``epochs``, ``start`` and ``content_hash``.
"""

from __future__ import annotations

import json
from collections.abc import Iterable
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Annotated, Any

import typer
from rich.console import Console
from rich.markup import escape
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TaskID, TextColumn, TimeElapsedColumn
from rich.table import Table

from models import InvalidNightError, NightbankError, NightOptions

from ..errors import Incomplete
from .application import app
from .console import (
    DEFAULT_URL,
    ServerOption,
    TokenOption,
    TzOption,
    connect,
    console,
    download_progress,
    err_console,
    problem_line,
)
from .data import night_summary
from .profiles import fetch_profile, read_night_file
from .protocol_options import IntervalLevelOption
from .recordings import check_recording_files, is_recording_file, push_recording_files

__all__ = ["NIGHT_SUFFIXES", "PUSH_STATUSES", "STORED", "check_folder", "night_files", "progress_bar", "push_folder",
           "train_and_wait"]

StudyOption = Annotated[str, typer.Option("--study", help="Study id.")]
NIGHT_SUFFIXES = (".json", ".csv", ".parquet")
#: ``status`` of a pushed file: stored now, stored before (same content), invalid (the night's own
#: defects), refused (the server keeps it out: duplicate, overlap, implausible reference, ...),
#: failed (any other error); dry runs: would_send or invalid
PUSH_STATUSES = ("created", "stored_before", "invalid", "refused", "failed", "would_send")
#: statuses of files whose night is stored (or, in a dry run, would be sent)
STORED = ("created", "stored_before", "would_send")
#: problem codes with which the server refuses a valid night
REFUSALS = ("duplicate_night", "overlapping_night", "reference_implausible")
_MEDIA_TYPES = {".json": "application/json", ".csv": "text/csv", ".parquet": "application/vnd.apache.parquet"}


def progress_bar(*, to: Console | None = None) -> Progress:
    """The progress bar used by every long command (on ``to``, default: stdout)."""
    return Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
                    console=to or console)


def night_files(folder: Path) -> list[tuple[str, Path]]:
    """``(participant id, file)`` for every night file in the sub-folders of ``folder``, sorted.

    Recording, diary and PSG files (:func:`service.cli.recordings.is_recording_file`) are not nights.
    """
    return [(p.parent.name, p) for p in sorted(folder.glob("*/*"))
            if p.suffix.lower() in NIGHT_SUFFIXES and not is_recording_file(p)]


def _row(folder: Path, pid: str, path: Path) -> dict[str, Any]:
    return {"file": str(path.relative_to(folder)), "participant": pid, "status": "failed", "night_id": None,
            "qc": [], "unused_columns": [], "problems": []}


def _error_problems(exc: NightbankError) -> list[dict[str, Any]]:
    """The problems an error lists (each naming where it is), or the error itself when it lists none."""
    listed = [p.to_dict() for p in getattr(exc, "problems", None) or ()]
    return listed or [{"code": exc.code, "message": exc.message, "location": {}}]


def push_folder(client: Any, study: str, folder: Path, *, tz: str | None = None, jobs: int = 4,
                profile: str | None = None, allow_duplicate: bool = False, allow_overlap: bool = False,
                accept_implausible: bool = False, progress_to: Console | None = None) -> list[dict[str, Any]]:
    """Post every night file under ``folder`` (participant = sub-folder name) with a progress bar.

    Parameters
    ----------
    tz, profile, allow_duplicate, allow_overlap, accept_implausible
        As :meth:`service.client.NightbankClient.post_night`.
    jobs : int, default=4
        Parallel uploads.
    progress_to : rich.console.Console, optional
        Where the progress bar goes (default: stdout).

    Returns
    -------
    rows : list of dict
        One per file, in file order (see the module docstring).
    """
    files = night_files(folder)
    options = {"tz": tz, "profile": profile, "allow_duplicate": allow_duplicate, "allow_overlap": allow_overlap,
               "accept_implausible": accept_implausible}

    def one(item: tuple[str, Path]) -> dict[str, Any]:
        pid, path = item
        row = _row(folder, pid, path)
        try:
            out = client.push_file(study, pid, path, **options)
            row |= {"status": "created" if out["created"] else "stored_before", "night_id": out["night_id"],
                    "qc": [f["code"] for f in out["qc"]], "unused_columns": list(out.get("unused_columns") or [])}
        except InvalidNightError as exc:
            row |= {"status": "invalid", "problems": _error_problems(exc)}
        except NightbankError as exc:
            row |= {"status": "refused" if exc.code in REFUSALS else "failed", "problems": _error_problems(exc)}
        return row

    rows = []
    with progress_bar(to=progress_to) as bar, ThreadPoolExecutor(max_workers=max(1, jobs)) as pool:
        task = bar.add_task(f"pushing {len(files)} nights", total=len(files))
        for row in pool.map(one, files):
            rows.append(row)
            bar.advance(task)
    return rows


def check_folder(study: str, folder: Path, *, tz: str | None = None, profile: str | None = None,
                 layout: Any = None, allow_duplicate: bool = False, allow_overlap: bool = False,
                 accept_implausible: bool = False, progress_to: Console | None = None) -> list[dict[str, Any]]:
    """What ``push`` would send, without sending: every file read and checked here with the science readers.

    ``layout`` is the :class:`models.ImportProfile` named ``profile`` (applied here when the readers
    take profiles); the other options only shape the request that would be sent.
    """
    files = night_files(folder)
    params: dict[str, Any] = {"tz": tz} if tz else {}
    if profile:
        params["profile"] = profile
    params |= {k: "true" for k, on in (("allow_duplicate", allow_duplicate), ("allow_overlap", allow_overlap),
                                       ("accept_implausible", accept_implausible)) if on}
    rows = []
    with progress_bar(to=progress_to) as bar:
        task = bar.add_task(f"checking {len(files)} nights", total=len(files))
        for pid, path in files:
            row = _row(folder, pid, path)
            try:
                night = read_night_file(path, participant_id=pid, options=NightOptions(tz=tz), profile=layout)
                summary = night_summary(night)
                row |= {"status": "would_send", "qc": [f["code"] for f in summary["qc"]],
                        "epochs": summary["epochs"], "start": summary["start"],
                        "content_hash": summary["content_hash"],
                        "request": {"method": "POST", "path": f"/v1/studies/{study}/participants/{pid}/nights",
                                    "params": params, "content_type": _MEDIA_TYPES[path.suffix.lower()],
                                    "bytes": path.stat().st_size}}
            except InvalidNightError as exc:
                row |= {"status": "invalid", "problems": _error_problems(exc)}
            rows.append(row)
            bar.advance(task)
    return rows


def _push_table(rows: Iterable[dict[str, Any]], *, dry_run: bool = False) -> Table:
    table = Table(title="Dry run: nothing was sent" if dry_run else "Pushed nights")
    for col in ("file", "participant", "status", "epochs" if dry_run else "night id", "QC flags / problems"):
        table.add_column(col)
    for r in rows:
        colour = {"created": "green", "stored_before": "cyan", "would_send": "green"}.get(r["status"], "red")
        if r["status"] in STORED:
            notes = ", ".join(r["qc"])
            if r["unused_columns"]:
                notes += ("; " if notes else "") + "unused columns: " + ", ".join(r["unused_columns"])
            notes = escape(notes)
        else:
            notes = "; ".join(problem_line(p) for p in r["problems"])
        table.add_row(escape(r["file"]), escape(r["participant"]),
                      f"[{colour}]{r['status'].replace('_', ' ')}[/{colour}]",
                      str(r.get("epochs", "")) if dry_run else r["night_id"] or "", notes)
    return table


@app.command()
def push(
    folder: Annotated[Path, typer.Argument(help="Folder with one sub-folder of night files per participant.")],
    study: StudyOption,
    server: ServerOption = DEFAULT_URL,
    token: TokenOption = "",
    tz: TzOption = None,
    jobs: Annotated[int, typer.Option(min=1, max=16, help="Parallel uploads.")] = 4,
    profile: Annotated[str | None, typer.Option(
        "--profile", help="Name of an import profile saved in the study, applied to every file.")] = None,
    allow_duplicate: Annotated[bool, typer.Option(
        "--allow-duplicate", help="Store nights the server takes for another copy of a stored night.")] = False,
    allow_overlap: Annotated[bool, typer.Option(
        "--allow-overlap", help="Store nights whose time overlaps a stored night of the participant.")] = False,
    accept_implausible: Annotated[bool, typer.Option(
        "--accept-implausible", help="Store nights whose reference the server finds implausible.")] = False,
    dry_run: Annotated[bool, typer.Option(
        "--dry-run", help="Read and check every file here and show what would be sent; send nothing.")] = False,
    as_json: Annotated[bool, typer.Option(
        "--json", help="JSON Lines on stdout: one result object per file, nothing else.")] = False,
) -> None:
    """Post a folder of CSV/JSON/Parquet nights (idempotent: stored nights are recognised)."""
    if not folder.is_dir():
        raise typer.BadParameter(f"{folder} is not a folder", param_hint="FOLDER")
    flags = {"allow_duplicate": allow_duplicate, "allow_overlap": allow_overlap,
             "accept_implausible": accept_implausible}
    progress_to = err_console if as_json else None
    if dry_run:
        layout = None if profile is None else fetch_profile(study, profile, server=server, token=token)
        rows = check_folder(study, folder, tz=tz, profile=profile, layout=layout, progress_to=progress_to, **flags)
        rows += check_recording_files(folder, tz=tz, layout=layout)
    else:
        with connect(server, token) as client:
            client.health()  # an unreachable server fails once, not once per file
            rows = push_folder(client, study, folder, tz=tz, jobs=jobs, profile=profile, progress_to=progress_to,
                               **flags)
            rows += push_recording_files(client, study, folder, tz=tz, profile=profile)
    bad = [r for r in rows if r["status"] not in STORED]
    if as_json:
        for r in rows:
            typer.echo(json.dumps(r))
    else:
        console.print(_push_table(rows, dry_run=dry_run))
    summary = err_console if as_json else console
    if dry_run:
        summary.print(f"{len(rows) - len(bad)} of {len(rows)} nights would be sent; nothing was sent")
        if bad:
            raise Incomplete(f"{len(bad)} of {len(rows)} night file(s) are invalid", code="invalid_files")
        return
    summary.print(f"{len(rows) - len(bad)} of {len(rows)} nights stored")
    if bad:
        raise Incomplete(f"{len(bad)} of {len(rows)} night(s) were not stored", code="nights_refused")


def train_and_wait(client: Any, study: str, requests: list[tuple[str, str | None]], *, n_trials: int | None = None,
                   poll_s: float = 0.5) -> dict[str, dict[str, Any]]:
    """Queue trainings, print each job id, and follow them with one progress bar each until all finish.

    Parameters
    ----------
    requests : list of (label, participant id or None)
        None trains the pooled model.

    Returns
    -------
    jobs : dict
        Final job state per label (``job_id`` included).
    """
    import time

    with progress_bar() as bar:
        tasks: dict[str, tuple[str, TaskID]] = {}
        for label, pid in requests:
            out = (client.train_pooled(study, n_trials=n_trials) if pid is None
                   else client.train_personal(study, pid, n_trials=n_trials))
            tasks[label] = (out["job_id"], bar.add_task(f"{label}: queued", total=None))
            state = "queued" if out["created"] else f"{out['state']} already"
            bar.console.print(f"{escape(label)}: job {out['job_id']} ({state})")
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
    """Train models on the server: print the id of each job and follow the jobs with progress bars."""
    with connect(server, token) as client:
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
    table.add_column("model")
    table.add_column("job id", no_wrap=True)
    for col in ("state", "version", "active", "error"):
        table.add_column(col)
    for label, job in jobs.items():
        result = job.get("result") or {}
        table.add_row(label, job["job_id"], job["state"], str(result.get("model_version", "")),
                      str(result.get("active", "")), job.get("error") or "")
    console.print(table)
    if failed := sum(j["state"] != "succeeded" for j in jobs.values()):
        raise Incomplete(f"{failed} of {len(jobs)} training(s) did not succeed", code="trainings_failed")


@app.command()
def export(
    study: StudyOption,
    output: Annotated[Path, typer.Option("--output", "-o", help="File to write.")],
    fmt: Annotated[str, typer.Option("--format", help="csv or parquet.")] = "csv",
    interval_level: IntervalLevelOption = None,
    server: ServerOption = DEFAULT_URL,
    token: TokenOption = "",
) -> None:
    """Download the sleep parameters of every night and method (CSV or Parquet); model rows carry their
    per-night intervals and the level of those (held-out intervals only where computed at that level)."""
    if fmt not in ("csv", "parquet"):
        raise typer.BadParameter("choose csv or parquet", param_hint="--format")
    bar, advance = download_progress("rows of the export")
    with connect(server, token) as client, bar:
        data = client.export_parameters(study, fmt=fmt, interval_level=interval_level, progress=advance)
    output.write_bytes(data)
    console.print(f"wrote {output} ({len(data)} bytes)")
