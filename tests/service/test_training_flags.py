"""Models trained on flagged nights say so; copies of a night do not make a participant trainable.

Real HTTP server, real SQLite file and, for training, a real worker process (simulated nights).
"""

from __future__ import annotations

import html
import re

import httpx
import pandas as pd
import pytest
from harness import cohort_bodies, wait_for

pytestmark = pytest.mark.slow

#: sleep stages of the AASM scoring manual (W is wake; N1, N2, N3 and R are sleep)
AASM_SLEEP = {"N1", "N2", "N3", "R"}


def _inverted(body: dict) -> dict:
    """The night with its reference turned round: sleep/wake 1 - reference (wake -> N2, sleep -> W)."""
    flipped = [None if s is None else "W" if s in AASM_SLEEP else "N2" if s == "W" else s for s in body["reference"]]
    return {**body, "reference": flipped, "label": f"{body['label']}-inverted"}


def _mean_counts_by_reference(body: dict) -> tuple[float, float]:
    """Mean counts of reference-sleep and reference-wake epochs (pandas groupby)."""
    frame = pd.DataFrame({"counts": body["counts"], "sleep": [s in AASM_SLEEP for s in body["reference"]]})
    means = frame.groupby("sleep")["counts"].mean()
    return float(means[True]), float(means[False])


def _store_implausible(http, headers, factory, study: str, pid: str, body: dict) -> str:
    """Store a night whose reference is implausible, with its ``reference_implausible`` QC flag; its night id."""
    url = f"/v1/studies/{study}/participants/{pid}/nights"
    plain = http.post(url, json=body, headers=headers)
    if plain.status_code == 422:
        # the route checks the reference: refused without the option, stored (and flagged) with it
        assert plain.json()["code"] == "reference_implausible", plain.text
        r = http.post(url, json=body, params={"accept_implausible": "true"}, headers=headers)
        assert r.status_code == 201, r.text
        return str(r.json()["night_id"])
    # This route stores nights without the reference check (no accept_implausible option yet): the
    # flag the check gives an accepted night (models.check_reference, accept=True) goes into the
    # stored night's QC flags through the database session, as the option would store it.
    assert plain.status_code == 201, plain.text
    night_id = str(plain.json()["night_id"])
    from sqlalchemy import select

    from models import check_reference, night_from_json
    from service.store import db

    flag = check_reference(night_from_json(body, participant_id=pid), accept=True)
    assert flag is not None and flag.code == "reference_implausible"
    with db.session_scope(factory, write=True) as session:
        row = session.scalar(select(db.Night).where(db.Night.night_id == night_id))
        assert row is not None
        row.qc = [*row.qc, flag.to_dict()]
    return night_id


def _finished(http, headers, job_id: str):
    def check():
        job = http.get(f"/v1/jobs/{job_id}", headers=headers).json()
        return job if job["state"] in ("succeeded", "failed", "cancelled") else None
    return check


def _warnings(page: str) -> list[str]:
    """Text of the training warnings on a page (tags dropped, entities decoded)."""
    found = re.findall(r'<p class="unavailable training-warning"[^>]*>(.*?)</p>', page, flags=re.S)
    return [html.unescape(re.sub(r"<[^>]+>", "", w)) for w in found]


def test_versions_and_cards_name_the_training_nights_with_an_implausible_reference(
        http, study, admin, factory, start_worker) -> None:
    bodies = cohort_bodies(n_participants=3, nights=3, seed=4)
    bad = _inverted(bodies["P-01"][1])
    sleep_mean, wake_mean = _mean_counts_by_reference(bad)
    # wrist movement is lower in sleep than in wake (the premise of Cole-Kripke 1992 and every count
    # rule): after the inversion the "sleep" epochs move more, which is what makes it implausible
    assert sleep_mean > wake_mean
    ids: dict[str, list[str]] = {}
    for pid, nights in bodies.items():
        for i, body in enumerate(nights):
            if (pid, i) == ("P-01", 1):
                ids.setdefault(pid, []).append(_store_implausible(http, admin, factory, study, pid, bad))
                continue
            r = http.post(f"/v1/studies/{study}/participants/{pid}/nights", json=body, headers=admin)
            assert r.status_code == 201, r.text
            ids.setdefault(pid, []).append(r.json()["night_id"])
    flagged_id = ids["P-01"][1]
    stored = http.get(f"/v1/studies/{study}/participants/P-01/nights/{flagged_id}", headers=admin).json()
    assert "reference_implausible" in [f["code"] for f in stored["qc"]]

    personal = http.post(f"/v1/studies/{study}/participants/P-01/training", json={"n_trials": 2}, headers=admin)
    pooled = http.post(f"/v1/studies/{study}/pooled/training", json={"n_trials": 2}, headers=admin)
    assert personal.status_code == pooled.status_code == 202, (personal.text, pooled.text)
    start_worker()
    for job_id in (personal.json()["job_id"], pooled.json()["job_id"]):
        job = wait_for(_finished(http, admin, job_id), timeout_s=240)
        assert job["state"] == "succeeded", job["error"]

    expected = [{"participant_id": "P-01", "night_id": flagged_id, "codes": ["reference_implausible"],
                 "label": bad["label"]}]
    (mine,) = http.get(f"/v1/studies/{study}/participants/P-01/models", headers=admin).json()
    assert mine["n_training_nights"] == 3 and mine["flagged_training_nights"] == expected
    (shared,) = http.get(f"/v1/studies/{study}/pooled/models", headers=admin).json()
    assert shared["n_training_nights"] == 9 and shared["flagged_training_nights"] == expected
    # the other participants' personal answers are untouched by P-01's night (no versions there)
    assert http.get(f"/v1/studies/{study}/participants/P-02/models", headers=admin).json() == []

    cookies = {"nightbank_ui": admin["Authorization"].removeprefix("Bearer ")}
    with httpx.Client(base_url=http.base_url, cookies=cookies, timeout=60) as browser:
        page = browser.get(f"/ui/studies/{study}/participants/P-01")
        assert page.status_code == 200
        (line,) = _warnings(page.text)
        assert "1 of 3 training night(s)" in line and "implausible PSG reference" in line and flagged_id in line
        assert all(other not in line for other in (ids["P-01"][0], ids["P-01"][2]))
        (pooled_line,) = _warnings(browser.get(f"/ui/studies/{study}").text)
        assert "1 of 9 training night(s)" in pooled_line and f"P-01 night {flagged_id}" in pooled_line
        assert _warnings(browser.get(f"/ui/studies/{study}/participants/P-02").text) == []
        card = browser.get(f"/ui/studies/{study}/participants/P-01/models/1/card.json").json()
        assert card["warnings"] == [line] and card["data"]["flagged_nights"] == expected
        assert {n["night_id"]: n["qc_warnings"] for n in card["data"]["nights"]} == {
            ids["P-01"][0]: [], flagged_id: ["reference_implausible"], ids["P-01"][2]: []}
        markdown = browser.get(f"/ui/studies/{study}/participants/P-01/models/1/card.md").text
        assert f"## Warnings\n\n- **{line}**" in markdown


def _shifted(body: dict, *, seconds: int) -> dict:
    """The same night with every clock time moved by ``seconds`` (a re-imported copy)."""
    def move(text: str | None) -> str | None:
        return None if text is None else (pd.Timestamp(text) + pd.Timedelta(seconds=seconds)).isoformat()
    return {**body, "start": move(body["start"]), "lights_off": move(body.get("lights_off")),
            "lights_on": move(body.get("lights_on")), "label": f"{body['label']}-copy"}


def _interval(body: dict) -> pd.Interval:
    start = pd.Timestamp(body["start"])
    return pd.Interval(start, start + pd.Timedelta(seconds=body["epoch_seconds"] * len(body["counts"])),
                       closed="left")


def test_overlapping_copies_of_a_night_count_once_before_a_training_is_queued(http, study, admin) -> None:
    first, second, third = cohort_bodies(n_participants=1, nights=3, seed=5)["P-01"]
    copy = _shifted(first, seconds=60)
    # the copy's [start, end) overlaps the original's (pandas.Interval.overlaps), the other nights do not
    assert _interval(copy).overlaps(_interval(first)) and not _interval(copy).overlaps(_interval(second))
    url = f"/v1/studies/{study}/participants/P-01"
    for body in (first, second):
        assert http.post(f"{url}/nights", json=body, headers=admin).status_code == 201
    overlap = http.post(f"{url}/nights", json=copy, headers=admin)
    assert overlap.status_code == 409 and overlap.json()["code"] == "overlapping_night", overlap.text
    r = http.post(f"{url}/nights", json=copy, params={"allow_overlap": "true"}, headers=admin)
    assert r.status_code == 201, r.text
    listing = http.get(f"/v1/studies/{study}/participants", headers=admin).json()["data"][0]
    assert listing["n_labelled_nights"] == 3  # three labelled rows are stored ...
    refused = http.post(f"{url}/training", json={"n_trials": 2}, headers=admin)
    # ... but they are two nights: TrainingConfig().min_personal_nights is 3
    assert refused.status_code == 422 and refused.json()["code"] == "too_few_labelled_nights", refused.text
    assert "has 2" in refused.json()["detail"] and "overlapping copies" in refused.json()["detail"]
    assert http.get(f"/v1/studies/{study}/jobs", headers=admin).json()["count"] == 0  # nothing was queued
    assert http.post(f"{url}/nights", json=third, headers=admin).status_code == 201
    queued = http.post(f"{url}/training", json={"n_trials": 2}, headers=admin)
    assert queued.status_code == 202 and queued.json()["state"] == "queued", queued.text
