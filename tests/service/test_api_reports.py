"""Comparisons and exports on a trained study (pooled model and one personal model, real worker)."""

from __future__ import annotations

import io
import json
import subprocess
import sys
from pathlib import Path

import httpx
import numpy as np
import pandas as pd
import pytest
from agreement_formulas import ba2007_limits
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
            yield http, ids, bodies, settings
    finally:
        stop_worker_processes([worker])


def test_participant_comparison_shows_held_out_models_rules_and_the_choice(trained) -> None:
    http, ids, _, _ = trained
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

    http, ids, bodies, _ = trained
    out = http.get("/v1/studies/s/participants/P-02/comparison").json()
    night = night_from_json(bodies["P-02"][0])
    row = next(r for r in out["nights"] if r["night_id"] == night.content_hash[:20] and r["method"] == "sadeh")
    first, stop = night.in_bed
    rule = score_with_rule(night.counts, 30, "sadeh")
    expected = epoch_agreement(night.reference_sleep()[first:stop], rule.sleep[first:stop],
                               score=rule.score[first:stop])
    assert row["kappa"] == pytest.approx(expected["kappa"]) and row["auc"] == pytest.approx(expected["auc"])


def test_study_bland_altman_bias_is_the_mean_difference(trained) -> None:
    http, _, _, _ = trained
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

    http, ids, _, _ = trained
    csv = http.get("/v1/studies/s/exports/parameters", params={"format": "csv"})
    assert csv.status_code == 200 and csv.headers["content-type"].startswith("text/csv")
    frame = pd.read_csv(io.StringIO(csv.text), dtype={"night_id": str, "participant_id": str})
    per_night = frame.groupby(["participant_id", "night_id"])["method"].apply(set)
    models_ = {"pooled", "pooled+offset"}
    for (pid, night_id), methods in per_night.items():
        labelled = night_id in ids[pid][:3]
        expected = set(METHOD_IDS) | models_ | {"auto"} | ({"personal"} if pid == "P-01" else set()) | (
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


def _held_out_parameters(settings, pid: str, night) -> dict[str, dict]:
    """Sleep parameters of the stored held-out predictions of ``night`` (per method), computed here from
    the calls with the reference's unscored epochs and the epochs without counts left out on both sides."""
    from models import sleep_parameters
    from service.store import versions
    from service.store.db import make_engine, make_session_factory, session_scope
    from service.store.registry import find_participant, find_study

    engine = make_engine(settings)
    try:
        with session_scope(make_session_factory(engine)) as session:
            study = find_study(session, "s")
            owners = [None, find_participant(session, study, pid)]
            found = [h for owner in owners if (v := versions.active_version(session, study=study, participant=owner))
                     for h in versions.load_held_out(session, v) if h.night_hash == night.content_hash]
    finally:
        engine.dispose()
    first, stop = night.in_bed
    reference = night.reference_sleep()
    masked = np.isnan(reference) | night.missing
    out = {}
    for h in found:
        calls = np.where(masked | np.isnan(h.sleep), np.nan, h.sleep)
        out[h.method] = sleep_parameters(calls, night.epoch_seconds, lights_off_idx=first,
                                         lights_on_idx=stop).as_dict()
    return out


def test_export_rows_of_labelled_nights_are_the_held_out_predictions(trained) -> None:
    from models import PARAMETER_NAMES, night_from_json

    http, ids, bodies, settings = trained
    frame = pd.read_parquet(io.BytesIO(http.get("/v1/studies/s/exports/parameters",
                                                params={"format": "parquet"}).content))
    for pid, k in (("P-01", 0), ("P-02", 1)):
        night = night_from_json(bodies[pid][k])
        expected = _held_out_parameters(settings, pid, night)
        assert {"pooled", "pooled+offset"} <= set(expected) and ("personal" in expected) == (pid == "P-01")
        rows = frame[(frame["participant_id"] == pid) & (frame["night_id"] == ids[pid][k])].set_index("method")
        for method, params in expected.items():
            row = rows.loc[method]
            assert bool(row["held_out"]) and row["model_version"] == 1, method
            for name in PARAMETER_NAMES:
                if params[name] is None or (isinstance(params[name], float) and np.isnan(params[name])):
                    assert pd.isna(row[name]), (method, name)
                else:
                    assert row[name] == pytest.approx(params[name]), (method, name)
        # auto on a labelled night is a held-out prediction of one of the models, chosen without the night
        auto = rows.loc["auto"]
        assert bool(auto["held_out"]) and auto["scored_as"] in expected
        assert auto["tst_min"] == pytest.approx(expected[auto["scored_as"]]["tst_min"])
        # reference and methods are masked alike: the same unscored epochs on every side
        assert rows["unscored_epochs"].nunique() == 1
    unlabelled = frame[(frame["night_id"] == ids["P-03"][3])].set_index("method")
    assert not unlabelled.loc["pooled", "held_out"] and pd.isna(unlabelled.loc["sadeh", "held_out"])
    deployed = http.get(f"/v1/studies/s/participants/P-03/nights/{ids['P-03'][3]}/scoring",
                        params={"method": "auto"}).json()
    assert unlabelled.loc["auto", "scored_as"] == deployed["method"]
    assert unlabelled.loc["auto", "tst_min"] == pytest.approx(deployed["parameters"]["tst_min"])


def test_export_columns_are_typed_and_state_the_protocol(trained) -> None:
    from models import DEFAULT_PROTOCOL

    http, ids, _, _ = trained
    frame = pd.read_parquet(io.BytesIO(http.get("/v1/studies/s/exports/parameters",
                                                params={"format": "parquet"}).content))
    for column in ("start", "lights_off", "lights_on"):  # timestamps as timestamps, in UTC
        assert isinstance(frame[column].dtype, pd.DatetimeTZDtype) and str(frame[column].dt.tz) == "UTC"
    assert str(frame["unscored_epochs"].dtype) == "Int64" and str(frame["awakenings"].dtype) == "Int64"
    assert str(frame["held_out"].dtype) == "boolean" and set(frame["epoch_seconds"]) == {30}
    assert (frame["lights_on"] > frame["lights_off"]).all()
    assert {json.dumps(DEFAULT_PROTOCOL.to_dict(), sort_keys=True, separators=(",", ":"))} == set(frame["protocol"])


def test_csv_export_neutralises_cells_a_spreadsheet_would_run(trained) -> None:
    from factories import night_json

    http, _, _, _ = trained
    assert http.post("/v1/studies", json={"study_id": "formulas", "name": "F"}).status_code == 201
    labels = ["=HYPERLINK(\"http://x\")", "+1", "-2", "@SUM(A1)", "\tx", "plain"]
    for k, label in enumerate(labels):
        body = night_json(120, seed=k) | {"reference": None, "label": label,
                                          "start": f"2031-03-{k + 2:02d}T22:41:00+01:00"}
        assert http.post("/v1/studies/formulas/participants/p/nights", json=body).status_code == 201
    csv = http.get("/v1/studies/formulas/exports/parameters", params={"format": "csv"}).text
    frame = pd.read_csv(io.StringIO(csv), keep_default_na=False)
    # OWASP "CSV Injection": a cell starting with = + - @ tab or CR is prefixed with an apostrophe
    assert set(frame["label"]) == {"'" + v for v in labels[:-1]} | {"plain"}
    assert (frame["held_out"] == "").all()  # rules only: no model, not applicable
    parquet = pd.read_parquet(io.BytesIO(http.get("/v1/studies/formulas/exports/parameters",
                                                  params={"format": "parquet"}).content))
    assert set(parquet["label"]) == set(labels)  # typed data keep the text as sent


def test_study_comparison_has_repeated_measures_bland_altman_icc_and_equivalence(trained) -> None:
    from statsmodels.stats.weightstats import ttost_paired

    http, _, _, _ = trained
    out = http.get("/v1/studies/s/comparison").json()
    params = pd.DataFrame(out["parameters"])
    ref = params[params["method"] == "reference"].set_index(["participant_id", "night_id"])
    own = params[params["method"] == "cole-kripke"].set_index(["participant_id", "night_id"]).reindex(ref.index)
    d = (own["tst_min"] - ref["tst_min"]).to_numpy()
    pids = ref.index.get_level_values(0).to_numpy()
    row = next(r for r in out["repeated_bland_altman"] if r["method"] == "cole-kripke" and r["parameter"] == "tst_min")
    assert {"method", "parameter", "n_participants", "n_nights", "bias", "bias_ci", "loa_lower", "loa_upper",
            "loa_lower_ci", "loa_upper_ci", "proportional_bias", "protocol"} <= set(row)
    bias, low, high = ba2007_limits(d, pids)
    assert (row["n_participants"], row["n_nights"]) == (3, 9)
    assert row["bias"] == pytest.approx(bias) and row["loa_lower"] == pytest.approx(low)
    assert row["loa_upper"] == pytest.approx(high)
    assert row["bias_ci"][0] <= row["bias"] <= row["bias_ci"][1] and row["protocol"] == out["protocol"]
    # ICC(A,1), McGraw & Wong 1996 (case A, single measure), from the two-way ANOVA of (method, reference)
    x = np.column_stack([own["tst_min"].to_numpy(), ref["tst_min"].to_numpy()])
    n, k = x.shape
    msr = k * ((x.mean(axis=1) - x.mean()) ** 2).sum() / (n - 1)
    msc = n * ((x.mean(axis=0) - x.mean()) ** 2).sum() / (k - 1)
    mse = ((x - x.mean(axis=1, keepdims=True) - x.mean(axis=0) + x.mean()) ** 2).sum() / ((n - 1) * (k - 1))
    icc = next(r for r in out["icc"] if r["method"] == "cole-kripke" and r["parameter"] == "tst_min")
    assert icc["icc"] == pytest.approx((msr - mse) / (msr + (k - 1) * mse + k * (msc - mse) / n))
    # TOST on participant means against the protocol's margin (statsmodels ttost_paired, Schuirmann 1987)
    means = pd.DataFrame({"m": own["tst_min"].to_numpy(), "r": ref["tst_min"].to_numpy(), "p": pids})
    means = means.groupby("p").mean()
    margin = out["protocol"]["equivalence_margins"]["tst_min"]
    p_value = ttost_paired(means["m"].to_numpy(), means["r"].to_numpy(), -margin, margin)[0]
    tost = next(r for r in out["equivalence"] if r["method"] == "cole-kripke" and r["parameter"] == "tst_min")
    assert tost["p_value"] == pytest.approx(p_value) and tost["n_participants"] == 3


def test_comparisons_give_auto_its_own_figures_participant_epochs_and_the_flow(trained) -> None:
    http, _, _, _ = trained
    out = http.get("/v1/studies/s/comparison").json()
    summary = {s["method"]: s for s in out["summary"]}
    assert summary["auto"]["n_nights"] == 9  # every labelled night has a nested auto prediction
    group = pd.DataFrame(out["participant_epochs"]["group"])
    per = pd.DataFrame(out["participant_epochs"]["participants"])
    sadeh = group[(group["method"] == "sadeh") & (group["metric"] == "balanced_accuracy")].iloc[0]
    values = per[per["method"] == "sadeh"]["balanced_accuracy"]
    assert sadeh["n_participants"] == 3 and sadeh["mean"] == pytest.approx(values.mean())  # mean of participants
    assert sadeh["ci_low"] <= sadeh["mean"] <= sadeh["ci_high"]
    kinds = {(r["label_a"], r["label_b"], r["metric"]) for r in out["paired_differences"]}
    assert ("personal", "pooled", "balanced_accuracy") in kinds
    assert any(a == "auto" and b.removesuffix(":calibrated") in ("cole-kripke", "sadeh", "count-threshold")
               for a, b, _ in kinds)
    personal = next(r for r in out["paired_differences"] if r["label_a"] == "personal" and r["label_b"] == "pooled")
    assert personal["n_participants"] == 1  # only P-01 has a personal model
    flow = {f["participant_id"]: f for f in out["flow"]}
    assert flow["P-01"]["n_nights"] == 4 and flow["P-01"]["n_labelled_nights"] == 3
    assert flow["P-02"]["labelled_nights_without_held_out"]["personal"] == 3
    assert flow["P-01"]["epochs_compared"] + flow["P-01"]["epochs_left_out"] == flow["P-01"]["in_bed_epochs"]
    mine = http.get("/v1/studies/s/participants/P-01/comparison").json()
    assert mine["protocol"] == out["protocol"] and [f["participant_id"] for f in mine["flow"]] == ["P-01"]
    assert {r["method"] for r in mine["repeated_bland_altman"]} >= {"personal", "auto", "sadeh"}


def test_a_new_protocol_recomputes_the_comparison_and_keeps_the_models(trained) -> None:
    http, _, _, _ = trained
    before = http.get("/v1/studies/s/comparison").json()
    models_before = http.get("/v1/studies/s/pooled/models").json()
    assert http.put("/v1/studies/s/protocol", json={"min_awakening_epochs": 4}).status_code == 200
    try:
        after = http.get("/v1/studies/s/comparison").json()
        assert after["protocol"]["min_awakening_epochs"] == 4 and before["protocol"]["min_awakening_epochs"] == 1

        def awakenings(out):
            rows = pd.DataFrame(out["parameters"])
            return rows[rows["method"] == "reference"].set_index(["participant_id", "night_id"])["awakenings"]

        # fewer wake bouts reach 4 epochs than 1 epoch (common practice: a longer minimum counts fewer awakenings)
        assert (awakenings(after) <= awakenings(before)).all() and (awakenings(after) < awakenings(before)).any()
        assert http.get("/v1/studies/s/pooled/models").json() == models_before
    finally:
        assert http.put("/v1/studies/s/protocol", json={}).status_code == 200


def test_auto_never_chooses_a_model_below_the_study_floor(trained) -> None:
    http, ids, _, _ = trained
    url = f"/v1/studies/s/participants/P-02/nights/{ids['P-02'][3]}/scoring"
    before = http.get(url, params={"method": "auto"}).json()
    assert before["method"] in ("pooled", "pooled+offset") and "auto" not in before
    bad = http.put("/v1/studies/s/protocol", json={"model_floor": 1.5, "min_awakening_epochs": 0})
    assert bad.status_code == 422 and {p["location"]["field"] for p in bad.json()["problems"]} == {
        "model_floor", "min_awakening_epochs"}
    assert http.put("/v1/studies/s/protocol", json={"model_floor": 0.999}).status_code == 200
    try:
        assert http.get("/v1/studies/s/protocol").json()["model_floor"] == 0.999
        after = http.get(url, params={"method": "auto"}).json()
        # every model's held-out balanced accuracy is below 0.999: auto scores with the classical default rule
        assert after["method"] == "cole-kripke" and after["model_version"] is None
        assert "below the study's floor" in after["auto"]["passed_over"]["pooled+offset"]
        direct = http.get(url, params={"method": "pooled+offset"}).json()
        assert direct["method"] == "pooled+offset"  # asked for by name, a flagged model still scores
    finally:
        assert http.put("/v1/studies/s/protocol", json={}).status_code == 200
    assert http.get(url, params={"method": "auto"}).json()["method"] == before["method"]
