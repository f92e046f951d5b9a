"""``nightbank demo``: the main job on the simulated demo study, on the embedded defaults."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Annotated

import typer
from rich.table import Table

from models import DEMO_STUDY_ID, read_night, write_demo_study

from . import app
from .console import console
from .data import night_summary


def demo_files(data_dir: Path) -> list[Path]:
    """Night files of the demo study under ``data_dir`` (written there first if absent)."""
    root = data_dir / DEMO_STUDY_ID
    if not (root / "study.json").exists():
        write_demo_study(data_dir)
    return sorted(p for p in root.glob("*/*") if p.suffix in (".json", ".csv", ".parquet"))


@app.command()
def demo(
    data_dir: Annotated[Path, typer.Option(help="Folder holding the demo study.")] = Path("demo_data"),
) -> None:
    """Run nightbank on the simulated demo study (set DEMO_EXIT=1 to finish without serving)."""
    console.rule("[bold]nightbank demo[/bold] — SIMULATED data (Gullwing Ferries crew-rest study)")
    files = demo_files(data_dir)
    table = Table(title=f"Quality control: {len(files)} nights")
    for col in ("participant", "night", "epochs", "hours", "ref %", "QC flags"):
        table.add_column(col)
    for path in files:
        night = read_night(path, participant_id=path.parent.name)
        s = night_summary(night)
        ref = "-" if s["reference_coverage_pct"] is None else f"{s['reference_coverage_pct']:.1f}"
        flags = ", ".join(f"{f['code']}" for f in s["qc"]) or ""
        table.add_row(path.parent.name, s["label"] or path.stem, str(s["epochs"]), f"{s['hours']:.2f}", ref, flags)
    console.print(table)
    console.print("Research software, not a medical device; not for diagnosis or treatment decisions.")
    if os.environ.get("DEMO_EXIT") == "1":
        return
