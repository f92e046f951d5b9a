"""Continuous recordings on the command line: the recording files ``push`` finds, and ``nightbank days``.

A participant's folder may hold, beside its night files, one continuous recording
(``recording.csv``, ``recording.json`` or ``recording.parquet``), its sleep diary (``diary.csv``
or ``diary.json``) and PSG hypnograms of nights within it (``psg*.csv`` / ``psg*.json``, on the
PSG system's clock). ``push`` posts the recording, then the diary, then each hypnogram, and
reports one row per file like the night files (``night_id`` is the recording id for a recording,
the labelled night's id for a hypnogram).
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer

from models import InvalidNightError, NightbankError, read_diary, read_hypnogram, read_recording

from ..errors import InvalidSettings
from .application import app
from .console import DEFAULT_URL, ServerOption, TokenOption, connect, console, download_progress

__all__ = ["check_recording_files", "is_recording_file", "push_recording_files", "recording_files"]

_RECORDING_SUFFIXES = (".csv", ".json", ".parquet")
_TEXT_SUFFIXES = (".csv", ".json")


def is_recording_file(path: Path) -> bool:
    """Whether ``path`` is a recording, diary or PSG file (not a night) of a participant folder."""
    stem, suffix = path.stem.lower(), path.suffix.lower()
    return ((stem == "recording" and suffix in _RECORDING_SUFFIXES)
            or (stem == "diary" and suffix in _TEXT_SUFFIXES)
            or (stem.startswith("psg") and suffix in _TEXT_SUFFIXES))


def recording_files(folder: Path) -> list[tuple[str, Path, list[Path], list[Path]]]:
    """``(participant, recording, diaries, hypnograms)`` for every participant folder with a recording."""
    out = []
    for sub in sorted(p for p in folder.iterdir() if p.is_dir()):
        files = sorted(p for p in sub.iterdir() if p.is_file() and is_recording_file(p))
        recs = [p for p in files if p.stem.lower() == "recording"]
        if not recs:
            continue
        diaries = [p for p in files if p.stem.lower() == "diary"]
        psg = [p for p in files if p.stem.lower().startswith("psg")]
        out.append((sub.name, recs[0], diaries, psg))
    return out


def _row(folder: Path, pid: str, path: Path, kind: str) -> dict[str, Any]:
    return {"file": str(path.relative_to(folder)), "participant": pid, "kind": kind, "status": "failed",
            "night_id": None, "qc": [], "unused_columns": [], "problems": []}


def _problems(exc: NightbankError) -> list[dict[str, Any]]:
    listed = [p.to_dict() for p in getattr(exc, "problems", None) or ()]
    return listed or [{"code": exc.code, "message": exc.message, "location": {}}]


def push_recording_files(client: Any, study: str, folder: Path, *, tz: str | None = None,
                         profile: str | None = None) -> list[dict[str, Any]]:
    """Post each participant's recording, diary and hypnograms; one result row per file."""
    rows = []
    for pid, rec_path, diaries, psg in recording_files(folder):
        row = _row(folder, pid, rec_path, "recording")
        try:
            out = client.push_recording(study, pid, rec_path, tz=tz, profile=profile)
            row |= {"status": "created" if out["created"] else "stored_before", "night_id": out["recording_id"],
                    "unused_columns": list(out.get("unused_columns") or [])}
        except NightbankError as exc:
            row |= {"status": "invalid" if isinstance(exc, InvalidNightError) else "refused",
                    "problems": _problems(exc)}
        rows.append(row)
        if row["night_id"] is None:
            rows += [_row(folder, pid, p, "diary" if p in diaries else "psg") | {
                "problems": [{"code": "no_recording", "message": "the recording was not stored", "location": {}}]}
                for p in [*diaries, *psg]]
            continue
        recording_id = row["night_id"]
        for path in diaries:
            item = _row(folder, pid, path, "diary")
            try:
                client.push_diary(study, pid, recording_id, path, tz=tz)
                item |= {"status": "created", "night_id": recording_id}
            except NightbankError as exc:
                item |= {"status": "invalid", "problems": _problems(exc)}
            rows.append(item)
        for path in psg:
            item = _row(folder, pid, path, "psg")
            try:
                out = client.push_reference(study, pid, recording_id, path, tz=tz, profile=profile)
                item |= {"status": "created", "night_id": out["night_id"], "qc": [f["code"] for f in out["qc"]]}
            except NightbankError as exc:
                item |= {"status": "refused", "problems": _problems(exc)}
            rows.append(item)
    return rows


def check_recording_files(folder: Path, *, tz: str | None = None, layout: Any = None) -> list[dict[str, Any]]:
    """Read every recording, diary and hypnogram file here (a dry run of :func:`push_recording_files`)."""
    rows = []
    for pid, rec_path, diaries, psg in recording_files(folder):
        for path, kind in [(rec_path, "recording"), *((p, "diary") for p in diaries), *((p, "psg") for p in psg)]:
            row = _row(folder, pid, path, kind)
            try:
                if kind == "recording":
                    rec = read_recording(path, participant_id=pid, profile=layout, tz=tz)
                    row["epochs"], row["start"] = rec.n_epochs, rec.start.isoformat()
                elif kind == "diary":
                    row["epochs"] = len(read_diary(path, tz=tz or "UTC"))
                else:
                    row["epochs"] = read_hypnogram(path, profile=layout, tz=tz).n_epochs
                row["status"] = "would_send"
            except NightbankError as exc:
                row |= {"status": "invalid", "problems": _problems(exc)}
            rows.append(row)
    return rows


@app.command()
def days(
    study: Annotated[str, typer.Option("--study", help="Study id.")],
    output: Annotated[Path, typer.Option("--output", "-o", help="File to write (.csv or .parquet).")],
    participant: Annotated[str | None, typer.Option("--participant", help="Only this participant.")] = None,
    method: Annotated[str, typer.Option("--method", help="auto, personal, pooled or a rule id.")] = "auto",
    server: ServerOption = DEFAULT_URL,
    token: TokenOption = "",
) -> None:
    """Download the day table of the study's continuous recordings (one row per day and recording)."""
    fmt = output.suffix.lower().lstrip(".")
    if fmt not in ("csv", "parquet"):
        raise InvalidSettings(f"{output.name}: write the day table to a .csv or .parquet file")
    bar, advance = download_progress("day rows received")
    with connect(server, token) as client, bar:
        data = client.export_days(study, fmt=fmt, method=method, participant=participant, progress=advance)
    output.write_bytes(data)
    console.print(f"wrote {output} ({len(data)} bytes)")
