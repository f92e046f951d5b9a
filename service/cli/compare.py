"""``nightbank compare``: personal, pooled and classical scoring side by side on held-out nights."""

from __future__ import annotations

import json
import math
from dataclasses import replace
from pathlib import Path
from typing import Annotated, Any

import typer
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

from models import Night, NightOptions, TrainingConfig, compare_study, read_night

from ..errors import BadRequest, Unprocessable
from .application import app
from .console import FillGapsOption, JsonOption, TzOption, console, err_console
from .protocol_options import IntervalLevelOption

__all__ = ["compare", "read_study"]

_NIGHT_SUFFIXES = (".json", ".csv", ".parquet")
_METHODS = ("personal", "pooled", "pooled+offset", "cole-kripke", "sadeh", "count-threshold", "always-sleep")
_PARAMETERS = {"sol_min": "SOL min", "tst_min": "TST min", "waso_min": "WASO min", "awakenings": "awakenings",
               "sleep_efficiency_pct": "SE %"}


def read_study(directory: Path, options: NightOptions) -> dict[str, list[Night]]:
    """Night files per participant: one sub-folder per participant, the folder name is the id."""
    study: dict[str, list[Night]] = {}
    for folder in sorted(p for p in directory.iterdir() if p.is_dir()):
        files = sorted(f for f in folder.iterdir() if f.suffix.lower() in _NIGHT_SUFFIXES)
        if files:
            study[folder.name] = [read_night(f, participant_id=folder.name, options=options) for f in files]
    return study


def _fmt(value: Any, digits: int = 3) -> str:
    return "-" if value is None or (isinstance(value, float) and math.isnan(value)) else f"{value:.{digits}f}"


def _print(result: Any) -> None:
    people = Table(title="Held-out balanced accuracy per participant")
    for col in ("participant", "nights", "labelled", *_METHODS[:-1], "chosen", "reason"):
        people.add_column(col, justify="right" if col not in ("participant", "chosen", "reason") else "left")
    for row in result.participants.to_dict(orient="records"):
        people.add_row(row["participant_id"], str(row["n_nights"]), str(row["n_labelled_nights"]),
                       *(_fmt(row[f"{m}_balanced_accuracy"]) for m in _METHODS[:-1]), row["chosen"], row["reason"])
    console.print(people)

    pooled = result.epoch_metrics[result.epoch_metrics["level"] == "pooled"].set_index("method")
    epochs = Table(title="All held-out nights (epochs pooled)")
    for col in ("method", "nights", "sensitivity", "specificity", "balanced acc.", "AUC", "kappa"):
        epochs.add_column(col, justify="left" if col == "method" else "right")
    for method in (m for m in _METHODS if m in pooled.index):
        r = pooled.loc[method]
        epochs.add_row(method, str(int(r["n_nights"])), _fmt(r["sensitivity"]), _fmt(r["specificity"]),
                       _fmt(r["balanced_accuracy"]), _fmt(r["auc"]), _fmt(r["kappa"]))
    console.print(epochs)

    ba = result.bland_altman.set_index(["method", "parameter"])
    agreement = Table(title="Bland-Altman against PSG, all held-out nights: bias [95% limits of agreement]")
    agreement.add_column("method")
    for label in _PARAMETERS.values():
        agreement.add_column(label, justify="right")
    for method in (m for m in _METHODS if m in ba.index.get_level_values(0)):
        cells = []
        for name in _PARAMETERS:
            r = ba.loc[(method, name)]
            cells.append(f"{_fmt(r['bias'], 1)} [{_fmt(r['loa_lower'], 1)}, {_fmt(r['loa_upper'], 1)}]")
        agreement.add_row(method, *cells)
    console.print(agreement)
    for note in result.notes:
        console.print(f"[dim]{note}[/dim]")
    console.print("Research software, not a medical device; not for diagnosis or treatment decisions.")


@app.command()
def compare(
    directory: Annotated[Path, typer.Argument(help="Study folder: one sub-folder of night files per participant.")],
    trials: Annotated[int, typer.Option("--trials", min=1, help="Optuna trials per tuning study.")] = 30,
    seed: Annotated[int, typer.Option("--seed", help="Seed of every random choice.")] = 0,
    jobs: Annotated[int, typer.Option("--jobs", min=1, help="Worker threads.")] = 1,
    interval_level: IntervalLevelOption = None,
    tz: TzOption = None,
    fill_gaps: FillGapsOption = False,
    as_json: JsonOption = False,
) -> None:
    """Train personal and pooled models and compare them with classical rules on held-out nights (per-night
    intervals of the models at ``--interval-level``)."""
    if not directory.is_dir():
        raise BadRequest(f"{directory} is not a folder", code="not_a_directory")
    study = read_study(directory, NightOptions(tz=tz, fill_gaps=fill_gaps))
    if not study:
        raise Unprocessable(f"no participant folders with night files in {directory}", code="no_nights")
    config = TrainingConfig(n_trials=trials, seed=seed, n_jobs=jobs)
    if interval_level is not None:
        config = replace(config, interval_level=interval_level)
    with Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
                  console=err_console, transient=True) as bar:
        task = bar.add_task("reading", total=None)

        def progress(done: int, total: int, stage: str) -> None:
            bar.update(task, completed=done, total=total, description=stage)

        result = compare_study(study, config=config, progress=progress)
    if as_json:
        console.print_json(json.dumps(result.to_dict()))
    else:
        _print(result)
