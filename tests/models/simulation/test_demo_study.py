"""The simulated demo study: reproducible, and it contains the situations it promises."""

from __future__ import annotations

import filecmp
from collections import Counter
from pathlib import Path

import numpy as np

from models import demo_nights, quality_flags, read_night, write_demo_study

ROOT = Path(__file__).resolve().parents[3]


def test_committed_files_regenerate_bit_for_bit(tmp_path: Path) -> None:
    written = write_demo_study(tmp_path)
    committed = ROOT / "demo_data" / "gullwing"
    rel = sorted(str(p.relative_to(tmp_path / "gullwing")) for p in written) + ["study.json"]
    match, mismatch, errors = filecmp.cmpfiles(tmp_path / "gullwing", committed, rel, shallow=False)
    assert not mismatch and not errors, (mismatch, errors)
    assert sorted(str(p.relative_to(committed)) for p in committed.rglob("*") if p.is_file()) == sorted(rel)


def test_every_committed_night_is_valid() -> None:
    files = sorted(f for f in (ROOT / "demo_data" / "gullwing").glob("*/*.*")
                   if f.stem not in ("recording", "diary") and not f.stem.startswith("psg"))  # not nights
    assert len(files) >= 12
    for f in files:
        read_night(f, participant_id=f.parent.name)


def test_study_shape() -> None:
    sims = demo_nights()
    per = Counter(s.night.participant_id for s in sims)
    labelled = Counter(s.night.participant_id for s in sims if s.night.reference is not None)
    assert len(per) >= 12 and all(1 <= v <= 9 for v in per.values())
    assert sum(1 for p in per if labelled[p] in (1, 2)) >= 3  # pooled fallback is exercised
    assert any(s.night.reference is None for s in sims)  # nights left to score
    assert all(s.night.epoch_seconds == 30 for s in sims)


def test_hard_situations_present() -> None:
    sims = demo_nights()
    flags = Counter(f.code for s in sims for f in quality_flags(s.night))
    assert flags["off_wrist"] >= 1 and flags["spike"] >= 1
    sol_min, quiet_wake = [], []
    for s in sims:
        first, stop = s.night.in_bed
        stages = s.stages[first:stop]
        onset = int(np.argmax(stages != "W"))
        sol_min.append(onset / 2)
        wake_after = (stages[onset:] == "W") & (s.night.counts[first:stop][onset:] == 0)
        quiet_wake.append(wake_after.sum())
    assert max(sol_min) >= 45  # long sleep-onset latencies spent lying still
    assert np.mean(quiet_wake) > 20  # still wake after sleep onset
    gains = {s.night.participant_id: s.traits.gain for s in sims}
    assert max(gains.values()) / min(gains.values()) > 1.5  # device gain differs between people
