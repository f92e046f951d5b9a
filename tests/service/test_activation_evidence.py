"""A version's activation is a selection on held-out nights: the evidence stored with it, over HTTP."""

from __future__ import annotations

import httpx
import numpy as np
import pytest
from harness import cohort_bodies, wait_for

pytestmark = pytest.mark.slow


def _train(http, headers, study: str, pid: str, **body) -> dict:
    job_id = http.post(f"/v1/studies/{study}/participants/{pid}/training", json=body, headers=headers).json()["job_id"]

    def finished():
        job = http.get(f"/v1/jobs/{job_id}", headers=headers).json()
        return job if job["state"] in ("succeeded", "failed", "cancelled") else None
    job = wait_for(finished)
    assert job["state"] == "succeeded", job["error"]
    return job


def _held_out_accuracy(factory, study_id: str, version: int) -> dict[str, float]:
    """Balanced accuracy per held-out night of a stored version, from its stored predictions.

    Outside reference: scikit-learn's ``balanced_accuracy_score`` over the in-bed epochs that have
    both a reference stage and a call.
    """
    from sklearn.metrics import balanced_accuracy_score

    from service.store import db, registry, versions

    with db.session_scope(factory) as session:
        study = registry.find_study(session, study_id)
        participant = registry.find_participant(session, study, "P-01")
        info = versions.get_version(session, study=study, participant=participant, version=version)
        held = versions.load_held_out(session, info)
    out = {}
    for h in held:
        bed = slice(*h.in_bed)
        ref, calls = h.reference[bed], h.sleep[bed]
        ok = np.isfinite(ref) & np.isfinite(calls)
        out[h.night_hash] = float(balanced_accuracy_score(ref[ok].astype(int), calls[ok].astype(int)))
    return out


def test_second_version_records_the_paired_comparison_and_its_fresh_nights(http, study, admin, start_worker,
                                                                           factory) -> None:
    bodies = cohort_bodies(n_participants=1, nights=4)["P-01"]
    base = f"/v1/studies/{study}/participants/P-01"
    for body in bodies[:3]:
        assert http.post(f"{base}/nights", json=body, headers=admin).status_code == 201
    start_worker()
    _train(http, admin, study, "P-01", n_trials=2)
    first = http.get(f"{base}/models", headers=admin).json()[0]["activation"]
    v1 = _held_out_accuracy(factory, study, 1)
    # no version was active: nothing compared, every held-out night is fresh
    assert first["against_version"] is None and first["compared_nights"] == [] and first["selection_free"] is True
    assert set(first["fresh_nights"]) == set(v1)
    assert first["fresh_value"] == pytest.approx(np.mean(list(v1.values())), abs=1e-9)
    assert http.post(f"{base}/nights", json=bodies[3], headers=admin).status_code == 201
    _train(http, admin, study, "P-01", n_trials=2)
    listed = {v["version"]: v for v in http.get(f"{base}/models", headers=admin).json()}
    second = listed[2]["activation"]
    v2 = _held_out_accuracy(factory, study, 2)
    shared = sorted(set(v1) & set(v2))
    others = sorted(set(v2) - set(v1))
    assert len(shared) == 3 and len(others) == 1 and second["against_version"] == 1
    assert sorted(second["compared_nights"]) == shared and sorted(second["fresh_nights"]) == others
    assert second["candidate_value"] == pytest.approx(np.mean([v2[n] for n in shared]), abs=1e-9)
    assert second["active_value"] == pytest.approx(np.mean([v1[n] for n in shared]), abs=1e-9)
    assert second["fresh_value"] == pytest.approx(np.mean([v2[n] for n in others]), abs=1e-9)
    assert second["selection_free"] is True and second["metric"] == "balanced_accuracy"
    # the decision is the paired one, and the version's status follows it
    promoted = second["candidate_value"] >= second["active_value"]
    assert second["activate"] is promoted and listed[2]["active"] is promoted and listed[1]["active"] is not promoted
    assert "did not use" in second["note"]
    # the model card says the same, and says plainly that the held-out figures are selection figures
    cookies = {"nightbank_ui": admin["Authorization"].removeprefix("Bearer ")}
    with httpx.Client(base_url=http.base_url, cookies=cookies, timeout=60) as browser:
        card = browser.get(f"/ui/studies/{study}/participants/P-01/models/2/card.json").json()
        markdown = browser.get(f"/ui/studies/{study}/participants/P-01/models/2/card.md").text
    assert card["validation"]["activation"] == {k: second[k] for k in card["validation"]["activation"]}
    assert card["validation"]["selection_figures"].startswith("selection figures")
    assert "### Activation" in markdown and "| not used to decide | 1 |" in markdown
    # the validation report shows the active models' cards: version 2's says it beside the held-out
    # figures when the paired comparison activated it, and is absent otherwise
    report = http.get(f"/v1/studies/{study}/report", headers=admin)
    assert report.status_code == 200
    assert (card["validation"]["selection_figures"] in report.text) is promoted
