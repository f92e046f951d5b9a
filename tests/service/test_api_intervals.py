"""Per-night intervals of calibrated, decoded models over HTTP, on SQLite and PostgreSQL (real worker).

The one definition of a night's intervals is the stored model's own
(:meth:`models.SleepModel.intervals`, posterior paths' spread around the decoded night); every number the
service shows (scoring answer, export columns, pages, coverage) is checked against that definition
recomputed here from the stored model or the stored held-out predictions. Coverage is checked by
counting by hand the held-out nights whose reference value (``models.sleep_parameters`` of the
reference with its unscored epochs masked, as every comparison does) lies in its interval.
"""

from __future__ import annotations

import io
import json
import math
import re
import subprocess
import sys
from contextlib import ExitStack
from pathlib import Path
from types import SimpleNamespace

import httpx
import numpy as np
import pandas as pd
import pytest
from backends import BACKENDS
from harness import LiveServer, bearer, cohort_bodies, free_port, wait_for, worker_env

pytestmark = pytest.mark.slow
ROOT = Path(__file__).resolve().parents[2]
PARAMETERS = ("sol_min", "tst_min", "waso_min", "awakenings", "sleep_efficiency_pct")


@pytest.fixture(scope="module", params=BACKENDS)
def trained(request, tmp_path_factory):
    """Three participants of three labelled nights and one unlabelled night each; the pooled model and
    P-01's personal model trained by a real worker (calibrated and HMM-decoded by default)."""
    from service.config import Settings
    from service.jobs.workers import stop_worker_processes
    from service.store.db import make_engine, make_session_factory, session_scope
    from service.store.schema import upgrade
    from service.store.tokens import create_token

    with ExitStack() as stack:
        if request.param == "sqlite":
            url = f"sqlite:///{tmp_path_factory.mktemp('intervals') / 'nightbank.db'}"
        else:
            from pg_support import throwaway_database

            url = stack.enter_context(throwaway_database())
        settings = Settings(db=url, port=free_port(), lease_s=5, heartbeat_s=0.5, poll_s=0.2, n_trials=2)
        upgrade(settings)
        engine = make_engine(settings)
        stack.callback(engine.dispose)
        factory = make_session_factory(engine)
        with session_scope(factory, write=True) as session:
            token = create_token(session, role="admin")[1]
        bodies = cohort_bodies(n_participants=3, nights=4, labelled_share=0.0)
        worker = subprocess.Popen([sys.executable, "-m", "service.jobs.workers"], env=worker_env(settings), cwd=ROOT)
        stack.callback(stop_worker_processes, [worker])
        server = stack.enter_context(LiveServer(settings))
        http = stack.enter_context(httpx.Client(base_url=server.url, headers=bearer(token), timeout=120))
        assert http.post("/v1/studies", json={"study_id": "s", "name": "S"}).status_code == 201
        ids = {pid: [http.post(f"/v1/studies/s/participants/{pid}/nights", json=b).json()["night_id"]
                     for b in nights] for pid, nights in bodies.items()}
        for path in ("/v1/studies/s/pooled/training", "/v1/studies/s/participants/P-01/training"):
            job_id = http.post(path, json={"n_trials": 2}).json()["job_id"]
            job = wait_for(lambda j=job_id: (x := http.get(f"/v1/jobs/{j}").json())["state"] in
                           ("succeeded", "failed") and x, timeout_s=600)
            assert job["state"] == "succeeded", job["error"]
        yield SimpleNamespace(http=http, ids=ids, bodies=bodies, factory=factory, server=server, token=token)


def _scoring(world, pid: str, night_id: str, method: str) -> httpx.Response:
    return world.http.get(f"/v1/studies/s/participants/{pid}/nights/{night_id}/scoring", params={"method": method})


def _stored_model(world, pid: str | None):
    """The active model of ``pid`` (None: pooled) as stored, and its version record."""
    from service.store import versions
    from service.store.db import session_scope
    from service.store.registry import find_participant, find_study

    with session_scope(world.factory) as session:
        study = find_study(session, "s")
        owner = None if pid is None else find_participant(session, study, pid)
        version = versions.active_version(session, study=study, participant=owner)
        return versions.load_model(session, version), version


def _direct_intervals(world, pid: str, k: int, *, protocol=None):
    """P-01's personal model's NightIntervals of night ``k``, computed here from the stored model."""
    from models import DEFAULT_PROTOCOL, night_from_json
    from service.results.night_intervals import INTERVAL_PATHS, interval_seed, model_key

    protocol = protocol or DEFAULT_PROTOCOL
    model, version = _stored_model(world, pid)
    night = night_from_json(world.bodies[pid][k])
    # a personal model continued from the pooled one reads the participant's descriptors as stored with it
    descriptors = (version.metadata.descriptors.get(pid) or model.info_.get("descriptors")) if model.descriptor_names_ \
        else None
    if descriptors is not None:
        descriptors = {k: math.nan if v is None else v for k, v in descriptors.items()}
    p_sleep = model.predict_proba(night, descriptors=descriptors)
    found = model.intervals(p_sleep, night, level=protocol.interval_level, n_paths=INTERVAL_PATHS,
                            seed=interval_seed(world.ids[pid][k], model_key(version.kind, version.version,
                                                                       version.metadata.training_hashes)),
                            protocol=protocol)
    return found, model, p_sleep


def _same(got, expected) -> bool:
    if got is None:
        return expected is None or not math.isfinite(expected)
    return got == pytest.approx(expected, rel=1e-9, abs=1e-9)


def _drop_cached_scorings(world) -> None:
    from sqlalchemy import delete

    from service.store import db
    from service.store.db import session_scope

    world.server.app.state.cache_writer.flush()
    with session_scope(world.factory, write=True) as session:
        session.execute(delete(db.Scoring))


def test_model_scoring_carries_the_stored_models_own_intervals_reproducibly(trained) -> None:
    for k in (0, 3):  # a labelled night and the unlabelled one
        first = _scoring(trained, "P-01", trained.ids["P-01"][k], "personal")
        assert first.status_code == 200, first.text
        out = first.json()
        expected, model, p_sleep = _direct_intervals(trained, "P-01", k)
        assert expected is not None and model.decoding_ is not None
        assert out["interval_level"] == pytest.approx(0.9) and set(out["intervals"]) == set(PARAMETERS)
        for name in PARAMETERS:
            low, high = out["intervals"][name]
            assert _same(low, expected.intervals[name][0]) and _same(high, expected.intervals[name][1]), name
        assert _same(out["uncertainty_min"], expected.uncertainty_min) and out["uncertainty_min"] >= 0
        # the posterior P(sleep) of the HMM decoder, as the decoder computes it
        posterior = np.round(model.decoding_.decoder.marginals(p_sleep), 5)
        got = np.array([np.nan if v is None else v for v in out["p_sleep_posterior"]])
        scored = ~np.isnan(p_sleep)
        np.testing.assert_allclose(got[scored], posterior[scored], atol=1e-12)
        # computed again from scratch (the stored body dropped), the same bytes
        _drop_cached_scorings(trained)
        again = _scoring(trained, "P-01", trained.ids["P-01"][k], "personal")
        assert again.content == first.content


def test_rules_and_models_without_decoding_answer_null(trained) -> None:
    from models import model_from_bytes, night_from_json
    from service.results.scoring import compute_scoring
    from service.store import db
    from service.store.db import session_scope

    out = _scoring(trained, "P-02", trained.ids["P-02"][0], "sadeh").json()
    assert out["intervals"] is None and out["interval_level"] is None and out["uncertainty_min"] is None
    assert out["p_sleep_posterior"] is None
    # a model stored before decoding existed: its artifact has no "decoding" entry
    _, version = _stored_model(trained, "P-01")
    with session_scope(trained.factory) as session:
        row = session.get(db.ModelVersion, version.pk)
        booster, meta = row.booster, row.model_meta
    meta_doc = dict(meta)  # the artifact's metadata (a JSON column)
    assert meta_doc["decoding"] is not None
    del meta_doc["decoding"]
    old = model_from_bytes(booster, meta_doc)
    assert old.decoding_ is None
    body = compute_scoring(night_from_json(trained.bodies["P-01"][3]), method="personal", model=old, version=1)
    assert body["intervals"] is None and body["uncertainty_min"] is None and body["p_sleep_posterior"] is None
    assert body["p_sleep"] is not None


def test_interval_level_follows_the_study_protocol(trained) -> None:
    from models import StudyProtocol

    put = trained.http.put("/v1/studies/s/protocol", json={"interval_level": 0.5})
    assert put.status_code == 200, put.text
    try:
        out = _scoring(trained, "P-01", trained.ids["P-01"][1], "personal").json()
        expected, _, _ = _direct_intervals(trained, "P-01", 1, protocol=StudyProtocol(interval_level=0.5))
        assert out["interval_level"] == pytest.approx(0.5) and expected.level == pytest.approx(0.5)
        for name in PARAMETERS:
            assert _same(out["intervals"][name][0], expected.intervals[name][0]), name
            assert _same(out["intervals"][name][1], expected.intervals[name][1]), name
        bad = trained.http.put("/v1/studies/s/protocol", json={"interval_level": 1.5})
        assert bad.status_code == 422 and "interval_level" in bad.text
    finally:
        assert trained.http.put("/v1/studies/s/protocol", json={}).status_code == 200


def _held_out(world, pid: str, night_hash: str) -> dict:
    """The stored held-out predictions of a night, by method (active pooled and personal versions)."""
    from service.store import versions
    from service.store.db import session_scope
    from service.store.registry import find_participant, find_study

    with session_scope(world.factory) as session:
        study = find_study(session, "s")
        owners = [None, find_participant(session, study, pid)]
        return {h.method: h for owner in owners if (v := versions.active_version(session, study=study,
                                                                                participant=owner))
                for h in versions.load_held_out(session, v) if h.night_hash == night_hash}


def test_export_interval_columns_parse_back_with_pandas(trained) -> None:
    from models import night_from_json

    csv = trained.http.get("/v1/studies/s/exports/parameters", params={"format": "csv"})
    assert csv.status_code == 200
    frame = pd.read_csv(io.StringIO(csv.text), dtype={"night_id": str, "participant_id": str})
    columns = [f"{p}_{end}" for p in PARAMETERS for end in ("low", "high")] + ["uncertainty_min"]
    assert set(columns) <= set(frame.columns)
    rows = frame.set_index(["participant_id", "night_id", "method"])
    # unlabelled night: the deployed model's scoring body
    night_id = trained.ids["P-01"][3]
    body = _scoring(trained, "P-01", night_id, "personal").json()
    row = rows.loc[("P-01", night_id, "personal")]
    for name in PARAMETERS:
        for end, value in zip(("low", "high"), body["intervals"][name], strict=True):
            assert (pd.isna(row[f"{name}_{end}"]) if value is None
                    else row[f"{name}_{end}"] == pytest.approx(value)), (name, end)
    assert row["uncertainty_min"] == pytest.approx(body["uncertainty_min"])
    # labelled night: the held-out prediction's own intervals
    night = night_from_json(trained.bodies["P-01"][0])
    held = _held_out(trained, "P-01", night.content_hash)
    assert {"personal", "pooled", "pooled+offset"} <= set(held)
    for method, h in held.items():
        assert h.intervals is not None, method
        row = rows.loc[("P-01", trained.ids["P-01"][0], method)]
        assert row["uncertainty_min"] == pytest.approx(h.intervals.uncertainty_min), method
        for name in PARAMETERS:
            low, high = h.intervals.intervals[name]
            assert (pd.isna(row[f"{name}_low"]) if not np.isfinite(low) else row[f"{name}_low"] == pytest.approx(low))
            assert (pd.isna(row[f"{name}_high"]) if not np.isfinite(high)
                    else row[f"{name}_high"] == pytest.approx(high))
    # the reference and the rules have no intervals
    assert frame.loc[frame["method"].isin(["reference", "sadeh", "cole-kripke"]), columns].isna().all().all()
    parquet = pd.read_parquet(io.BytesIO(trained.http.get("/v1/studies/s/exports/parameters",
                                                          params={"format": "parquet"}).content))
    assert str(parquet["awakenings_low"].dtype) == "Int64" and str(parquet["tst_min_high"].dtype) == "float64"
    assert parquet.shape == frame.shape


def test_study_uncertainty_reads_every_nights_review_score(trained) -> None:
    from service.results.bulk_scoring import study_uncertainty

    found = study_uncertainty(trained.factory, study_id="s", method="personal")
    assert len(found) == 12
    for row in found:
        if row["participant_id"] != "P-01":
            assert row["method"] is None and row["uncertainty_min"] is None  # no personal model
            continue
        body = _scoring(trained, "P-01", row["night_id"], "personal").json()
        assert row["uncertainty_min"] == pytest.approx(body["uncertainty_min"]) and row["model_version"] == 1


def _page(world, path: str) -> str:
    cookies = {"nightbank_ui": world.token}
    with httpx.Client(base_url=world.http.base_url, cookies=cookies, timeout=120) as browser:
        r = browser.get(path)
        assert r.status_code == 200, (path, r.text[:500])
        return r.text


def test_night_page_draws_the_intervals_and_the_posterior(trained) -> None:
    night_id = trained.ids["P-01"][0]
    base = f"/ui/studies/s/participants/P-01/nights/{night_id}"
    html = _page(trained, base + "?method=personal")
    body = _scoring(trained, "P-01", night_id, "personal").json()
    table = html[html.index('id="interval-table"'):]
    table = table[:table.index("</table>")]
    for name in PARAMETERS:
        match = re.search(rf'data-parameter="{name}" data-low="([^"]*)" data-high="([^"]*)"', table)
        assert match is not None, name
        low, high = body["intervals"][name]
        assert match.group(1) == str(low) and match.group(2) == str(high), name
        assert table.count("<svg class=\"whisker\"") == len(PARAMETERS)
    # beside the values of the parameter table too, for every model shown
    assert html.count('<span class="interval"') >= len(PARAMETERS)
    svg = httpx.get(trained.http.base_url.join(base + "/figure.svg"), params={"method": "personal"},
                    cookies={"nightbank_ui": trained.token}, timeout=120).text
    assert "posterior P(sleep)" in svg
    assert "not for diagnosis" in html.lower() or "not a medical device" in html.lower()


def test_participant_page_and_model_card_show_the_calibration(trained) -> None:
    model, version = _stored_model(trained, "P-01")
    calibration = model.decoding_.info["calibration"]
    html = _page(trained, "/ui/studies/s/participants/P-01")
    table = html[html.index('id="calibration-table"'):]
    table = table[:table.index("</table>")]
    assert f'{calibration["brier_raw"]:.4f}' in table and f'{calibration["brier_calibrated"]:.4f}' in table
    assert 'id="reliability-figure"' in html
    figure = _page(trained, "/ui/studies/s/participants/P-01/figures/reliability.svg")
    assert figure.lstrip().startswith("<?xml") and "predicted P(sleep)" in figure
    card = json.loads(_page(trained, f"/ui/studies/s/participants/P-01/models/{version.version}/card.json"))
    assert card["calibration"]["brier_raw"] == pytest.approx(calibration["brier_raw"])
    assert card["calibration"]["reliability"]["observed"] == pytest.approx(
        calibration["reliability"]["observed"], nan_ok=True)
    markdown = _page(trained, f"/ui/studies/s/participants/P-01/models/{version.version}/card.md")
    assert "## Calibration" in markdown and f'{calibration["brier_calibrated"]:.3f}' in markdown


def test_comparison_reports_interval_coverage_counted_by_hand(trained) -> None:
    from models import night_from_json, sleep_parameters

    out = trained.http.get("/v1/studies/s/comparison").json()
    coverage = {(r["method"], r["parameter"]): r for r in out["interval_coverage"]}
    assert {("personal", "tst_min"), ("pooled", "tst_min"), ("pooled+offset", "waso_min")} <= set(coverage)
    for method in ("personal", "pooled", "pooled+offset"):
        for name in PARAMETERS:
            inside = []
            for pid, nights in trained.bodies.items():
                for body in nights[:3]:
                    night = night_from_json(body)
                    h = _held_out(trained, pid, night.content_hash).get(method)
                    if h is None or h.intervals is None:
                        continue
                    reference = night.reference_sleep()
                    masked = np.where(np.isnan(reference) | night.missing, np.nan, reference)
                    truth = getattr(sleep_parameters(masked, night.epoch_seconds, lights_off_idx=night.in_bed[0],
                                                     lights_on_idx=night.in_bed[1]), name)
                    low, high = h.intervals.intervals[name]
                    if np.isfinite([low, high, truth]).all():
                        inside.append(low <= truth <= high)
            row = coverage[(method, name)]
            assert row["level"] == pytest.approx(0.9) and row["n_nights"] == len(inside), (method, name)
            assert row["coverage"] == pytest.approx(sum(inside) / len(inside)), (method, name)
    html = _page(trained, "/ui/studies/s")
    assert 'id="interval-coverage"' in html
    report_html = _page(trained, "/ui/studies/s/report")
    section = report_html[report_html.index('id="interval-coverage"'):]
    assert 'data-method="personal" data-parameter="tst_min"' in section[:section.index("</table>")]
