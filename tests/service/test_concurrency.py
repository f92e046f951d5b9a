"""Concurrent ingest and scoring against the live server: every acknowledged night is stored once and whole.

Sixteen clients share one server (uvicorn in a thread, SQLite file): twelve post 500 distinct short
nights (2 h, 240 epochs) and re-post every fifth, four request rule scorings of the nights already
acknowledged. Afterwards the stored nights are read back with the service's own registry and codec,
and each one's content hash is recomputed.
"""

from __future__ import annotations

import queue
import random
import threading
import time
from typing import Any

import pandas as pd
from factories import make_night

N_NIGHTS = 500
N_PARTICIPANTS = 25
INGEST_CLIENTS = 12
SCORING_CLIENTS = 4
RULES = ("sadeh", "cole-kripke", "count-threshold+webster")


def _nights() -> dict[str, tuple[str, dict[str, Any]]]:
    """content hash -> (participant id, JSON body), 500 distinct nights over 25 participants."""
    from models import night_to_json

    out = {}
    for i in range(N_NIGHTS):
        pid = f"P{i % N_PARTICIPANTS:02d}"
        start = (pd.Timestamp("2031-03-02T22:41:00+01:00") + pd.Timedelta(days=i // N_PARTICIPANTS)).isoformat()
        night = make_night(240, seed=i, participant_id=pid, start=start)
        out[night.content_hash] = (pid, night_to_json(night))
    assert len(out) == N_NIGHTS
    return out


def test_concurrent_ingest_and_scoring_store_every_night_once(server, http, admin, factory) -> None:
    import httpx
    from sqlalchemy import func, select

    from service.store import db, registry
    from service.store.codec import night_from_row

    assert http.post("/v1/studies", json={"study_id": "s1", "name": "Study one"}, headers=admin).status_code == 201
    nights = _nights()
    work: queue.Queue[tuple[str, str, dict[str, Any]]] = queue.Queue()
    for i, (content_hash, (pid, body)) in enumerate(nights.items()):
        work.put((content_hash, pid, body))
        if i % 5 == 0:
            work.put((content_hash, pid, body))  # the same night again, maybe while the first is in flight
    acknowledged: dict[str, str] = {}  # content hash -> night id
    owner: dict[str, str] = {}  # content hash -> participant id, of acknowledged nights
    statuses: list[tuple[str, int, str]] = []
    lock = threading.Lock()
    ingest_done = threading.Event()

    def ingest() -> None:
        with httpx.Client(base_url=server.url, headers=admin, timeout=60) as client:
            while True:
                try:
                    content_hash, pid, body = work.get_nowait()
                except queue.Empty:
                    return
                r = client.post(f"/v1/studies/s1/participants/{pid}/nights", json=body)
                with lock:
                    statuses.append(("ingest", r.status_code, r.text[:300]))
                    if r.status_code in (200, 201):
                        night_id = r.json()["night_id"]
                        assert acknowledged.setdefault(content_hash, night_id) == night_id
                        owner[content_hash] = pid

    def score(seed: int) -> None:
        rng = random.Random(seed)
        with httpx.Client(base_url=server.url, headers=admin, timeout=60) as client:
            while not ingest_done.is_set():
                with lock:
                    done = list(acknowledged)
                if not done:
                    time.sleep(0.01)
                    continue
                content_hash = rng.choice(done)
                r = client.get(f"/v1/studies/s1/participants/{owner[content_hash]}/nights/"
                               f"{acknowledged[content_hash]}/scoring",
                               params={"method": rng.choice(RULES)})
                with lock:
                    statuses.append(("scoring", r.status_code, r.text[:300]))

    ingesters = [threading.Thread(target=ingest) for _ in range(INGEST_CLIENTS)]
    scorers = [threading.Thread(target=score, args=(k,)) for k in range(SCORING_CLIENTS)]
    for t in ingesters + scorers:
        t.start()
    for t in ingesters:
        t.join(120)
    ingest_done.set()
    for t in scorers:
        t.join(60)

    failed = [s for s in statuses if s[1] >= 300]
    assert not failed, failed[:5]
    assert sum(kind == "ingest" for kind, _, _ in statuses) == N_NIGHTS + N_NIGHTS // 5
    assert sum(kind == "scoring" for kind, _, _ in statuses) > 0
    assert set(acknowledged) == set(nights)

    with db.session_scope(factory) as session:
        assert session.scalar(select(func.count()).select_from(db.Night)) == N_NIGHTS  # no duplicates
        study = registry.find_study(session, "s1")
        stored: dict[str, str] = {}
        for p in range(N_PARTICIPANTS):
            pid = f"P{p:02d}"
            participant = registry.find_participant(session, study, pid)
            for row in session.scalars(select(db.Night).where(db.Night.participant_pk == participant.pk)):
                rebuilt = night_from_row(row, participant_id=pid)  # whole: the arrays decode to the posted content
                assert rebuilt.content_hash == row.content_hash
                assert nights[rebuilt.content_hash][0] == pid
                stored[rebuilt.content_hash] = row.night_id
    assert stored == acknowledged
