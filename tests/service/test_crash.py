"""A server killed with SIGKILL in the middle of concurrent uploads loses nothing it acknowledged.

The API runs as a real process (uvicorn with the app factory, reading ``NIGHTBANK_*``) over a
SQLite file migrated by ``nightbank migrate``. Eight clients upload 2-h nights; once some are
acknowledged the process is killed without warning. After a restart, every night that received a
2xx is stored whole (its content hash recomputed from the stored arrays), every stored row decodes
(no half-written night), SQLite's ``PRAGMA integrity_check`` returns ok, and the restarted server
accepts the remaining nights.
"""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import date
from pathlib import Path

import httpx
from factories import make_night
from harness import bearer, free_port, wait_for

ROOT = Path(__file__).resolve().parents[2]
N_NIGHTS = 300
CLIENTS = 8
KILL_AFTER_ACKS = 60


@contextmanager
def _served(db_url: str) -> Iterator[tuple[subprocess.Popen[bytes], str]]:
    port = free_port()
    env = {**os.environ, "NIGHTBANK_DB": db_url, "NIGHTBANK_PORT": str(port), "NIGHTBANK_JOB_WORKERS": "0",
           "NIGHTBANK_LOG_LEVEL": "WARNING"}
    proc = subprocess.Popen([sys.executable, "-m", "uvicorn", "--factory", "service.app:app_from_env",
                             "--host", "127.0.0.1", "--port", str(port), "--log-level", "warning"],
                            env=env, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    url = f"http://127.0.0.1:{port}"

    def up() -> bool:
        try:
            return httpx.get(f"{url}/healthz", timeout=1).status_code == 200
        except httpx.TransportError:
            assert proc.poll() is None, "the server exited"
            return False

    try:
        wait_for(up, timeout_s=30, poll_s=0.1)
        yield proc, url
    finally:
        if proc.poll() is None:
            proc.terminate()
        proc.wait(10)


def test_sigkill_mid_upload_keeps_every_acknowledged_night_whole(tmp_path: Path) -> None:
    from sqlalchemy import select

    from models import night_to_json
    from service.config import Settings
    from service.store import db
    from service.store.codec import night_from_row
    from service.store.tokens import create_token

    db_url = f"sqlite:///{tmp_path / 'nightbank.db'}"
    migrate = subprocess.run([str(Path(sys.executable).parent / "nightbank"), "migrate", "--db", db_url], cwd=ROOT,
                             capture_output=True, text=True, timeout=60)
    assert migrate.returncode == 0, migrate.stderr
    engine = db.make_engine(Settings(db=db_url))
    factory = db.make_session_factory(engine)
    with db.session_scope(factory, write=True) as session:
        headers = bearer(create_token(session, role="admin", actor="test")[1])
    nights = [make_night(240, seed=i, participant_id=f"P{i % 10}",  # one night a day: a participant's never overlap
                         start=f"{date.fromordinal(date(2031, 3, 2).toordinal() + i // 10)}T22:41:00+01:00")
              for i in range(N_NIGHTS)]
    acknowledged: dict[str, str] = {}  # content hash -> participant id
    lock = threading.Lock()
    enough = threading.Event()

    with _served(db_url) as (proc, url):
        assert httpx.post(f"{url}/v1/studies", json={"study_id": "s1", "name": "Study one"},
                          headers=headers).status_code == 201

        def upload(k: int) -> None:
            with httpx.Client(base_url=url, headers=headers, timeout=30) as client:
                for night in nights[k::CLIENTS]:
                    try:
                        r = client.post(f"/v1/studies/s1/participants/{night.participant_id}/nights",
                                        json=night_to_json(night))
                    except httpx.TransportError:
                        return  # the server is gone: this night was never acknowledged
                    if r.status_code in (200, 201):
                        with lock:
                            acknowledged[night.content_hash] = night.participant_id
                            if len(acknowledged) >= KILL_AFTER_ACKS:
                                enough.set()

        threads = [threading.Thread(target=upload, args=(k,)) for k in range(CLIENTS)]
        for t in threads:
            t.start()
        assert enough.wait(60), "too few nights were acknowledged before the kill"
        proc.send_signal(signal.SIGKILL)
        proc.wait(10)
        for t in threads:
            t.join(60)
    assert 0 < len(acknowledged) < N_NIGHTS, len(acknowledged)

    with _served(db_url) as (_, url):  # opening the database again recovers its journal
        with db.session_scope(factory) as session:
            stored = {}
            for row in session.scalars(select(db.Night)):
                pid = session.get(db.Participant, row.participant_pk).participant_id
                rebuilt = night_from_row(row, participant_id=pid)  # every row is whole and decodes
                assert rebuilt.content_hash == row.content_hash and rebuilt.n_epochs == row.n_epochs == 240
                stored[row.content_hash] = pid
        assert set(acknowledged) <= set(stored)
        assert all(stored[h] == pid for h, pid in acknowledged.items())
        # the restarted server takes the rest; nights stored before the kill are recognised (200)
        with httpx.Client(base_url=url, headers=headers, timeout=30) as client:
            for night in nights:
                r = client.post(f"/v1/studies/s1/participants/{night.participant_id}/nights",
                                json=night_to_json(night))
                assert r.status_code == (200 if night.content_hash in stored else 201), r.text
    engine.dispose()
    with sqlite3.connect(tmp_path / "nightbank.db") as con:
        assert con.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
        assert con.execute("SELECT count(*) FROM nights").fetchone()[0] == N_NIGHTS
