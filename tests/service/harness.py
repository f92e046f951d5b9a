"""Test harness of the service: live uvicorn server, free ports, headers, polling."""

from __future__ import annotations

import os
import socket
import threading
import time
from collections.abc import Callable
from typing import Any


def free_port() -> int:
    """A free TCP port on the loopback interface."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class LiveServer:
    """The app served by uvicorn in a thread, on a loopback port."""

    def __init__(self, settings: Any) -> None:
        import uvicorn

        from service.app import create_app

        self.app = create_app(settings)
        self.url = f"http://127.0.0.1:{settings.port}"
        self.server = uvicorn.Server(uvicorn.Config(self.app, host="127.0.0.1", port=settings.port,
                                                    access_log=False, log_level="warning", lifespan="on"))
        self.thread = threading.Thread(target=self.server.run, daemon=True)

    def __enter__(self) -> LiveServer:
        self.thread.start()
        deadline = time.monotonic() + 20
        while not self.server.started:
            if time.monotonic() > deadline or not self.thread.is_alive():
                raise RuntimeError("the test server did not start")
            time.sleep(0.02)
        return self

    def __exit__(self, *exc: object) -> None:
        self.server.should_exit = True
        self.thread.join(10)


def bearer(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


def worker_env(settings: Any) -> dict[str, str]:
    from service.jobs.workers import settings_env

    return {**os.environ, **settings_env(settings)}


def wait_for(predicate: Callable[[], Any], *, timeout_s: float = 300, poll_s: float = 0.2) -> Any:
    """Poll ``predicate`` until it returns a truthy value (returned) or time runs out."""
    deadline = time.monotonic() + timeout_s
    while True:
        value = predicate()
        if value:
            return value
        if time.monotonic() > deadline:
            raise TimeoutError("condition not met in time")
        time.sleep(poll_s)


def cohort_bodies(*, n_participants: int = 3, nights: int = 3, seed: int = 1,
                  labelled_share: float = 1.0) -> dict[str, list[dict[str, Any]]]:
    """Simulated nights as nightbank JSON bodies, per participant (``models.simulate_cohort``)."""
    from models import CohortSpec, night_to_json, simulate_cohort

    spec = CohortSpec(n_participants=n_participants, nights_min=nights, nights_max=nights,
                      labelled_share=labelled_share, few_labels_participants=0, artefacts=False, id_prefix="P")
    out: dict[str, list[dict[str, Any]]] = {}
    for sim in simulate_cohort(spec, seed=seed):
        out.setdefault(sim.night.participant_id, []).append(night_to_json(sim.night))
    return out
