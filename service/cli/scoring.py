"""Commands scoring night files with the classical rules: ``score`` and ``agree``."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated, Any

import numpy as np
import typer
from rich.progress import track
from rich.table import Table

from models import (
    EPOCH_METRIC_NAMES,
    METHOD_IDS,
    PARAMETER_NAMES,
    NightOptions,
    NightRecord,
    compare_rules_with_reference,
    read_night,
    score_with_rule,
    sleep_parameters,
)

from ..errors import Unprocessable
from .application import app
from .console import FillGapsOption, JsonOption, TzOption, console, err_console
from .protocol_options import (
    MinAwakeningOption,
    PersistentSleepOption,
    SolOption,
    UnscoredBreaksOption,
    WasoEndOption,
    apply_protocol_options,
    protocol_line,
)

__all__ = ["agree", "score"]

MethodOption = Annotated[str, typer.Option("--method", "-m", help=f"One of: {', '.join(METHOD_IDS)}.")]
ScaleOption = Annotated[float, typer.Option("--count-scale", help="Counts are multiplied by this before the rule.")]


def _clean(value: Any) -> Any:
    if isinstance(value, float) and np.isnan(value):
        return None
    if isinstance(value, np.generic):
        return value.item()
    return value


@app.command()
def score(
    file: Annotated[Path, typer.Argument(help="A night file (JSON, CSV or Parquet).")],
    method: MethodOption = "cole-kripke",
    count_scale: ScaleOption = 1.0,
    epochs: Annotated[bool, typer.Option("--epochs", help="Also print the per-epoch calls.")] = False,
    tz: TzOption = None,
    fill_gaps: FillGapsOption = False,
    waso_end: WasoEndOption = None,
    min_awakening_epochs: MinAwakeningOption = None,
    persistent_sleep_min: PersistentSleepOption = None,
    sol: SolOption = None,
    unscored_breaks_bouts: UnscoredBreaksOption = None,
    as_json: JsonOption = False,
) -> None:
    """Score a night with a classical rule and print its sleep parameters (in-bed interval) under the
    protocol the options define (the default protocol for options left out)."""
    protocol = apply_protocol_options({}, waso_end=waso_end, min_awakening_epochs=min_awakening_epochs,
                                      persistent_sleep_min=persistent_sleep_min, sol=sol,
                                      unscored_breaks_bouts=unscored_breaks_bouts)
    night = read_night(file, participant_id=file.parent.name, options=NightOptions(tz=tz, fill_gaps=fill_gaps))
    result = score_with_rule(night.counts, night.epoch_seconds, method, count_scale=count_scale)
    first, stop = night.in_bed
    params = {k: _clean(v) for k, v in sleep_parameters(result.sleep, night.epoch_seconds, lights_off_idx=first,
                                                          lights_on_idx=stop, protocol=protocol).as_dict().items()}
    out: dict[str, Any] = {"file": str(file), "method": method, "epoch_seconds": night.epoch_seconds,
                           "start": night.start.isoformat(), "parameters": params, "protocol": protocol.to_dict()}
    if epochs:
        out["sleep"] = [None if np.isnan(v) else int(v) for v in result.sleep]  # None: unscored (no counts)
        out["score"] = None if result.score is None else [_clean(v) for v in np.round(result.score, 6).tolist()]
    if as_json:
        console.print_json(json.dumps(out))
        return
    table = Table(title=f"{file.name} — {method} (in bed: epochs {first}..{stop})")
    table.add_column("parameter")
    table.add_column("value", justify="right")
    for name in PARAMETER_NAMES:
        v = params[name]
        table.add_row(name, "-" if v is None else f"{v:.1f}" if isinstance(v, float) else str(v))
    console.print(table)
    console.print(protocol_line(protocol))
    if epochs:
        times = night.epoch_times()
        for i, s in enumerate(out["sleep"]):
            console.print(f"{times[i].isoformat()}\t{night.counts[i]:g}\t{'?' if s is None else 'S' if s else 'W'}")


@app.command()
def agree(
    files: Annotated[list[Path], typer.Argument(help="Labelled night files; participant = folder name.")],
    count_scale: ScaleOption = 1.0,
    tz: TzOption = None,
    waso_end: WasoEndOption = None,
    min_awakening_epochs: MinAwakeningOption = None,
    persistent_sleep_min: PersistentSleepOption = None,
    sol: SolOption = None,
    unscored_breaks_bouts: UnscoredBreaksOption = None,
    as_json: JsonOption = False,
) -> None:
    """Compare every classical rule with the reference labels: epoch metrics and Bland-Altman, the sleep
    parameters under the protocol the options define."""
    protocol = apply_protocol_options({}, waso_end=waso_end, min_awakening_epochs=min_awakening_epochs,
                                      persistent_sleep_min=persistent_sleep_min, sol=sol,
                                      unscored_breaks_bouts=unscored_breaks_bouts)
    records = []
    for path in track(files, description="reading", console=err_console, transient=True):
        night = read_night(path, participant_id=path.parent.name, options=NightOptions(tz=tz))
        if night.has_reference:
            records.append(NightRecord.from_night(night, night_id=path.stem))
        else:
            err_console.print(f"[yellow]{path}: no reference labels, skipped[/yellow]")
    if not records:
        raise Unprocessable("none of the files has reference labels", code="no_reference")
    comparison = compare_rules_with_reference(records, count_scale=count_scale,
                                              parameter_options={"protocol": protocol})
    metrics = comparison.epoch_metrics
    if as_json:
        console.print_json(json.dumps({
            "epoch_metrics": json.loads(metrics.to_json(orient="records")),
            "bland_altman": json.loads(comparison.bland_altman.to_json(orient="records")),
            "protocol": protocol.to_dict(),
        }))
        return
    shown = [m for m in ("sensitivity", "specificity", "balanced_accuracy", "kappa", "auc") if m in EPOCH_METRIC_NAMES]
    for level in ("pooled", "participant"):
        rows = metrics[metrics["level"] == level]
        if "statistic" in rows:
            rows = rows[rows["statistic"].isin(["value", "mean"])]
        table = Table(title=f"Epoch-by-epoch agreement with the reference ({level}; sleep = positive class)")
        for col in (["participant_id"] if level == "participant" else []) + ["method", *shown]:
            table.add_column(col, justify="left" if col in ("method", "participant_id") else "right")
        for _, r in rows.iterrows():
            cells = ([str(r["participant_id"])] if level == "participant" else []) + [str(r["method"])]
            table.add_row(*cells, *(f"{r[m]:.3f}" for m in shown))
        console.print(table)
    ba = comparison.bland_altman
    table = Table(title="Bland-Altman (method - reference, across nights)")
    for col in ("method", "parameter", "n", "bias", "loa_lower", "loa_upper", "mae"):
        table.add_column(col, justify="left" if col in ("method", "parameter") else "right")
    for _, r in ba.iterrows():
        table.add_row(str(r["method"]), str(r["parameter"]),
                      *(f"{r[c]:.2f}" if isinstance(r[c], float) else str(r[c]) for c in ("n", "bias", "loa_lower",
                                                                                          "loa_upper", "mae")))
    console.print(table)
    console.print(protocol_line(protocol))
