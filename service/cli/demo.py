"""``nightbank demo``: the main job on the simulated demo study, on the embedded defaults.

Starts the service (SQLite under ``./var/``, local training workers), creates the study and a
token, pushes the demo nights over HTTP with the client, trains the pooled model and every
eligible personal model, prints the held-out comparison per participant and the study-wide
Bland-Altman summary, then keeps serving until Ctrl-C (``DEMO_EXIT=1``: exit after printing).
"""

from __future__ import annotations

import os
import socket
import threading
import time
from pathlib import Path
from typing import Annotated, Any

import typer
from rich import box
from rich.table import Table

from models import DEMO_STUDY_ID, read_night, write_demo_study

from .application import app
from .console import console, problem_line
from .data import night_summary
from .recordings import is_recording_file, push_recording_files
from .remote import STORED, push_folder, train_and_wait
from .server import DbOption, local_settings

__all__ = ["demo_files"]

SIMULATED = "SIMULATED data (Gullwing Ferries crew-rest study, invented)"
DEMO_NAME = "Gullwing Ferries crew-rest study (SIMULATED)"
TABLE_METRIC = "balanced_accuracy"
BA_PARAMETERS = ("tst_min", "sol_min", "waso_min", "sleep_efficiency_pct")


def demo_files(data_dir: Path) -> list[Path]:
    """Night files of the demo study under ``data_dir`` (written there first if absent)."""
    root = data_dir / DEMO_STUDY_ID
    if not (root / "study.json").exists():
        write_demo_study(data_dir)
    return sorted(p for p in root.glob("*/*") if p.suffix in (".json", ".csv", ".parquet") and not is_recording_file(p))


def _qc_table(files: list[Path]) -> Table:
    table = Table(title=f"Quality control: {len(files)} nights")
    for col in ("participant", "night", "epochs", "hours", "ref %", "QC flags"):
        table.add_column(col)
    for path in files:
        night = read_night(path, participant_id=path.parent.name)
        s = night_summary(night)
        ref = "-" if s["reference_coverage_pct"] is None else f"{s['reference_coverage_pct']:.1f}"
        flags = ", ".join(f"{f['code']}" for f in s["qc"]) or ""
        table.add_row(path.parent.name, s["label"] or path.stem, str(s["epochs"]), f"{s['hours']:.2f}", ref, flags)
    return table


def _port_free(host: str, port: int) -> bool:
    with socket.socket() as s:
        try:
            s.bind((host, port))
        except OSError:
            return False
    return True


class _EmbeddedServer:
    """The app on uvicorn in a background thread of this process."""

    def __init__(self, settings: Any) -> None:
        import uvicorn

        from ..app import create_app

        self.server = uvicorn.Server(uvicorn.Config(create_app(settings), host=settings.host, port=settings.port,
                                                    access_log=False, log_level="warning"))
        self.thread = threading.Thread(target=self.server.run, name="nightbank-http", daemon=True)

    def start(self) -> None:
        self.thread.start()
        while not self.server.started:
            if not self.thread.is_alive():
                raise RuntimeError("the HTTP server failed to start")
            time.sleep(0.05)

    def stop(self) -> None:
        self.server.should_exit = True
        self.thread.join(10)


#: columns of the per-participant table: method -> header
_TABLE_METHODS = {"personal": "pers.", "pooled": "pooled", "pooled+offset": "+offset", "cole-kripke": "C-K",
                  "sadeh": "Sadeh", "count-threshold": "C-T"}
_TABLE_KEY = ("lab. = labelled nights, pers. = personal model, +offset = pooled model with the participant's "
              "offset, C-K = Cole-Kripke, C-T = count threshold; always-sleep scores 0.500; '-' = no held-out "
              "figure (see the notes)")


def _mean(stats: dict[str, Any] | None) -> str:
    return "-" if not stats or stats.get("mean") is None else f"{stats['mean']:.3f}"


def _comparison_table(rows: list[dict[str, Any]]) -> Table:
    table = Table(title=f"Held-out {TABLE_METRIC.replace('_', ' ')} per participant (mean over labelled nights)",
                  caption=_TABLE_KEY, box=box.SIMPLE_HEAD, pad_edge=False)
    for col in ("participant", "lab.", "chosen", *_TABLE_METHODS.values()):
        table.add_column(col, justify="left" if col in ("participant", "chosen") else "right", no_wrap=True)
    for r in rows:
        by_method = {m["method"]: m for m in r["summary"]}
        table.add_row(r["participant_id"], str(r["n_labelled_nights"]),
                      _TABLE_METHODS.get(r["chosen_method"] or "", r["chosen_method"] or "-"),
                      *(_mean(by_method.get(m, {}).get(TABLE_METRIC)) for m in _TABLE_METHODS))
    return table


def _bland_altman_table(rows: list[dict[str, Any]]) -> Table:
    counts = sorted({r["n"] for r in rows if r["parameter"] == "tst_min"})
    table = Table(title="Study-wide Bland-Altman on held-out nights: bias [95% limits of agreement], method - PSG",
                  caption=f"{counts[0]}-{counts[-1]} nights per method" if counts else None, box=box.SIMPLE_HEAD,
                  pad_edge=False)
    table.add_column("method", no_wrap=True)
    for p in BA_PARAMETERS:
        table.add_column(p.replace("sleep_efficiency_pct", "efficiency_pct"), justify="right")
    for method in dict.fromkeys(r["method"] for r in rows):
        mine = {r["parameter"]: r for r in rows if r["method"] == method}
        cells = []
        for p in BA_PARAMETERS:
            hit = mine.get(p)
            if hit is None or hit["bias"] is None:
                cells.append("-")
            elif hit["loa_lower"] is None:
                cells.append(f"{hit['bias']:.0f}")
            else:
                cells.append(f"{hit['bias']:.0f} [{hit['loa_lower']:.0f},{hit['loa_upper']:.0f}]")
        table.add_row(method, *cells)
    return table


@app.command()
def demo(
    data_dir: Annotated[Path, typer.Option(help="Folder holding the demo study.")] = Path("demo_data"),
    db: DbOption = None,
    port: Annotated[int | None, typer.Option(help="Port (default 8765, or a free one if taken).")] = None,
    n_trials: Annotated[int, typer.Option(min=1, help="Hyper-parameter trials per personal search.")] = 3,
    job_workers: Annotated[int, typer.Option(min=1, help="Training worker processes.")] = 2,
) -> None:
    """Run nightbank on the simulated demo study (set DEMO_EXIT=1 to finish without serving)."""
    from ..client import NightbankClient
    from ..jobs.workers import settings_env, start_worker_processes, stop_worker_processes
    from ..store.db import make_engine, make_session_factory, session_scope
    from ..store.schema import upgrade
    from ..store.tokens import create_token
    from .server import configure_logging

    console.rule(f"[bold]nightbank demo[/bold] — {SIMULATED}")
    files = demo_files(data_dir)
    console.print(_qc_table(files))
    settings = local_settings(db=db, port=port, job_workers=job_workers, log_level="WARNING")
    if port is None and not _port_free(settings.host, settings.port):
        with socket.socket() as s:
            s.bind((settings.host, 0))
            settings = settings.model_copy(update={"port": s.getsockname()[1]})
    configure_logging(settings.log_level)
    upgrade(settings)
    engine = make_engine(settings)
    with session_scope(make_session_factory(engine), write=True) as session:
        _, token = create_token(session, role="admin", study_id=DEMO_STUDY_ID, label="demo", actor="demo")
    engine.dispose()
    os.environ.update(settings_env(settings))
    server = _EmbeddedServer(settings)
    server.start()
    workers = start_worker_processes(settings, settings.job_workers)
    url = f"http://{settings.host}:{settings.port}"
    try:
        with NightbankClient(url, token=token, timeout_s=600) as client:
            _run(client, data_dir, n_trials)
        console.rule("[bold]serving[/bold]")
        console.print(f"API      {url}   (docs {url}/docs)")
        console.print(f"study    {DEMO_STUDY_ID}   database {settings.db}")
        console.print("token    (admin, demo study; pass as 'Authorization: Bearer <token>'):")
        console.print(token, soft_wrap=True, highlight=False)
        console.print("Research software, not a medical device; not for diagnosis or treatment decisions.")
        if os.environ.get("DEMO_EXIT") != "1":
            console.print("Serving until Ctrl-C.")
            while server.thread.is_alive():
                time.sleep(0.5)
    except KeyboardInterrupt:
        console.print("stopping")
    finally:
        server.stop()
        stop_worker_processes(workers)


def _run(client: Any, data_dir: Path, n_trials: int) -> None:
    from ..errors import Conflict

    try:
        client.create_study(DEMO_STUDY_ID, DEMO_NAME)
    except Conflict:
        console.print(f"study {DEMO_STUDY_ID} exists already; nights already stored are recognised")
    rows = push_folder(client, DEMO_STUDY_ID, data_dir / DEMO_STUDY_ID)
    bad = [r for r in rows if r["status"] not in STORED]
    stored = sum(r["status"] == "created" for r in rows)
    console.print(f"pushed {len(rows)} nights: {stored} new, {len(rows) - stored - len(bad)} stored before, "
                  f"{len(bad)} refused")
    for r in bad:
        console.print(f"  [red]{r['file']}[/red]: {'; '.join(problem_line(p) for p in r['problems'])}")
    recorded = push_recording_files(client, DEMO_STUDY_ID, data_dir / DEMO_STUDY_ID)
    if recorded:
        console.print(f"pushed {len(recorded)} recording, diary and PSG files (SIMULATED continuous recordings): "
                      f"{sum(r['status'] in STORED for r in recorded)} stored")
        for r in recorded:
            if r["status"] not in STORED:
                console.print(f"  [red]{r['file']}[/red]: {'; '.join(problem_line(p) for p in r['problems'])}")
    console.rule("[bold]training[/bold] (held-out validation; personal models are compared with the pooled one)")
    jobs = train_and_wait(client, DEMO_STUDY_ID, [("pooled", None)], n_trials=n_trials)
    eligible = [p["participant_id"] for p in client.list_participants(DEMO_STUDY_ID) if p["n_labelled_nights"] >= 3]
    jobs |= train_and_wait(client, DEMO_STUDY_ID, [(pid, pid) for pid in eligible], n_trials=n_trials)
    for label, job in jobs.items():
        if job["state"] != "succeeded":
            console.print(f"[red]{label}: {job['state']}[/red] {job.get('error') or ''}")
    console.rule("[bold]comparison[/bold] (held-out nights only)")
    with console.status("comparing every method on the held-out nights"):
        comparison = client.study_comparison(DEMO_STUDY_ID)
    console.print(_comparison_table(comparison["participants"]))
    console.print(_bland_altman_table(comparison["bland_altman"]))
    for note in comparison["notes"]:
        console.print(f"[dim]note: {note}[/dim]")
    print_day_tables(client, [r for r in recorded if r["kind"] == "recording" and r["status"] in STORED])


def print_day_tables(client: Any, recordings: list[dict[str, Any]]) -> None:
    """Print the day table of each stored demo recording (SIMULATED)."""
    for r in recordings:
        found = client.recording_days(DEMO_STUDY_ID, r["participant"], r["night_id"])
        console.rule(f"[bold]days[/bold] of the SIMULATED recording of {r['participant']} "
                     f"(nights scored with {', '.join(found['methods_used']) or found['method']})")
        table = Table(box=box.SIMPLE_HEAD, pad_edge=False)
        for col in ("day", "in bed", "onset", "offset", "out", "TST", "SOL", "WASO", "eff. %", "naps min",
                    "off-wrist min", "set by"):
            table.add_column(col, justify="left" if col in ("day", "set by") else "right", no_wrap=True)
        for d in found["rows"]:
            table.add_row(d["date"], *(_clock(d[k]) for k in ("bed_time", "sleep_onset", "sleep_offset", "rise_time")),
                          *(_num(d[k]) for k in ("tst_min", "sol_min", "waso_min", "sleep_efficiency_pct", "nap_min",
                                                 "nonwear_min")), d["source"] or "-")
        console.print(table)
        s = found["summary"]
        tst = s["parameters"].get("tst_min") or {"mean": None, "sd": None}
        console.print(f"TST {_num(tst['mean'])} ± {_num(tst['sd'])} min over {s['n_main_periods']} nights; "
                      f"social jetlag {_num(s['social_jetlag_h'], 2)} h; SRI {_num(s['sri'])}")


def _clock(value: str | None) -> str:
    return "-" if not value else value[11:16]


def _num(value: float | None, digits: int = 0) -> str:
    return "-" if value is None else f"{value:.{digits}f}"
