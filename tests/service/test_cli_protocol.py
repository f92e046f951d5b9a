"""``nightbank protocol show | set`` against the live server, and the protocol options of ``score``."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd


def _night_file(tmp_path: Path) -> Path:
    """60-s epochs of zero counts with blocks of 100 counts at epochs 0-9, 100, 200-202 and 290-299: the
    count-threshold rule (threshold 40) calls exactly the blocks wake (a neighbour's weighted share of a
    block stays far below 40)."""
    from models import Night, night_to_json

    counts = np.zeros(300)
    for first, stop in ((0, 10), (100, 101), (200, 203), (290, 300)):
        counts[first:stop] = 100.0
    night = Night(participant_id="p", start=pd.Timestamp("2031-03-02T22:00:00+01:00"), epoch_seconds=60,
                  counts=counts)
    path = tmp_path / "p" / "night.json"
    path.parent.mkdir()
    path.write_text(json.dumps(night_to_json(night)))
    return path


def test_score_applies_the_protocol_options(tmp_path: Path) -> None:
    from typer.testing import CliRunner

    from service.cli import app

    path = _night_file(tmp_path)
    runner = CliRunner()
    plain = runner.invoke(app, ["score", str(path), "-m", "count-threshold", "--json"])
    assert plain.exit_code == 0, plain.output
    params = json.loads(plain.output)["parameters"]
    # AASM convention (from memory): wake bouts of 1, 3 and 10 epochs after onset are all awakenings and
    # WASO runs to lights-on: 14 min; SOL = the 10 min of wake at lights-off
    assert (params["sol_min"], params["awakenings"], params["waso_min"]) == (10.0, 3, 14.0)
    changed = runner.invoke(app, ["score", str(path), "-m", "count-threshold", "--waso-end", "final-awakening",
                                  "--min-awakening-epochs", "2", "--json"])
    out = json.loads(changed.output)
    # final-awakening end (Fekedulegn et al. 2020, from memory): the last bout is not an awakening; of the
    # bouts of 1 and 3 epochs only the 3-epoch one counts; WASO = 1 + 3 epochs = 4 min
    assert (out["parameters"]["awakenings"], out["parameters"]["waso_min"]) == (1, 4.0)
    assert out["protocol"]["waso_end"] == "final_awakening"
    bad = runner.invoke(app, ["score", str(path), "--waso-end", "noon"])
    assert bad.exit_code == 1 and "waso_end" in bad.output and "invalid_protocol" in bad.output
    table = runner.invoke(app, ["score", str(path), "--sol", "persistent-sleep"])
    assert table.exit_code == 0 and "SOL to persistent sleep" in " ".join(table.output.split())


def test_protocol_show_and_set_against_the_server(server, study, make_token) -> None:
    from typer.testing import CliRunner

    from service.cli import app

    runner = CliRunner()
    token = make_token("analyst", study_id=study)
    common = ["--study", study, "--server", server.url, "--token", token]
    shown = runner.invoke(app, ["protocol", "show", *common, "--json"])
    assert shown.exit_code == 0, shown.output
    assert json.loads(shown.output)["is_default"]
    set_ = runner.invoke(app, ["protocol", "set", *common, "--waso-end", "final-awakening", "--margin", "tst_min=20",
                               "--json"])
    assert set_.exit_code == 0, set_.output
    body = json.loads(set_.output)
    assert body["protocol"]["waso_end"] == "final_awakening"
    assert body["protocol"]["equivalence_margins"]["tst_min"] == 20
    again = runner.invoke(app, ["protocol", "set", *common, "--min-awakening-epochs", "3", "--json"])
    kept = json.loads(again.output)["protocol"]
    assert kept["waso_end"] == "final_awakening" and kept["min_awakening_epochs"] == 3  # options left out are kept
    bad = runner.invoke(app, ["protocol", "set", *common, "--margin", "tst_min"])
    assert bad.exit_code == 1 and "PARAMETER=NUMBER" in bad.output
    refused = runner.invoke(app, ["protocol", "set", *common, "--ci-level", "1.5"])
    assert refused.exit_code == 1 and "ci_level" in refused.output
    table = runner.invoke(app, ["protocol", "show", *common])
    assert table.exit_code == 0 and "min_awakening_epochs" in table.output
    ingest = make_token("ingest", study_id=study)
    denied = runner.invoke(app, ["protocol", "set", "--study", study, "--server", server.url, "--token", ingest,
                                 "--sol", "persistent-sleep"])
    assert denied.exit_code == 1 and "forbidden" in denied.output
