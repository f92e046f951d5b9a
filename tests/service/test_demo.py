"""``nightbank demo`` end to end on a small study laid out like the demo study (real processes)."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from harness import cohort_bodies, free_port

EXE = shutil.which("nightbank", path=str(Path(sys.executable).parent)) or "nightbank"


@pytest.mark.slow
def test_demo_pushes_trains_compares_and_prints_url_and_token(tmp_path: Path) -> None:
    from models import DEMO_STUDY_ID

    root = tmp_path / "data" / DEMO_STUDY_ID
    for pid, nights in cohort_bodies(n_participants=3, nights=3).items():
        (root / pid).mkdir(parents=True)
        for k, body in enumerate(nights):
            (root / pid / f"n{k}.json").write_text(json.dumps(body))
    (root / "study.json").write_text("{}")
    port = free_port()
    out = subprocess.run([EXE, "demo", "--data-dir", str(tmp_path / "data"), "--db", f"sqlite:///{tmp_path / 'd.db'}",
                          "--port", str(port), "--n-trials", "1", "--job-workers", "1"],
                         env={**os.environ, "DEMO_EXIT": "1", "COLUMNS": "120"}, capture_output=True, text=True,
                         timeout=600, check=False)
    assert out.returncode == 0, out.stdout[-3000:] + out.stderr[-3000:]
    text = out.stdout
    for expected in ("Quality control: 9 nights", "pushed 9 nights: 9 new", "pooled: succeeded", "P-03: succeeded",
                     "Held-out balanced accuracy per participant", "Study-wide Bland-Altman",
                     f"http://127.0.0.1:{port}"):
        assert expected in text, expected
    token = text.split("Bearer <token>'):")[1].split()[0]
    assert token.startswith("nb_") and "Traceback" not in out.stderr
