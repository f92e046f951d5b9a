"""Scoring with the classical rules through the API: same numbers as the models package, cached."""

from __future__ import annotations

import numpy as np
import pytest
from factories import night_json
from harness import bearer


def _store(http, headers, study, body, pid="p1") -> str:
    r = http.post(f"/v1/studies/{study}/participants/{pid}/nights", json=body, headers=headers)
    assert r.status_code == 201
    return r.json()["night_id"]


def _score(http, headers, study, night_id, pid="p1", **params):
    return http.get(f"/v1/studies/{study}/participants/{pid}/nights/{night_id}/scoring", params=params,
                    headers=headers)


@pytest.mark.parametrize("method", ["cole-kripke", "sadeh+webster", "count-threshold"])
def test_rule_scoring_matches_the_models_package(http, study, admin, method) -> None:
    from models import epoch_agreement, night_from_json, score_with_rule, sleep_parameters

    body = night_json(480, seed=2, lights_off="2031-03-02T22:51:00+01:00", lights_on="2031-03-03T02:11:00+01:00")
    night = night_from_json(body)
    night_id = _store(http, admin, study, body)
    out = _score(http, admin, study, night_id, method=method).json()
    expected = score_with_rule(night.counts, night.epoch_seconds, method)
    first, stop = night.in_bed
    assert out["method"] == method and out["model_version"] is None and out["p_sleep"] is None
    assert out["sleep"] == expected.sleep.tolist() and out["in_bed"] == [first, stop]
    params = sleep_parameters(expected.sleep, 30, lights_off_idx=first, lights_on_idx=stop).as_dict()
    for name, value in out["parameters"].items():
        assert value == pytest.approx(params[name], nan_ok=True) if value is not None else np.isnan(params[name])
    ref = night.reference_sleep()
    metrics = epoch_agreement(ref[first:stop], expected.sleep[first:stop], score=expected.score[first:stop])
    assert out["agreement"]["epochs"]["kappa"] == pytest.approx(metrics["kappa"])
    assert out["agreement"]["epochs"]["auc"] == pytest.approx(metrics["auc"])


def test_scoring_is_cached_and_records_its_method(http, server, study, admin, factory) -> None:
    from sqlalchemy import select

    from service.store import db

    night_id = _store(http, admin, study, night_json(240, seed=4))
    first = _score(http, admin, study, night_id, method="sadeh")
    server.app.state.cache_writer.flush()  # scorings are stored in the background
    second = _score(http, admin, study, night_id, method="sadeh")
    assert first.status_code == second.status_code == 200 and first.content == second.content
    with db.session_scope(factory) as session:
        rows = session.execute(select(db.Scoring.method, db.Scoring.model_version_pk, db.Scoring.night_hash)).all()
    assert len(rows) == 1 and rows[0][0] == "sadeh" and rows[0][1] is None


def test_unlabelled_night_has_no_agreement(http, study, admin) -> None:
    night_id = _store(http, admin, study, night_json(240, seed=5, reference=None))
    out = _score(http, admin, study, night_id, method="cole-kripke").json()
    assert out["agreement"] is None and len(out["sleep"]) == 240


def test_scoring_errors(http, study, admin, make_token) -> None:
    night_id = _store(http, admin, study, night_json(240, seed=6))
    r = _score(http, admin, study, night_id, method="magic")
    assert r.status_code == 400 and r.json()["code"] == "bad_request"
    assert _score(http, admin, study, night_id, method="sadeh", version=1).status_code == 400
    r = _score(http, admin, study, night_id, method="auto")
    assert r.status_code == 422 and r.json()["code"] == "no_model"
    assert _score(http, admin, study, night_id, method="personal").json()["code"] == "no_model"
    assert _score(http, admin, study, "ab" * 10, method="sadeh").status_code == 404
    ingest = bearer(make_token("ingest", study))
    assert _score(http, ingest, study, night_id, method="sadeh").status_code == 403


def test_epochs_without_counts_are_unscored_in_the_answer_and_the_night_page(http, study, admin) -> None:
    from models import night_from_json, night_to_csv

    night = night_from_json(night_json(480, seed=7))
    lines = night_to_csv(night).splitlines()
    header_at = next(i for i, line in enumerate(lines) if not line.startswith("#"))
    gap = range(200, 230)  # 30 epochs without a row: filled as missing on request
    kept = [line for i, line in enumerate(lines) if i - header_at - 1 not in gap]
    r = http.post(f"/v1/studies/{study}/participants/p1/nights", content="\n".join(kept) + "\n",
                  params={"fill_gaps": "true"}, headers={**admin, "content-type": "text/csv"})
    assert r.status_code == 201, r.text
    night_id = r.json()["night_id"]
    out = _score(http, admin, study, night_id, method="cole-kripke").json()
    calls = out["sleep"]
    assert [i for i, v in enumerate(calls) if v is None] == list(gap)
    # TST = sleep epochs x epoch length (AASM scoring manual definition); unscored epochs are not sleep
    first, stop = out["in_bed"]
    assert out["parameters"]["tst_min"] == pytest.approx(sum(v == 1 for v in calls[first:stop]) * 30 / 60)
    assert out["agreement"]["epochs"]["unscored_epochs"] >= len(gap)
    import httpx

    cookies = {"nightbank_ui": admin["Authorization"].removeprefix("Bearer ")}
    page = f"/ui/studies/{study}/participants/p1/nights/{night_id}"
    with httpx.Client(base_url=http.base_url, cookies=cookies) as browser:
        for path in (page, page + "/figure.svg"):
            assert browser.get(path).status_code == 200, path
