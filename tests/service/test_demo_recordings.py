"""``nightbank demo`` with a participant who also wore the device for days: the day table is printed."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from harness import cohort_bodies, free_port
from test_api_recordings import hypnogram_csv, recording_csv, simulated

EXE = shutil.which("nightbank", path=str(Path(sys.executable).parent)) or "nightbank"


@pytest.mark.slow
def test_demo_loads_a_recording_and_prints_its_day_table(tmp_path: Path) -> None:
    from models import DEMO_STUDY_ID

    root = tmp_path / "data" / DEMO_STUDY_ID
    for pid, nights in cohort_bodies(n_participants=3, nights=3).items():
        (root / pid).mkdir(parents=True)
        for k, body in enumerate(nights):
            (root / pid / f"n{k}.json").write_text(json.dumps(body))
    sim = simulated(5, seed=41, psg_nights=1)[0]  # participant P-01, after the nights
    (root / "P-01" / "recording.csv").write_bytes(recording_csv(sim.recording))
    (root / "P-01" / "diary.csv").write_text(sim.diary_csv)
    (root / "P-01" / "psg1.csv").write_bytes(hypnogram_csv(sim.psg[0]))
    (root / "study.json").write_text("{}")
    out = subprocess.run([EXE, "demo", "--data-dir", str(tmp_path / "data"), "--db", f"sqlite:///{tmp_path / 'd.db'}",
                          "--port", str(free_port()), "--n-trials", "1", "--job-workers", "1"],
                         env={**os.environ, "DEMO_EXIT": "1", "COLUMNS": "160"}, capture_output=True, text=True,
                         timeout=900, check=False)
    assert out.returncode == 0, out.stdout[-3000:] + out.stderr[-3000:]
    text = out.stdout
    assert "Quality control: 9 nights" in text  # the recording files are not taken for nights
    assert "pushed 3 recording, diary and PSG files (SIMULATED continuous recordings): 3 stored" in text
    assert "days of the SIMULATED recording of P-01" in text
    table = text.split("days of the SIMULATED recording of P-01")[1]
    assert all(day.date.isoformat() in table for day in sim.days)  # one row per simulated day
    assert "SRI" in table and "Traceback" not in out.stderr
