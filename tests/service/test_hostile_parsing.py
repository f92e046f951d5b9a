"""Hostile bodies over real HTTP: bounded JSON, compressed bodies, Parquet footers, kept connections.

Every body below is refused with a 4xx problem that has a ``code``; none gets a 5xx or a dropped
connection, so the same keep-alive client goes on working. Where memory is the point (a
compression bomb, a Parquet file whose footer promises millions of rows) the server is a separate
process and its peak resident memory (``VmHWM`` in ``/proc/<pid>/status``) is read around the request.
"""

from __future__ import annotations

import gzip
import io
import json
import subprocess
import sys
import zlib
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from factories import night_json
from harness import bearer

NIGHTS = "/v1/studies/s1/participants/P01/nights"
RECORDINGS = "/v1/studies/s1/participants/P01/recordings"
JSON = {"content-type": "application/json"}

#: peak memory a single hostile request may add to the server; README "Reliability" states it
MEMORY_BOUND_MB = 120


def _problem(response: Any, status: int, code: str) -> dict[str, Any]:
    assert response.status_code == status, response.text[:300]
    assert response.headers["content-type"].startswith("application/problem+json")
    body = response.json()
    found = [body["code"], *(p["code"] for p in body.get("problems") or [])]
    assert code in found, body
    return body


def _deep(depth: int) -> bytes:
    return b'{"epoch_seconds": 30, "counts": ' + b"[" * depth + b"]" * depth + b"}"


@pytest.mark.parametrize("route", [NIGHTS, RECORDINGS])
def test_deep_json_is_refused_and_the_connection_stays_usable(http: Any, admin: dict[str, str], study: str,
                                                              route: str) -> None:
    for depth in (65, 5_000, 200_000):  # just past the limit, past Python's recursion limit, far past it
        _problem(http.post(route, content=_deep(depth), headers={**admin, **JSON}), 422, "json_too_deep")
        assert http.get("/v1/studies/s1/participants", headers=admin).status_code == 200  # same client, next request
    body = night_json(240)
    body["counts"] = [[[c]] for c in body["counts"]]  # shallow nesting is read, then refused as non-numeric
    _problem(http.post(NIGHTS, json=body, headers=admin), 422, "non_numeric_count")


def test_overlong_numbers_are_refused_before_parsing(http: Any, admin: dict[str, str], study: str) -> None:
    text = json.dumps(night_json(240))
    huge = "9" * 5_000  # Python's int parser refuses over 4,300 digits with a bare ValueError
    for number in (huge, "1" * 31, "0." + "1" * 31, "1e" + "1" * 31):
        bad = text.replace('"counts": [', f'"counts": [{number}, ', 1)
        _problem(http.post(NIGHTS, content=bad.encode(), headers={**admin, **JSON}), 422, "json_number_too_long")
    ok = text.replace('"counts": [', '"counts": [' + "1" * 30 + ", ", 1)  # 30 digits parse (and are implausible)
    response = http.post(NIGHTS, content=ok.encode(), headers={**admin, **JSON})
    assert response.status_code == 422 and response.json()["problems"][0]["code"] != "json_number_too_long"


def test_compressed_bodies_are_expanded(http: Any, admin: dict[str, str], study: str) -> None:
    raw = json.dumps(night_json(240)).encode()
    first = http.post(NIGHTS, content=gzip.compress(raw), headers={**admin, **JSON, "content-encoding": "gzip"})
    assert first.status_code == 201, first.text
    again = http.post(NIGHTS, content=zlib.compress(raw), headers={**admin, **JSON, "content-encoding": "deflate"})
    assert again.status_code == 200 and again.json()["night_id"] == first.json()["night_id"]
    plain = http.get(f"{NIGHTS}/{first.json()['night_id']}?epochs=true", headers=admin).json()
    assert plain["counts"] == [float(c) for c in night_json(240)["counts"]]


def test_unreadable_compressed_bodies_get_a_code(http: Any, admin: dict[str, str], study: str) -> None:
    raw = gzip.compress(json.dumps(night_json(240)).encode())
    cases = [(raw[: len(raw) // 2], "gzip", 400, "undecodable_body"),  # cut short
             (b"not gzip at all", "gzip", 400, "undecodable_body"),
             (raw + b"trailing", "gzip", 400, "undecodable_body"),
             (raw, "br", 415, "unsupported_content_encoding")]
    for body, encoding, status, code in cases:
        _problem(http.post(NIGHTS, content=body, headers={**admin, **JSON, "content-encoding": encoding}),
                 status, code)
    assert http.get("/v1/studies/s1/participants", headers=admin).json()["count"] == 0


@pytest.mark.parametrize("content_type", ["application/json", "text/csv", "application/vnd.apache.parquet"])
def test_garbage_of_every_format_gets_a_coded_4xx_on_one_connection(http: Any, admin: dict[str, str], study: str,
                                                                    content_type: str) -> None:
    rng = np.random.default_rng(7)
    bodies = [rng.bytes(4096), b"\x00" * 1000, b"PAR1" + rng.bytes(100) + b"PAR1", b"\xff\xfe" + "x".encode("utf-16"),
              b'{"counts": ' + b"[1," * 100 + b"}", b"time,counts\n" + b"2031-03-02T22:41:00+01:00,1\n" * 3,
              b'"' * 10_000, _deep(100), b"[" + b'"\\u0000",' * 100 + b"1]"]
    for route in (NIGHTS, RECORDINGS, "/v1/studies/s1/import-profiles/guess"):
        for body in bodies:
            response = http.post(route, content=body, headers={**admin, "content-type": content_type})
            assert 400 <= response.status_code < 500, (route, body[:40], response.text[:200])
            assert response.json()["code"], response.text
    assert http.get("/v1/studies/s1/participants", headers=admin).json()["count"] == 0


# --- memory, with the server as its own process --------------------------------------------------------------


def _peak_mb(pid: int) -> float:
    status = Path(f"/proc/{pid}/status").read_text()
    return int(next(line for line in status.splitlines() if line.startswith("VmHWM:")).split()[1]) / 1024


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[int, str, dict[str, str]]]:
    from test_crash import _served

    from service.config import Settings
    from service.store import db
    from service.store.tokens import create_token

    db_url = f"sqlite:///{tmp_path_factory.mktemp('hostile') / 'nightbank.db'}"
    migrate = subprocess.run([str(Path(sys.executable).parent / "nightbank"), "migrate", "--db", db_url],
                             capture_output=True, text=True, timeout=60)
    assert migrate.returncode == 0, migrate.stderr
    engine = db.make_engine(Settings(db=db_url))
    with db.session_scope(db.make_session_factory(engine), write=True) as session:
        headers = bearer(create_token(session, role="admin", actor="test")[1])
    engine.dispose()
    with _served(db_url) as (proc, url):
        import httpx

        assert httpx.post(f"{url}/v1/studies", json={"study_id": "s1", "name": "S"}, headers=headers).status_code == 201
        yield proc.pid, url, headers


def _gzip_bomb(expanded_bytes: int) -> bytes:
    packer = zlib.compressobj(9, zlib.DEFLATED, 16 + zlib.MAX_WBITS)
    block = b"0" * 2**24
    out = [packer.compress(block) for _ in range(expanded_bytes // len(block))]
    return b"".join([*out, packer.flush()])


def test_a_gzip_bomb_is_refused_within_the_memory_bound(served: tuple[int, str, dict[str, str]]) -> None:
    import httpx

    pid, url, headers = served
    bomb = _gzip_bomb(1_300 * 2**20)  # expands about 1,000-fold
    assert 1.0 < len(bomb) / 2**20 < 1.6  # the 1.3 MB body of the README's guarantee
    before = _peak_mb(pid)
    with httpx.Client(base_url=url, headers=headers, timeout=120) as client:
        response = client.post(NIGHTS, content=bomb, headers={**JSON, "content-encoding": "gzip"})
        _problem(response, 413, "decompressed_too_large")
        assert client.get("/v1/studies/s1/participants").status_code == 200
    assert _peak_mb(pid) - before < MEMORY_BOUND_MB


def test_a_parquet_footer_promising_millions_of_rows_is_refused_unread(
        served: tuple[int, str, dict[str, str]]) -> None:
    import httpx
    import pyarrow as pa
    import pyarrow.parquet as pq

    pid, url, headers = served
    n = 30_000_000  # 150 times the epoch limit; constant columns compress to a few kB
    table = pa.table({"time": pa.array(np.full(n, 1_930_000_000, dtype="datetime64[s]")).cast(pa.timestamp("s", "UTC")),
                      "counts": pa.array(np.zeros(n))})
    buffer = io.BytesIO()
    pq.write_table(table, buffer, compression="zstd", row_group_size=n)
    del table
    assert len(buffer.getvalue()) < 2**20
    before = _peak_mb(pid)
    with httpx.Client(base_url=url, headers=headers, timeout=120) as client:
        response = client.post(NIGHTS, content=buffer.getvalue(), headers={"content-type": "application/x-parquet"})
    assert _peak_mb(pid) - before < MEMORY_BOUND_MB
    body = _problem(response, 422, "too_many_epochs")
    assert "metadata" in body["problems"][0]["message"]


def test_diaries_and_hypnograms_of_a_recording_refuse_hostile_json(http: Any, admin: dict[str, str],
                                                                   study: str) -> None:
    import pandas as pd

    from models import RecordingSpec, simulate_recordings

    sim = simulate_recordings(RecordingSpec(n_participants=1, n_days=3, psg_nights=0, id_prefix="P"), seed=3)[0]
    csv = pd.DataFrame({"time": [t.isoformat() for t in sim.recording.timestamps()],
                        "counts": sim.recording.counts}).to_csv(index=False, na_rep="").encode()
    posted = http.post(RECORDINGS, content=csv, headers={**admin, "content-type": "text/csv"})
    assert posted.status_code == 201, posted.text
    base = f"{RECORDINGS}/{posted.json()['recording_id']}"
    for part in ("diary", "reference"):
        for body, code in ((b"[" * 100_000 + b"]" * 100_000, "json_too_deep"),
                           (b'{"days": [' + b"7" * 5_000 + b"]}", "json_number_too_long")):
            response = http.post(f"{base}/{part}", content=body, headers={**admin, **JSON}, params={"tz": "UTC"})
            _problem(response, 422, code)
        assert http.get(base, headers=admin).status_code == 200
