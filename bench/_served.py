"""A nightbank instance served for a benchmark: migrated SQLite file, admin token, `nightbank serve`."""

from __future__ import annotations

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


@contextmanager
def served(prefix: str, *, workers: int, job_workers: int, start_timeout_s: float = 60) -> Iterator[Instance]:
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
        deadline = time.monotonic() + start_timeout_s
        while True:
            try:
                if httpx.get(f"{instance.base}/healthz", timeout=5).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            if time.monotonic() > deadline or server.poll() is not None:
                raise RuntimeError("the server did not start")
            time.sleep(0.2)
        yield instance
    finally:
        server.terminate()
        server.wait(30)
        shutil.rmtree(workdir, ignore_errors=True)
