"""``nightbank check`` through the installed console script (a real subprocess)."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

from factories import night_json

EXE = shutil.which("nightbank", path=str(Path(sys.executable).parent)) or "nightbank"


def _run(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([EXE, "check", *args], capture_output=True, text=True, timeout=120)


def test_check_valid_files_exit_0(tmp_path: Path) -> None:
    f = tmp_path / "n1.json"
    f.write_text(json.dumps(night_json(240)))
    out = _run(str(f), "--json")
    assert out.returncode == 0, out.stderr
    report = json.loads(out.stdout)
    assert report[0]["valid"] and report[0]["epochs"] == 240 and report[0]["hours"] == 2.0


def test_check_invalid_exit_1_names_problem_and_row(tmp_path: Path) -> None:
    good = tmp_path / "good.json"
    good.write_text(json.dumps(night_json(240)))
    bad = tmp_path / "bad.csv"
    bad.write_text("time,counts\n2031-03-02T22:00:00+00:00,1\n2031-03-02T22:00:30+00:00,-4\n")
    out = _run(str(good), str(bad))
    assert out.returncode == 1
    assert "negative_count" in out.stdout and "row 3" in out.stdout
    report = json.loads(_run(str(bad), "--json").stdout)
    codes = {p["code"] for p in report[0]["problems"]}
    assert {"negative_count", "too_short"} <= codes
