"""The study protocol over HTTP: defaults, validation, roles, audit, and every scoring stating and applying it."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from harness import bearer


def _night_with_known_wake() -> dict[str, Any]:
    """A labelled night whose reference has, after 10 epochs of wake at lights-off, wake bouts of 1, 3 and
    (at the end) 6 epochs between runs of N2 (30-s epochs, in bed for the whole recording)."""
    from models import Night, night_to_json

    stages = ["W"] * 10 + ["N2"] * 50 + ["W"] + ["N2"] * 50 + ["W"] * 3 + ["N2"] * 120 + ["W"] * 6
    counts = np.random.default_rng(3).poisson(4.0, len(stages)).astype(float)
    night = Night(participant_id="p", start=pd.Timestamp("2031-03-02T22:41:00+01:00"), epoch_seconds=30,
                  counts=counts, reference=np.array(stages))
    return night_to_json(night)


def test_protocol_defaults_round_trip_and_audit(http, study, admin, make_token, factory) -> None:
    from models import DEFAULT_PROTOCOL, StudyProtocol
    from service.store.audit import list_audit
    from service.store.db import session_scope

    first = http.get(f"/v1/studies/{study}/protocol", headers=admin).json()
    assert first["is_default"] and first["protocol"] == DEFAULT_PROTOCOL.to_dict()
    assert first["fingerprint"] == DEFAULT_PROTOCOL.fingerprint() and first["updated_by"] is None
    analyst = bearer(make_token("analyst", study_id=study))
    body = {"waso_end": "final_awakening", "min_awakening_epochs": 2, "equivalence_margins": {"tst_min": 20.0}}
    put = http.put(f"/v1/studies/{study}/protocol", json=body, headers=analyst)
    assert put.status_code == 200, put.text
    expected = StudyProtocol.from_dict(body)  # fields left out take their defaults
    got = http.get(f"/v1/studies/{study}/protocol", headers=bearer(make_token("ingest", study_id=study))).json()
    assert got["protocol"] == expected.to_dict() and got["fingerprint"] == expected.fingerprint()
    assert not got["is_default"] and got["updated_at"] and got["updated_by"]
    assert got["protocol"]["equivalence_margins"]["tst_min"] == 20.0
    assert got["protocol"]["equivalence_margins"]["waso_min"] == DEFAULT_PROTOCOL.equivalence_margins["waso_min"]
    with session_scope(factory) as session:
        entry = next(e for e in list_audit(session, study_id=study) if e.action == "protocol.set")
    assert entry.subject == expected.fingerprint() and entry.detail["previous"] == DEFAULT_PROTOCOL.fingerprint()


def test_setting_the_protocol_needs_the_analyst_role(http, study, make_token) -> None:
    ingest = bearer(make_token("ingest", study_id=study))
    refused = http.put(f"/v1/studies/{study}/protocol", json={"min_awakening_epochs": 2}, headers=ingest)
    assert refused.status_code == 403
    assert http.get(f"/v1/studies/{study}/protocol", headers=ingest).json()["is_default"]


def test_an_invalid_protocol_is_a_422_naming_each_field_and_nothing_is_stored(http, study, admin) -> None:
    bad = {"waso_end": "noon", "min_awakening_epochs": 0, "equivalence_margins": {"tst_min": -1, "naps": 3},
           "colour": "blue"}
    out = http.put(f"/v1/studies/{study}/protocol", json=bad, headers=admin)
    assert out.status_code == 422 and out.headers["content-type"].startswith("application/problem+json")
    problem = out.json()
    assert problem["code"] == "invalid_protocol"
    fields = {p["location"]["field"] for p in problem["problems"]}
    assert {"waso_end", "min_awakening_epochs", "equivalence_margins.tst_min", "equivalence_margins.naps",
            "colour"} <= fields
    assert http.get(f"/v1/studies/{study}/protocol", headers=admin).json()["is_default"]
    assert http.put(f"/v1/studies/{study}/protocol", json=[1, 2], headers=admin).status_code == 422
    assert http.put("/v1/studies/nope/protocol", json={}, headers=admin).status_code == 404


def test_scoring_states_the_protocol_and_a_new_protocol_recomputes_it(http, study, admin) -> None:
    posted = http.post(f"/v1/studies/{study}/participants/p/nights", json=_night_with_known_wake(),
                       params={"accept_implausible": "true"}, headers=admin)
    assert posted.status_code == 201, posted.text
    url = f"/v1/studies/{study}/participants/p/nights/{posted.json()['night_id']}/scoring"
    before = http.get(url, params={"method": "sadeh"}, headers=admin).json()
    ref = before["agreement"]["reference_parameters"]
    # AASM convention (from memory): WASO to lights-on, every wake bout after onset an awakening:
    # bouts of 1, 3 and 6 epochs -> 3 awakenings, 10 epochs x 0.5 min = 5.0 min WASO
    assert before["protocol"]["waso_end"] == "lights_on"
    assert (ref["awakenings"], ref["waso_min"], ref["sol_min"]) == (3, 5.0, 5.0)
    assert http.put(f"/v1/studies/{study}/protocol", json={"waso_end": "final_awakening",
                                                           "min_awakening_epochs": 2},
                    headers=admin).status_code == 200
    after = http.get(url, params={"method": "sadeh"}, headers=admin).json()
    ref = after["agreement"]["reference_parameters"]
    # final-awakening end (Fekedulegn et al. 2020, from memory): the last 6-epoch bout is left out;
    # of the bouts of 1 and 3 epochs only the 3-epoch one reaches 2 epochs -> 1 awakening, WASO 4 epochs = 2 min
    assert after["protocol"]["waso_end"] == "final_awakening" and after["protocol"]["min_awakening_epochs"] == 2
    assert (ref["awakenings"], ref["waso_min"], ref["sol_min"]) == (1, 2.0, 5.0)
    assert after["sleep"] == before["sleep"]  # the calls do not depend on the protocol


@pytest.mark.postgres
def test_protocol_round_trip_on_postgresql() -> None:
    import httpx
    from harness import LiveServer, free_port
    from pg_support import throwaway_database

    from models import StudyProtocol
    from service.config import Settings
    from service.store.db import make_engine, make_session_factory, session_scope
    from service.store.schema import downgrade, upgrade
    from service.store.tokens import create_token

    with throwaway_database() as url:
        settings = Settings(db=url, port=free_port(), token_cache_s=0)
        upgrade(settings)
        downgrade(settings, "0002")  # the protocol table comes and goes with its migration
        upgrade(settings)
        engine = make_engine(settings)
        with session_scope(make_session_factory(engine), write=True) as session:
            token = create_token(session, role="admin")[1]
        engine.dispose()
        with LiveServer(settings) as live, httpx.Client(base_url=live.url, headers=bearer(token)) as http:
            assert http.post("/v1/studies", json={"study_id": "s", "name": "S"}).status_code == 201
            body = {"sol": "persistent_sleep", "persistent_sleep_min": 15, "unscored_breaks_bouts": True}
            for _ in range(2):  # the first save inserts, the second replaces
                assert http.put("/v1/studies/s/protocol", json=body).status_code == 200
            got = http.get("/v1/studies/s/protocol").json()
            assert got["protocol"] == StudyProtocol.from_dict(body).to_dict() and not got["is_default"]
