"""``nightbank score`` and ``nightbank agree`` through the installed console script."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np

from models import NightRecord, compare_rules_with_reference, read_night, score_with_rule, sleep_parameters

EXE = shutil.which("nightbank", path=str(Path(sys.executable).parent)) or "nightbank"
DEMO = Path(__file__).resolve().parents[2] / "demo_data" / "gullwing"


def _run(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([EXE, *args], capture_output=True, text=True, timeout=300)


def test_score_prints_the_library_parameters() -> None:
    path = sorted((DEMO / "GW-01").glob("*.json"))[0]
    out = _run("score", str(path), "--method", "sadeh+webster", "--json", "--epochs")
    assert out.returncode == 0, out.stderr
    report = json.loads(out.stdout)
    night = read_night(path)
    expected = score_with_rule(night.counts, 30, "sadeh+webster")
    assert report["sleep"] == expected.sleep.astype(int).tolist()
    first, stop = night.in_bed
    params = sleep_parameters(expected.sleep, 30, lights_off_idx=first, lights_on_idx=stop)
    assert report["parameters"]["tst_min"] == params.tst_min
    assert report["parameters"]["awakenings"] == params.awakenings


def test_score_unknown_method_exit_1() -> None:
    path = sorted((DEMO / "GW-01").glob("*.json"))[0]
    out = _run("score", str(path), "--method", "magic")
    assert out.returncode == 1 and "unknown_method" in out.stderr


def test_score_invalid_file_exit_1_lists_every_problem(tmp_path: Path) -> None:
    bad = tmp_path / "bad.csv"
    bad.write_text("time,counts\n2031-03-02T22:00:00+00:00,1\n2031-03-02T22:00:30+00:00,-4\n")
    out = _run("score", str(bad))
    assert out.returncode == 1 and "invalid_night" in out.stderr and "Traceback" not in out.stderr
    assert "negative_count" in out.stderr and "too_short" in out.stderr and "row 3" in out.stderr


def test_agree_without_reference_labels_exit_1(tmp_path: Path) -> None:
    night = read_night(sorted((DEMO / "GW-01").glob("*.json"))[0])
    unlabelled = tmp_path / "P" / "n.json"
    unlabelled.parent.mkdir()
    unlabelled.write_text(json.dumps({"epoch_seconds": night.epoch_seconds, "start": night.start.isoformat(),
                                      "counts": night.counts.tolist()}))
    out = _run("agree", str(unlabelled))
    assert out.returncode == 1 and "no_reference" in out.stderr


def test_agree_reports_pooled_metrics_and_bland_altman() -> None:
    files = sorted((DEMO / "GW-05").glob("*.*"))
    out = _run("agree", *map(str, files), "--json")
    assert out.returncode == 0, out.stderr
    report = json.loads(out.stdout)
    pooled = {r["method"]: r for r in report["epoch_metrics"] if r["level"] == "pooled"}
    assert {"always-sleep", "cole-kripke", "sadeh", "count-threshold"} <= set(pooled)
    records = [NightRecord.from_night(n, night_id=f.stem) for f in files if (n := read_night(f)).has_reference]
    direct = compare_rules_with_reference(records).epoch_metrics.query("level == 'pooled' and method == 'sadeh'")
    assert np.isclose(pooled["sadeh"]["specificity"], direct.specificity.item())
    assert {r["parameter"] for r in report["bland_altman"]} >= {"sol_min", "tst_min", "waso_min"}
