"""Served instances for benchmarks.

- :func:`served`: nightbank itself (migrated SQLite file, admin token, ``nightbank serve``);
- :func:`served_bare`: a bare FastAPI app under uvicorn with the same worker count, answering the
  scoring route's path with stored JSON bytes behind the same bearer check as nightbank (the
  SHA-256 of the presented secret compared in constant time), as the framework's own limit.
"""

from __future__ import annotations

import hashlib
import hmac
import os
import shutil
import socket
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import httpx

BARE_BODY_ENV = "NIGHTBANK_BENCH_BARE_BODY"
BARE_DIGEST_ENV = "NIGHTBANK_BENCH_BARE_DIGEST"
EXE = shutil.which("nightbank", path=str(Path(sys.executable).parent)) or "nightbank"


@dataclass(frozen=True)
class Instance:
    base: str
    headers: dict[str, str]
    db_path: Path


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _wait_until_up(server: subprocess.Popen[bytes], url: str, *, what: str, timeout_s: float,
                   headers: dict[str, str] | None = None) -> None:
    """Poll ``url`` until it answers 200; RuntimeError if ``server`` exits or ``timeout_s`` passes first."""
    deadline = time.monotonic() + timeout_s
    while True:
        try:
            if httpx.get(url, headers=headers, timeout=5).status_code == 200:
                return
        except httpx.TransportError:
            pass
        if time.monotonic() > deadline or server.poll() is not None:
            raise RuntimeError(f"{what} did not start")
        time.sleep(0.2)


@contextmanager
def served(prefix: str, *, workers: int, job_workers: int, start_timeout_s: float = 300) -> Iterator[Instance]:
    """Migrate a fresh database, create an admin token, serve it; stop and remove everything afterwards."""
    workdir = Path(tempfile.mkdtemp(prefix=prefix))
    port = free_port()
    db_path = workdir / "bench.db"
    db = f"sqlite:///{db_path}"
    env = {**os.environ, "NIGHTBANK_LOG_LEVEL": "WARNING"}
    subprocess.run([EXE, "migrate", "--db", db], check=True, capture_output=True, env=env)
    token = subprocess.run([EXE, "token", "create", "--role", "admin", "--db", db], check=True, capture_output=True,
                           text=True, env=env).stdout.strip().splitlines()[-1]
    server = subprocess.Popen([EXE, "serve", "--db", db, "--port", str(port), "--workers", str(workers),
                               "--job-workers", str(job_workers)], env=env, stdout=subprocess.DEVNULL,
                              stderr=subprocess.DEVNULL)
    instance = Instance(base=f"http://127.0.0.1:{port}", headers={"Authorization": f"Bearer {token}"},
                        db_path=db_path)
    try:
        _wait_until_up(server, f"{instance.base}/healthz", what="the server", timeout_s=start_timeout_s)
        yield instance
    finally:
        server.terminate()
        server.wait(30)
        shutil.rmtree(workdir, ignore_errors=True)


def bare_app() -> object:
    """The bare app (``uvicorn --factory _served:bare_app``): one route, one bearer check, stored bytes.

    The body is read once from the file named by ``NIGHTBANK_BENCH_BARE_BODY``; a request passes
    when SHA-256 of its bearer token equals ``NIGHTBANK_BENCH_BARE_DIGEST`` (hex), compared with
    :func:`hmac.compare_digest`, else 401.
    """
    from fastapi import Depends, FastAPI, HTTPException, Response
    from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer

    body = Path(os.environ[BARE_BODY_ENV]).read_bytes()
    digest = os.environ[BARE_DIGEST_ENV]
    bearer = HTTPBearer(auto_error=False)
    app = FastAPI()

    async def caller(credentials: HTTPAuthorizationCredentials | None = Depends(bearer)) -> str:  # noqa: B008
        given = "" if credentials is None else hashlib.sha256(credentials.credentials.encode()).hexdigest()
        if not hmac.compare_digest(given, digest):
            raise HTTPException(401, "the bearer token is not valid")
        return given

    @app.get("/v1/studies/{study}/participants/{pid}/nights/{night_id}/scoring")
    async def scoring(study: str, pid: str, night_id: str, method: str = "auto",
                _: str = Depends(caller)) -> Response:  # noqa: B008
        return Response(content=body, media_type="application/json")

    return app


@contextmanager
def served_bare(prefix: str, *, body: bytes, token: str, workers: int,
                start_timeout_s: float = 300) -> Iterator[Instance]:
    """Serve :func:`bare_app` with ``workers`` uvicorn processes; ``body`` is what every request gets."""
    workdir = Path(tempfile.mkdtemp(prefix=prefix))
    (workdir / "body.json").write_bytes(body)
    port = free_port()
    env = {**os.environ, BARE_BODY_ENV: str(workdir / "body.json"),
           BARE_DIGEST_ENV: hashlib.sha256(token.encode()).hexdigest()}
    server = subprocess.Popen([sys.executable, "-m", "uvicorn", "--factory", "_served:bare_app",
                               "--app-dir", str(Path(__file__).parent), "--host", "127.0.0.1", "--port", str(port),
                               "--workers", str(workers), "--no-access-log", "--log-level", "warning"],
                              env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    instance = Instance(base=f"http://127.0.0.1:{port}", headers={"Authorization": f"Bearer {token}"},
                        db_path=workdir / "none")
    try:
        _wait_until_up(server, instance.base + "/v1/studies/s/participants/p/nights/n/scoring", what="the bare server",
                       timeout_s=start_timeout_s, headers=instance.headers)
        yield instance
    finally:
        server.terminate()
        server.wait(30)
        shutil.rmtree(workdir, ignore_errors=True)
