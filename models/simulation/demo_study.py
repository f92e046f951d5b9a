"""The demo study: a simulated crew-rest study written as files under ``demo_data/``.

Scenario (invented, SIMULATED data): the fictional ferry operator "Gullwing Ferries" runs
rotating shifts between made-up islands. Fourteen deckhands and their partners wore wrist
actigraphs for one to nine nights; a sleep lab recorded PSG on most nights. One partner site
scored PSG with the older R&K stages, and a few epochs were left unscored. Later, three of them
wore the device for two weeks without a break (a continuous recording with a sleep diary and
two PSG nights on the PSG system's own clock).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from ..nights.json_io import night_to_json
from ..nights.night import Night
from ..nights.tabular import night_to_csv
from ..recordings.recording import recording_to_json
from .recordings import RecordingSpec, SimulatedRecording, simulate_recordings
from .simulator import CohortSpec, SimulatedNight, simulate_cohort

__all__ = ["DEMO_RECORDING_SPEC", "DEMO_SEED", "DEMO_STUDY_ID", "demo_nights", "demo_recordings",
           "write_demo_study"]

DEMO_SEED = 20310302
DEMO_STUDY_ID = "gullwing"
_RK = {"W": "W", "N1": "S1", "N2": "S2", "R": "REM"}


def _with_reference(night: Night, reference: NDArray[np.str_]) -> Night:
    return Night(participant_id=night.participant_id, start=night.start, epoch_seconds=night.epoch_seconds,
                 counts=night.counts, reference=reference, lights_off=night.lights_off, lights_on=night.lights_on,
                 label=night.label)


def demo_nights() -> list[SimulatedNight]:
    """The demo cohort with its scoring conventions applied (R&K site, unscored epochs)."""
    rng = np.random.default_rng(DEMO_SEED + 1)
    cohort = simulate_cohort(CohortSpec(), seed=DEMO_SEED)
    out = []
    for sim in cohort:
        night = sim.night
        if night.reference is not None:
            ref = night.reference.copy()
            if night.participant_id == "GW-02":  # partner site scoring in R&K
                deep = ref == "N3"
                ref = np.array([_RK.get(s, s) for s in ref], dtype="<U3")
                ref[deep] = np.where(rng.random(int(deep.sum())) < 0.5, "S3", "S4")
                shift = np.flatnonzero((night.counts > 80) & (ref != "W"))
                ref[shift[: 3]] = "MT"
            gap = int(rng.integers(night.n_epochs // 3, night.n_epochs // 2))
            ref[gap: gap + int(rng.integers(0, 7))] = "?"  # electrode artefact left unscored
            night = _with_reference(night, ref)
        out.append(SimulatedNight(night=night, stages=sim.stages, traits=sim.traits, day_sleep=sim.day_sleep))
    return out


#: the demo study's continuous recordings: three participants (GW-01 .. GW-03), two weeks each
DEMO_RECORDING_SPEC = RecordingSpec(n_participants=3, n_days=14, psg_nights=2, id_prefix="GW",
                                    first_date="2031-05-05")


def demo_recordings() -> list[SimulatedRecording]:
    """The demo study's simulated continuous recordings (after the participants' nights, own seed)."""
    return simulate_recordings(DEMO_RECORDING_SPEC, seed=DEMO_SEED + 2)


def _write_recording(folder: Path, sim: SimulatedRecording) -> list[Path]:
    """``recording.json``, ``diary.csv`` and one ``psg<k>.json`` hypnogram (PSG clock) per PSG night."""
    paths = [folder / "recording.json", folder / "diary.csv"]
    paths[0].write_text(json.dumps(recording_to_json(sim.recording), separators=(",", ":")) + "\n", encoding="utf-8")
    paths[1].write_text(sim.diary_csv, encoding="utf-8")
    for k, psg in enumerate(sim.psg, start=1):
        path = folder / f"psg{k}.json"
        body = {"start": psg.start.isoformat(), "epoch_seconds": psg.epoch_seconds, "stages": psg.stages.tolist()}
        path.write_text(json.dumps(body, separators=(",", ":")) + "\n", encoding="utf-8")
        paths.append(path)
    return paths


def write_demo_study(directory: str | Path) -> list[Path]:
    """Write the demo study: one folder per participant, nights as JSON (CSV for every fourth).

    Three participants' folders also hold a continuous recording (``recording.json``), its diary
    (``diary.csv``) and PSG hypnograms (``psg1.json``, ...). Returns every written file but
    ``study.json`` (scenario and manifest), sorted. The output is identical byte for byte on every run.
    """
    root = Path(directory) / DEMO_STUDY_ID
    written: list[Path] = []
    manifest = []
    for i, sim in enumerate(demo_nights()):
        n = sim.night
        folder = root / n.participant_id
        folder.mkdir(parents=True, exist_ok=True)
        stem = f"{n.start.strftime('%Y-%m-%d')}_{n.label}"
        if i % 4 == 3:
            path = folder / f"{stem}.csv"
            path.write_text(night_to_csv(n), encoding="utf-8")
        else:
            path = folder / f"{stem}.json"
            path.write_text(json.dumps(night_to_json(n), separators=(",", ":")) + "\n", encoding="utf-8")
        written.append(path)
        manifest.append({"participant_id": n.participant_id, "file": str(path.relative_to(root)),
                         "labelled": n.reference is not None, "day_sleep": sim.day_sleep})
    recordings = []
    for rec in demo_recordings():
        pid = rec.recording.participant_id
        files = _write_recording(root / pid, rec)
        written += files
        recordings.append({"participant_id": pid, "files": [str(p.relative_to(root)) for p in files],
                           "days": len(rec.days), "psg_clock_offsets_s": [p.clock_offset_s for p in rec.psg]})
    info = {
        "study_id": DEMO_STUDY_ID,
        "name": "Gullwing Ferries crew-rest study (SIMULATED)",
        "simulated": True,
        "note": "Invented participants and data produced by models.simulation with a fixed seed; no real person.",
        "seed": DEMO_SEED,
        "nights": manifest,
        "recordings": recordings,
    }
    (root / "study.json").write_text(json.dumps(info, indent=1) + "\n", encoding="utf-8")
    return sorted(written)
