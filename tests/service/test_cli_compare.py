"""``nightbank compare``: the study comparison from a folder of night files."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from typer.testing import CliRunner

from models import CohortSpec, night_to_json, simulate_cohort
from models.agreement.rule_comparison import NightRecord, compare_rules_with_reference


def _study(root: Path) -> dict[str, list]:
    sims = simulate_cohort(CohortSpec(n_participants=4, nights_min=3, nights_max=3, labelled_share=1.0,
                                      few_labels_participants=1, artefacts=False), seed=61)
    nights: dict[str, list] = {}
    for s in sims:
        n = s.night
        nights.setdefault(n.participant_id, []).append(n)
        folder = root / n.participant_id
        folder.mkdir(parents=True, exist_ok=True)
        (folder / f"{n.label}.json").write_text(json.dumps(night_to_json(n)))
    (root / "README.txt").write_text("not a participant folder")
    return nights


def _invoke(*args: str):
    from service.cli import app
    from service.cli import compare as _registers_compare  # noqa: F401

    return CliRunner().invoke(app, ["compare", *args])


def test_compare_json_holds_every_participant_and_the_rules_figures(tmp_path: Path) -> None:
    nights = _study(tmp_path)
    out = _invoke(str(tmp_path), "--trials", "2", "--interval-level", "0.8", "--json")
    assert out.exit_code == 0, out.output
    report = json.loads(out.stdout)
    # the held-out intervals, and so their coverage, are at the level asked for (the default is 0.9)
    assert report["interval_coverage"] and {r["level"] for r in report["interval_coverage"]} == {0.8}
    assert sorted(r["participant_id"] for r in report["participants"]) == sorted(nights)
    ours = {r["night_id"]: r for r in report["epoch_metrics"] if r["level"] == "night" and r["method"] == "sadeh"}
    records = [NightRecord.from_night(n) for v in nights.values() for n in v if n.reference is not None]
    direct = compare_rules_with_reference(records, methods=("sadeh",)).epoch_metrics.query(
        "level == 'night' and method == 'sadeh'")
    for _, row in direct.iterrows():
        assert np.isclose(ours[row["night_id"]]["specificity"], row["specificity"])
    assert {r["method"] for r in report["bland_altman"]} >= {"personal", "pooled", "cole-kripke", "always-sleep"}


def test_compare_rejects_a_missing_folder(tmp_path: Path) -> None:
    out = _invoke(str(tmp_path / "nope"))
    assert out.exit_code == 1 and "not_a_directory" in out.output and "Traceback" not in out.output
    for level in ("1", "0", "-0.5"):
        bad = _invoke(str(tmp_path), "--interval-level", level)
        assert bad.exit_code == 2 and "--interval-level" in bad.output and "Traceback" not in bad.output, level
