"""The bad-input corpus through ``nightbank check``: every file is refused (exit 1) with its defect named."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

CORPUS = Path(__file__).resolve().parents[1] / "corpus"
sys.path.insert(0, str(CORPUS))
EXE = shutil.which("nightbank", path=str(Path(sys.executable).parent)) or "nightbank"


def test_corpus_has_at_least_30_named_defects() -> None:
    expected = json.loads((CORPUS / "expected.json").read_text())
    assert len(expected) >= 30
    assert all((CORPUS / name).is_file() for name in expected)


def test_every_corpus_file_refused_by_check(tmp_path: Path) -> None:
    from build import LARGE, write_large

    expected = {**json.loads((CORPUS / "expected.json").read_text()), **LARGE}
    files = [str(CORPUS / n) for n in expected if n not in LARGE] + [str(write_large(tmp_path))]
    out = subprocess.run([EXE, "check", "--json", *files], capture_output=True, text=True, timeout=300)
    assert out.returncode == 1
    report = {Path(r["file"]).name: r for r in json.loads(out.stdout)}
    assert set(report) == set(expected)
    wrong = {name: [p["code"] for p in r.get("problems", [])] for name, r in report.items()
             if r["valid"] or expected[name] not in {p["code"] for p in r["problems"]}}
    assert not wrong, wrong
    for name, r in report.items():  # every message is a sentence, never a traceback
        for p in r["problems"]:
            assert p["message"] and "Traceback" not in p["message"], name
