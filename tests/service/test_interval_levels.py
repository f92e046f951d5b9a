"""The study protocol's ``interval_level`` wherever per-night intervals are computed, over real HTTP on SQLite
and PostgreSQL with a tiny real training (:mod:`trained`): the training's held-out intervals, the deployed
scorings and the export (its ``interval_level`` column and override), and the command line's
``--interval-level`` of ``protocol set`` and ``export``."""

from __future__ import annotations

import io
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from backends import BACKENDS, World, live_world
from factories import make_night
from trained import post_cohort, train_here

pytestmark = pytest.mark.slow


@pytest.fixture(params=BACKENDS)
def world(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[World]:
    with live_world(request.param, tmp_path) as out:
        yield out


def _export(world: World, **params: object) -> pd.DataFrame:
    r = world.http.get("/v1/studies/s1/exports/parameters", params=params)
    assert r.status_code == 200, r.text
    return pd.read_csv(io.StringIO(r.text))


def test_training_scoring_and_export_use_the_protocols_interval_level(world: World, tmp_path: Path) -> None:
    from typer.testing import CliRunner

    from models import night_to_json
    from service.cli import app
    from service.store import db, versions
    from service.store.registry import find_study

    http = world.http
    post_cohort(http)
    runner = CliRunner()
    common = ["--study", "s1", "--server", world.url, "--token", http.headers["Authorization"].split()[1]]
    bad = runner.invoke(app, ["protocol", "set", *common, "--interval-level", "1.2"])
    assert bad.exit_code == 2 and "--interval-level" in bad.output and "(0, 1)" in bad.output
    set_ = runner.invoke(app, ["protocol", "set", *common, "--interval-level", "0.8", "--json"])
    assert set_.exit_code == 0, set_.output
    assert http.get("/v1/studies/s1/protocol").json()["protocol"]["interval_level"] == 0.8
    train_here(world)
    with db.session_scope(world.factory) as session:
        active = versions.active_version(session, study=find_study(session, "s1"), participant=None)
        assert active is not None
        held = versions.load_held_out(session, active)
    levels = {h.intervals.level for h in held if h.intervals is not None}
    assert levels == {0.8} and active.metadata.config["interval_level"] == 0.8  # the default would be 0.9
    # an unlabelled night after training: scored by the deployed model, at the protocol's level
    unlabelled = night_to_json(make_night(600, seed=40, start="2031-06-01T22:41:00+02:00", stages=False))
    night_id = http.post("/v1/studies/s1/participants/P-01/nights", json=unlabelled).json()["night_id"]
    scoring = http.get(f"/v1/studies/s1/participants/P-01/nights/{night_id}/scoring", params={"method": "pooled"})
    assert scoring.json()["interval_level"] == pytest.approx(0.8)

    export = _export(world)
    models = export[export["method"] == "pooled"]
    assert set(models["interval_level"]) == {0.8} and models["tst_min_low"].notna().all()
    by_hash = {h.night_hash: h for h in held if h.method == "pooled"}
    nights = {n["night_id"]: n["content_hash"] for n in http.get(
        "/v1/studies/s1/participants/P-02/nights").json()["data"]}
    row = models[(models["participant_id"] == "P-02")].iloc[0]
    stored = by_hash[nights[row["night_id"]]].intervals
    assert stored is not None
    assert [row["tst_min_low"], row["tst_min_high"]] == pytest.approx(stored.intervals["tst_min"])

    # another level: deployed rows at it; held-out intervals (computed at 0.8) are left out, not mislabelled
    other = _export(world, interval_level=0.5)
    pooled = other[other["method"] == "pooled"]
    is_held = pooled["held_out"].astype(str) == "True"
    deployed, held_out = pooled[~is_held], pooled[is_held]
    assert list(deployed["night_id"]) == [night_id] and set(deployed["interval_level"]) == {0.5}
    assert held_out["interval_level"].isna().all() and held_out["tst_min_low"].isna().all()
    # the same posterior paths (same seed): the 50% interval lies within the 80% one (nested quantiles)
    wide = models[models["night_id"] == night_id].iloc[0]
    narrow = deployed.iloc[0]
    assert wide["tst_min_low"] <= narrow["tst_min_low"] <= narrow["tst_min_high"] <= wide["tst_min_high"]
    assert np.isfinite(narrow["uncertainty_min"])
    # the protocol changed after training: held-out rows keep their intervals, saying at which level
    assert http.put("/v1/studies/s1/protocol", json={"interval_level": 0.7}).status_code == 200
    later = _export(world)
    later = later[later["method"] == "pooled"]
    later_held = later["held_out"].astype(str) == "True"
    assert set(later.loc[later_held, "interval_level"]) == {0.8} and later.loc[later_held, "tst_min_low"].notna().all()
    assert set(later.loc[~later_held, "interval_level"]) == {0.7}
    for value in ("1.5", "0", "x"):
        refused = http.get("/v1/studies/s1/exports/parameters", params={"interval_level": value})
        assert refused.status_code == 422 and "interval_level" in refused.text, value

    out = tmp_path / "parameters.csv"
    exported = runner.invoke(app, ["export", *common, "-o", str(out), "--interval-level", "0.5"])
    assert exported.exit_code == 0, exported.output
    cli = pd.read_csv(out)
    cli_deployed = (cli["method"] == "pooled") & (cli["held_out"].astype(str) == "False")
    assert set(cli.loc[cli_deployed, "interval_level"]) == {0.5}
    refused = runner.invoke(app, ["export", *common, "-o", str(out), "--interval-level", "1"])
    assert refused.exit_code == 2 and "--interval-level" in refused.output
