"""Training worker processes of ``nightbank serve``, watched and restarted when one dies.

:class:`WorkerSupervisor` starts the worker processes, checks them every ``check_s`` seconds
from a thread, and restarts one that exited (whatever the cause: a crash, the out-of-memory
killer, SIGKILL) after a back-off that grows while it keeps dying soon after its start
(``backoff_s``; reset once a process has run for ``stable_s``). Every restart is logged at
WARNING with the exit code. The supervisor writes the process ids of its live workers to a small
JSON status file (:data:`STATUS_ENV` names it), which ``/healthz`` reads in every HTTP process.
:meth:`WorkerSupervisor.stop` ends the watching first, then stops the workers with SIGTERM
(their running jobs go back to the queue) and kills those that do not stop in time.
"""

from __future__ import annotations

import json
import logging
import os
import socket
import subprocess
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..config import Settings
from .workers import start_worker_processes, stop_worker_processes

__all__ = ["STATUS_ENV", "SupervisorStatus", "WorkerSupervisor", "read_status"]

log = logging.getLogger("nightbank.supervisor")

#: Environment variable naming the status file of the serving supervisor.
STATUS_ENV = "NIGHTBANK_WORKER_STATUS"
#: A status file older than this (seconds) is stale: its supervisor is gone.
STALE_AFTER_S = 10.0


@dataclass(frozen=True)
class SupervisorStatus:
    """What the supervisor last wrote: its host, live worker pids, restarts so far, when (Unix s)."""

    host: str
    pids: list[int]
    restarts: int
    written_at: float


def read_status(path: str | None = None) -> SupervisorStatus | None:
    """The status in ``path`` (default: the file :data:`STATUS_ENV` names); None if absent or stale."""
    path = path or os.environ.get(STATUS_ENV)
    if not path:
        return None
    try:
        raw = json.loads(Path(path).read_text())
        status = SupervisorStatus(host=str(raw["host"]), pids=[int(p) for p in raw["pids"]],
                                  restarts=int(raw["restarts"]), written_at=float(raw["written_at"]))
    except (OSError, ValueError, KeyError, TypeError):
        return None
    return status if time.time() - status.written_at <= STALE_AFTER_S else None


@dataclass
class _Slot:
    proc: subprocess.Popen[bytes]
    started: float
    failures: int = 0
    restart_at: float | None = None


@dataclass
class WorkerSupervisor:
    """Start ``n`` worker processes with ``settings`` and keep ``n`` alive until :meth:`stop`.

    Parameters
    ----------
    settings : Settings
    n : int
        Number of worker processes.
    status_path : str, optional
        Where to write the status JSON (not written if None).
    check_s : float, default=0.5
        Seconds between checks.
    backoff_s : tuple of float, default=(1, 2, 5, 10, 30)
        Wait before the k-th consecutive restart of one slot (the last value repeats).
    stable_s : float, default=60.0
        A worker that ran this long before dying is restarted after the first back-off again.
    """

    settings: Settings
    n: int
    status_path: str | None = None
    check_s: float = 0.5
    backoff_s: tuple[float, ...] = (1.0, 2.0, 5.0, 10.0, 30.0)
    stable_s: float = 60.0
    restarts: int = 0
    _slots: list[_Slot] = field(default_factory=list)
    _stopping: threading.Event = field(default_factory=threading.Event)
    _thread: threading.Thread | None = None

    def start(self) -> WorkerSupervisor:
        now = time.monotonic()
        self._slots = [_Slot(proc, now) for proc in start_worker_processes(self.settings, self.n)]
        self._write_status()
        if self.n:
            self._thread = threading.Thread(target=self._watch, name="worker-supervisor", daemon=True)
            self._thread.start()
        return self

    def pids(self) -> list[int]:
        """Process ids of the live workers."""
        return [s.proc.pid for s in self._slots if s.proc.poll() is None]

    def _watch(self) -> None:
        while not self._stopping.wait(self.check_s):
            try:
                self._check()
            except Exception:  # the watch goes on; a failed restart is tried again at the next check
                log.exception("worker supervision error")

    def _check(self) -> None:
        now = time.monotonic()
        for slot in self._slots:
            code = slot.proc.poll()
            if code is None:
                continue
            if slot.restart_at is None:
                slot.failures = 1 if now - slot.started >= self.stable_s else slot.failures + 1
                wait_s = self.backoff_s[min(slot.failures, len(self.backoff_s)) - 1]
                slot.restart_at = now + wait_s
                log.warning("training worker pid %d exited with code %s; restarting it in %.0f s", slot.proc.pid,
                            code, wait_s)
            elif now >= slot.restart_at and not self._stopping.is_set():
                old = slot.proc.pid
                slot.proc = start_worker_processes(self.settings, 1)[0]
                slot.started, slot.restart_at = now, None
                self.restarts += 1
                log.warning("training worker pid %d replaced by pid %d", old, slot.proc.pid)
        self._write_status()

    def _write_status(self) -> None:
        if self.status_path is None:
            return
        body: dict[str, Any] = {"host": socket.gethostname()[:32], "pids": self.pids(), "restarts": self.restarts,
                                "written_at": time.time()}
        tmp = f"{self.status_path}.tmp"
        Path(tmp).write_text(json.dumps(body))
        os.replace(tmp, self.status_path)

    def stop(self, *, timeout_s: float = 15.0) -> None:
        """Stop watching, then stop every worker (SIGTERM, SIGKILL after ``timeout_s``)."""
        self._stopping.set()
        if self._thread is not None:
            self._thread.join(self.check_s * 4 + 5)
        stop_worker_processes([s.proc for s in self._slots], timeout_s=timeout_s)
        self._write_status()
