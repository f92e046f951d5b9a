"""Stored model versions after a participant rename and after a night deletion, over real HTTP on SQLite
and PostgreSQL, with versions from a tiny real training (:mod:`trained`): nothing served names a
renamed participant's old id, and nothing of a deleted night's held-out predictions can be read back."""

from __future__ import annotations

import io
import json
import re
import statistics
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
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


def _pages(world: World) -> httpx.Client:
    """A client of the pages, signed in with an analyst's cookie."""
    from service.store.db import session_scope
    from service.store.tokens import create_token

    with session_scope(world.factory, write=True) as session:
        token = create_token(session, role="analyst", study_id="s1", actor="test")[1]
    return httpx.Client(base_url=world.url, cookies={"nightbank_ui": token}, timeout=120)


def _served(world: World, pid: str, *, computed: bool = True) -> dict[str, str]:
    """Everything served about the study's models and ``pid``'s held-out nights, as text (``computed``:
    with the export and the comparisons, which take seconds)."""
    http = world.http
    pooled = http.get("/v1/studies/s1/pooled/models").json()
    out = {"pooled_models": json.dumps(pooled),
           "personal_models": http.get(f"/v1/studies/s1/participants/{pid}/models").text}
    if computed:
        out |= {"export": http.get("/v1/studies/s1/exports/parameters").text,
                "review_queue": http.get("/v1/studies/s1/review-queue").text,
                "comparison": http.get("/v1/studies/s1/comparison").text,
                "participant_comparison": http.get(f"/v1/studies/s1/participants/{pid}/comparison").text}
    with _pages(world) as pages:
        for v in pooled:
            for fmt in ("json", "md"):
                card = pages.get(f"/ui/studies/s1/pooled/models/{v['version']}/card.{fmt}")
                assert card.status_code == 200, card.text
                out[f"pooled_card_{v['version']}.{fmt}"] = card.text
        out["held_out_csv"] = pages.get(f"/ui/studies/s1/participants/{pid}/held-out.csv").text
        out["participant_page"] = pages.get(f"/ui/studies/s1/participants/{pid}").text
    for name, text in out.items():
        assert "Internal Server Error" not in text and text, name
    return out


def _stored_records(world: World) -> str:
    """Every stored record of every version (metadata, model metadata, held-out ids, fold models) as text."""
    from sqlalchemy import select

    from service.store import db
    from service.store.codec import decode_held_out

    with db.session_scope(world.factory) as session:
        parts = []
        for row in session.scalars(select(db.ModelVersion)):
            held = [] if row.held_out is None else decode_held_out(row.held_out)
            parts += [json.dumps(row.info), json.dumps(row.model_meta), json.dumps([h.participant_id for h in held])]
        for fold in session.scalars(select(db.PooledFoldModel)):
            parts += [json.dumps(fold.participants), json.dumps(fold.model_meta)]
    return "\n".join(parts)


def _roc_nights(page: str) -> dict[str, int]:
    """Nights behind each pooled method's held-out ROC curve, read from the figure's text alternative."""
    return {m: int(n) for m, n in re.findall(r"(pooled(?: \+ offset)?) AUC [0-9.]+ \((\d+) nights", page)}


def _personal_held_out_hashes(world: World) -> set[str]:
    from service.store import db, versions
    from service.store.registry import find_participant, find_study

    with db.session_scope(world.factory) as session:
        study = find_study(session, "s1")
        active = versions.active_version(session, study=study, participant=find_participant(session, study, "P-01"))
        assert active is not None
        return {h.night_hash for h in versions.load_held_out(session, active)}


def _pooled_meta(world: World) -> Any:
    from service.store import db, versions
    from service.store.registry import find_study

    with db.session_scope(world.factory) as session:
        active = versions.active_version(session, study=find_study(session, "s1"), participant=None)
        assert active is not None
        return active, versions.load_held_out(session, active)


def test_a_rename_carries_into_every_stored_version_and_nothing_served_names_the_old_id(world: World) -> None:
    from models import night_to_json

    http = world.http
    nights = post_cohort(http)
    train_here(world)  # pooled v1 (its held-out predictions and fold models name P-01, P-02, P-03)
    train_here(world, "P-01")  # personal v1 of P-01, started from the pooled model
    unlabelled = night_to_json(make_night(600, seed=41, start="2031-06-01T22:41:00+02:00", stages=False))
    assert http.post("/v1/studies/s1/participants/P-01/nights", json=unlabelled).status_code == 201
    queue = http.get("/v1/studies/s1/review-queue").text
    assert "P-01" in queue  # the unlabelled night is a review candidate
    before = _served(world, "P-01", computed=False)
    assert all("P-01" in before[k] for k in ("pooled_models", "pooled_card_1.json", "pooled_card_1.md",
                                             "personal_models"))
    meta, held = _pooled_meta(world)
    offsets = dict(meta.metadata.offsets)
    assert {h.participant_id for h in held} == {"P-01", "P-02", "P-03"}

    r = http.post("/v1/studies/s1/participants/P-01/rename", json={"to": "Q-07"})
    assert r.status_code == 200, r.text
    after = _served(world, "Q-07")
    for name, text in after.items():
        assert "P-01" not in text, name
    assert all("Q-07" in after[k] for k in ("pooled_card_1.json", "export", "review_queue"))
    assert "P-01" not in _stored_records(world)
    meta, held = _pooled_meta(world)
    assert meta.revision == 1 and meta.metadata.offsets["Q-07"] == offsets["P-01"]
    assert {h.participant_id for h in held} == {"Q-07", "P-02", "P-03"}
    # readers apply it: the export's pooled rows of the renamed participant are its held-out predictions
    export = pd.read_csv(io.StringIO(after["export"]))
    mine = export[(export["participant_id"] == "Q-07") & (export["method"] == "pooled")
                  & export["night_id"].isin(nights["P-01"])]
    assert len(mine) == len(nights["P-01"]) and (mine["held_out"].astype(str) == "True").all()
    # and the deployed pooled+offset scoring uses the offset learnt for the participant
    body = http.get(f"/v1/studies/s1/participants/Q-07/nights/{nights['P-01'][0]}/scoring",
                    params={"method": "pooled+offset"}).json()
    assert body["offset"] == pytest.approx(offsets["P-01"])

    # a merge: the target keeps its own offset; the merged id is gone from every record, no row dropped
    n_rows = sum(h.participant_id in ("P-02", "P-03") for h in held)
    merged = http.post("/v1/studies/s1/participants/P-02/rename", json={"to": "P-03"}, params={"allow_overlap": "true"})
    assert merged.status_code == 200, merged.text
    after = _served(world, "P-03", computed=False) | {"export": http.get("/v1/studies/s1/exports/parameters").text}
    for name, text in after.items():
        assert "P-02" not in text, name
    assert "P-02" not in _stored_records(world)
    meta, held = _pooled_meta(world)
    assert meta.revision == 2 and meta.metadata.offsets["P-03"] == offsets["P-03"]
    assert meta.metadata.participants == ("P-03", "Q-07")
    assert sum(h.participant_id == "P-03" for h in held) == n_rows > 0

    from service.store import db
    from service.store.audit import list_audit

    with db.session_scope(world.factory) as session:
        renames = [e for e in list_audit(session, study_id="s1") if e.action == "participant.rename"]
    assert sorted((e.subject, e.detail["participant_id"], e.detail["versions_rewritten"]) for e in renames) == [
        ("P-01", "Q-07", 2), ("P-02", "P-03", 1)]  # P-01: its personal version and the pooled one


def test_a_deleted_nights_held_out_predictions_leave_every_stored_version(world: World) -> None:
    http = world.http
    nights = post_cohort(http)
    train_here(world)
    train_here(world, "P-01")
    gone = nights["P-01"][0]
    content_hash = http.get(f"/v1/studies/s1/participants/P-01/nights/{gone}").json()["content_hash"]
    meta, held = _pooled_meta(world)
    rows = [r for r in meta.metadata.night_metrics if r["method"] == "pooled"]
    assert any(h.night_hash == content_hash for h in held)  # precondition: the version holds the night
    # the stored figure is the mean and SD (ddof=1) over the held-out nights (Python's statistics module)
    values = [r["balanced_accuracy"] for r in rows]
    assert meta.metadata.metrics.n_nights == len(rows) == 9
    assert meta.metadata.metrics.mean("balanced_accuracy") == pytest.approx(statistics.fmean(values))
    with _pages(world) as pages:
        roc_before = pages.get("/ui/studies/s1/participants/P-01").text

    assert http.delete(f"/v1/studies/s1/participants/P-01/nights/{gone}").status_code == 200
    meta, held = _pooled_meta(world)
    assert not any(h.night_hash == content_hash for h in held)
    assert meta.revision == 1
    left = [r for r in rows if r["night_hash"] != content_hash]
    assert all(r["night_hash"] != content_hash for r in meta.metadata.night_metrics)
    figures = meta.metadata.metrics
    assert figures.n_nights == 8
    assert figures.mean("balanced_accuracy") == pytest.approx(statistics.fmean(r["balanced_accuracy"] for r in left))
    assert figures.by_metric["balanced_accuracy"].sd == pytest.approx(
        statistics.stdev(r["balanced_accuracy"] for r in left))
    assert meta.metadata.selection_score == pytest.approx(figures.mean("balanced_accuracy"))
    listed = http.get("/v1/studies/s1/pooled/models").json()[0]
    assert listed["trained_on_deleted_nights"] == [gone] and listed["removed_held_out_nights"] == [gone]
    assert listed["metrics"]["n_nights"] == 8
    personal = http.get("/v1/studies/s1/participants/P-01/models").json()[0]
    assert personal["removed_held_out_nights"] == [gone] and personal["metrics"]["n_nights"] == 2
    assert _personal_held_out_hashes(world) == {n["content_hash"] for n in http.get(
        "/v1/studies/s1/participants/P-01/nights").json()["data"]}
    with _pages(world) as pages:
        card = pages.get("/ui/studies/s1/pooled/models/1/card.json").json()
        markdown = pages.get("/ui/studies/s1/pooled/models/1/card.md").text
        roc_after = pages.get("/ui/studies/s1/participants/P-01").text
    assert card["validation"]["held_out_nights"] == 8 and card["validation"]["removed_held_out_nights"] == [gone]
    assert "Held-out nights: 8 (figures computed again without 1 night(s) deleted since" in markdown
    # the ROC curves of the participant's page pool the held-out epochs: one night fewer now
    assert _roc_nights(roc_before) == {"pooled": 3, "pooled + offset": 3}
    assert _roc_nights(roc_after) == {"pooled": 2, "pooled + offset": 2}
    assert http.get("/v1/studies/s1/participants/P-01/comparison").status_code == 200


def test_deletions_at_the_same_time_each_leave_the_versions(world: World) -> None:
    import threading

    http = world.http
    nights = post_cohort(http)
    train_here(world)
    gone = [nights["P-01"][0], nights["P-02"][0]]  # two participants' nights: both in the pooled version
    barrier, statuses = threading.Barrier(len(gone)), {}

    def delete(pid: str, night_id: str) -> None:
        with httpx.Client(base_url=world.url, headers=http.headers, timeout=120) as client:
            barrier.wait()
            statuses[night_id] = client.delete(f"/v1/studies/s1/participants/{pid}/nights/{night_id}").status_code

    threads = [threading.Thread(target=delete, args=(pid, nid)) for pid, nid in zip(("P-01", "P-02"), gone,
                                                                                    strict=True)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    assert statuses == {nid: 200 for nid in gone}
    meta, held = _pooled_meta(world)
    # each rewrite started from the other's (the version rows are locked): neither night came back
    assert sorted(meta.metadata.removed_held_out_nights) == sorted(gone) and meta.revision == 2
    assert sorted(meta.trained_on_deleted_nights) == sorted(gone) and meta.metadata.metrics.n_nights == 7
    assert {h.participant_id for h in held if h.method == "pooled"} == {"P-01", "P-02", "P-03"}
    assert sum(h.method == "pooled" for h in held) == 7
