"""Comparisons and exports on a trained study (pooled model and one personal model, real worker)."""

from __future__ import annotations

import io
import subprocess
import sys
from pathlib import Path

import httpx
import numpy as np
import pandas as pd
import pytest
from harness import LiveServer, bearer, cohort_bodies, free_port, wait_for, worker_env

pytestmark = pytest.mark.slow
ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    """A study with three participants of three labelled nights and one unlabelled night each; pooled
    model and P-01's personal model trained."""
    from service.config import Settings
    from service.jobs.workers import stop_worker_processes
    from service.store.db import make_engine, make_session_factory, session_scope
    from service.store.schema import upgrade
    from service.store.tokens import create_token

    path = tmp_path_factory.mktemp("reports") / "nightbank.db"
    settings = Settings(db=f"sqlite:///{path}", port=free_port(), lease_s=5, heartbeat_s=0.5, poll_s=0.2, n_trials=2)
    upgrade(settings)
    engine = make_engine(settings)
    with session_scope(make_session_factory(engine), write=True) as session:
        token = create_token(session, role="admin")[1]
    engine.dispose()
    bodies = cohort_bodies(n_participants=3, nights=4, labelled_share=0.0)
    worker = subprocess.Popen([sys.executable, "-m", "service.jobs.workers"], env=worker_env(settings), cwd=ROOT)
    try:
        with LiveServer(settings), httpx.Client(base_url=f"http://127.0.0.1:{settings.port}",
                                                headers=bearer(token), timeout=120) as http:
            assert http.post("/v1/studies", json={"study_id": "s", "name": "S"}).status_code == 201
            ids = {pid: [http.post(f"/v1/studies/s/participants/{pid}/nights", json=b).json()["night_id"]
                         for b in nights] for pid, nights in bodies.items()}
            for url in ("/v1/studies/s/pooled/training", "/v1/studies/s/participants/P-01/training"):
                job_id = http.post(url, json={"n_trials": 2}).json()["job_id"]
                job = wait_for(lambda j=job_id: (x := http.get(f"/v1/jobs/{j}").json())["state"] in
                               ("succeeded", "failed") and x)
                assert job["state"] == "succeeded", job["error"]
            yield http, ids, bodies
    finally:
        stop_worker_processes([worker])


def test_participant_comparison_shows_held_out_models_rules_and_the_choice(trained) -> None:
    http, ids, _ = trained
    out = http.get("/v1/studies/s/participants/P-01/comparison").json()
    assert out["chosen_method"] in ("personal", "pooled", "pooled+offset") and out["choice_reason"]
    assert out["n_labelled_nights"] == 3 and out["model_versions"] == {"pooled": 1, "personal:P-01": 1}
    summary = {m["method"]: m for m in out["summary"]}
    assert {"personal", "pooled", "pooled+offset", "cole-kripke", "sadeh", "count-threshold",
            "always-sleep"} <= set(summary)
    assert all(m["n_nights"] == 3 for m in summary.values())
    # the same held-out predictions give the figures stored with the version
    version = http.get("/v1/studies/s/participants/P-01/models").json()[0]
    assert summary["personal"]["balanced_accuracy"]["mean"] == pytest.approx(
        version["metrics"]["balanced_accuracy"]["mean"])
    assert http.get("/v1/studies/s/participants/P-02/comparison").json()["chosen_method"] is None


def test_rule_rows_of_the_comparison_match_the_models_package(trained) -> None:
    from models import epoch_agreement, night_from_json, score_with_rule

    http, ids, bodies = trained
    out = http.get("/v1/studies/s/participants/P-02/comparison").json()
    night = night_from_json(bodies["P-02"][0])
    row = next(r for r in out["nights"] if r["night_id"] == night.content_hash[:20] and r["method"] == "sadeh")
    first, stop = night.in_bed
    rule = score_with_rule(night.counts, 30, "sadeh")
    expected = epoch_agreement(night.reference_sleep()[first:stop], rule.sleep[first:stop],
                               score=rule.score[first:stop])
    assert row["kappa"] == pytest.approx(expected["kappa"]) and row["auc"] == pytest.approx(expected["auc"])


def test_study_bland_altman_bias_is_the_mean_difference(trained) -> None:
    http, _, _ = trained
    out = http.get("/v1/studies/s/comparison").json()
    params = pd.DataFrame(out["parameters"])
    ref = params[params["method"] == "reference"].set_index(["participant_id", "night_id"])
    for method in ("pooled+offset", "cole-kripke"):
        row = next(r for r in out["bland_altman"] if r["method"] == method and r["parameter"] == "tst_min")
        own = params[params["method"] == method].set_index(["participant_id", "night_id"]).reindex(ref.index)
        diff = (own["tst_min"] - ref["tst_min"]).dropna().to_numpy()
        # Bland & Altman 1986: bias = mean difference, limits = bias -/+ 1.96 SD (ddof=1)
        assert row["n"] == diff.size and row["bias"] == pytest.approx(diff.mean())
        assert row["loa_upper"] == pytest.approx(diff.mean() + 1.96 * diff.std(ddof=1))
    assert {p["participant_id"] for p in out["participants"]} == {"P-01", "P-02", "P-03"}
    pooled_epochs = {r["method"]: r for r in out["pooled_epochs"]}
    assert pooled_epochs["cole-kripke"]["n_nights"] == 9 and pooled_epochs["personal"]["n_nights"] == 3


def test_parameter_export_has_one_row_per_night_and_method(trained) -> None:
    from models import METHOD_IDS

    http, ids, _ = trained
    csv = http.get("/v1/studies/s/exports/parameters", params={"format": "csv"})
    assert csv.status_code == 200 and csv.headers["content-type"].startswith("text/csv")
    frame = pd.read_csv(io.StringIO(csv.text), dtype={"night_id": str, "participant_id": str})
    per_night = frame.groupby(["participant_id", "night_id"])["method"].apply(set)
    models_ = {"pooled", "pooled+offset"}
    for (pid, night_id), methods in per_night.items():
        labelled = night_id in ids[pid][:3]
        expected = set(METHOD_IDS) | models_ | ({"personal"} if pid == "P-01" else set()) | (
            {"reference"} if labelled else set())
        assert methods == expected, (pid, night_id)
    assert len(per_night) == 12
    night = ids["P-03"][3]
    scored = http.get(f"/v1/studies/s/participants/P-03/nights/{night}/scoring", params={"method": "sadeh"}).json()
    row = frame[(frame["night_id"] == night) & (frame["method"] == "sadeh")].iloc[0]
    assert row["tst_min"] == pytest.approx(scored["parameters"]["tst_min"])
    parquet = http.get("/v1/studies/s/exports/parameters", params={"format": "parquet"})
    assert pd.read_parquet(io.BytesIO(parquet.content)).shape == frame.shape
    assert http.get("/v1/studies/s/exports/parameters", params={"format": "xlsx"}).status_code == 422
    pooled = frame[frame["method"] == "pooled"]
    assert (pooled["model_version"] == 1).all() and np.isfinite(pooled["tst_min"]).all()
