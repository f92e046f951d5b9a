"""Request metrics and logs: Prometheus counters and latency histograms (``prometheus_client``).

The ASGI middleware :class:`RequestTelemetry` times every request, counts it by method, route
*template* (``/v1/studies/{study}/...``, never the concrete path) and status, adds an
``X-Request-ID`` header, and logs one INFO line per request with the template only: no token,
participant id or count data reaches the log.

Metrics are kept by :mod:`prometheus_client`. When ``nightbank serve`` runs several HTTP worker
processes, it points ``PROMETHEUS_MULTIPROC_DIR`` at a fresh temporary folder before starting
them (:func:`multiprocess_folder`), so every process writes its samples there and ``/metrics``
reports the sum over all of them, whichever process answers
(:class:`prometheus_client.multiprocess.MultiProcessCollector`). A process that stops marks
itself dead; the counts it made stay in the totals. Without that variable (one HTTP process,
tests, an app built in-process) the metrics are those of the :class:`Metrics` object. The job
counts come from the database at each scrape: a study token gets its own study's counts only, and
only lab-wide admin tokens get the per-study series ``nightbank_study_jobs{study=...}``.
"""

from __future__ import annotations

import contextlib
import logging
import os
import tempfile
import time
import uuid
from collections.abc import Callable, Iterable, Iterator
from typing import Any

from prometheus_client import CONTENT_TYPE_PLAIN_0_0_4, CollectorRegistry, Counter, Histogram, generate_latest, values
from prometheus_client.core import GaugeMetricFamily, Metric
from prometheus_client.multiprocess import MultiProcessCollector, mark_process_dead
from prometheus_client.registry import Collector

__all__ = ["LATENCY_BUCKETS_S", "METRICS_MEDIA_TYPE", "MULTIPROCESS_ENV", "Metrics", "RequestTelemetry",
           "multiprocess_folder"]

log = logging.getLogger("nightbank.http")

#: Upper bounds of the latency histogram buckets, seconds.
LATENCY_BUCKETS_S: tuple[float, ...] = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)
#: Environment variable naming the folder the processes of one server share their samples in.
MULTIPROCESS_ENV = "PROMETHEUS_MULTIPROC_DIR"
#: Content type of the ``/metrics`` body (Prometheus text format 0.0.4).
METRICS_MEDIA_TYPE = CONTENT_TYPE_PLAIN_0_0_4


class _JobCounts(Collector):
    """The ``nightbank_jobs`` gauge (and ``nightbank_study_jobs`` when given) from counts read at scrape time."""

    def __init__(self, jobs_by_state: dict[str, int], jobs_by_study: dict[str, dict[str, int]] | None) -> None:
        self.jobs_by_state, self.jobs_by_study = jobs_by_state, jobs_by_study

    def collect(self) -> Iterable[Metric]:
        family = GaugeMetricFamily("nightbank_jobs", "Training jobs in the database by state (of the token's "
                                   "study for a study token).", labels=["state"])
        for state, n in self.jobs_by_state.items():
            family.add_metric([state], n)
        yield family
        if self.jobs_by_study is not None:
            per_study = GaugeMetricFamily("nightbank_study_jobs", "Training jobs by study and state (lab-wide "
                                          "admin tokens only).", labels=["study", "state"])
            for study, counts in self.jobs_by_study.items():
                for state, n in counts.items():
                    per_study.add_metric([study, state], n)
            yield per_study


class Metrics:
    """Request counter and latency histogram of this server (all its processes in multi-process mode).

    Attributes
    ----------
    folder : str or None
        The multi-process folder (``PROMETHEUS_MULTIPROC_DIR`` when the object was made), or
        None: the samples are this object's own.

    Raises
    ------
    RuntimeError
        If ``PROMETHEUS_MULTIPROC_DIR`` is set but :mod:`prometheus_client` was imported before it
        was (its samples would then never reach the folder).
    """

    def __init__(self) -> None:
        self.folder = os.environ.get(MULTIPROCESS_ENV) or None
        if self.folder is not None and not getattr(values.ValueClass, "_multiprocess", False):
            raise RuntimeError(f"{MULTIPROCESS_ENV} was set after prometheus_client was imported; set it before "
                               "the process imports nightbank's service")
        self._registry = None if self.folder is not None else CollectorRegistry(auto_describe=True)
        self.requests = Counter("nightbank_http_requests", "HTTP requests handled.", ["method", "route", "status"],
                                registry=self._registry)
        self.latency = Histogram("nightbank_http_request_duration_seconds", "Time to handle a request.",
                                 ["method", "route"], buckets=LATENCY_BUCKETS_S, registry=self._registry)

    def observe(self, method: str, route: str, status: int, seconds: float) -> None:
        """Count one request and its duration."""
        self.requests.labels(method, route, str(status)).inc()
        self.latency.labels(method, route).observe(seconds)

    def render(self, *, jobs_by_state: dict[str, int], jobs_by_study: dict[str, dict[str, int]] | None = None) -> bytes:
        """Prometheus text format (version 0.0.4) of the request metrics and the job counts.

        ``jobs_by_study`` (study id -> state -> count) adds the per-study series; the caller gives
        it to lab-wide admins only. The request series are labelled by route template, never by a
        concrete path, so they name no study.
        """
        if self.folder is not None:
            registry = CollectorRegistry()
            MultiProcessCollector(registry, path=self.folder)
        else:
            assert self._registry is not None
            registry = self._registry
        return generate_latest(registry) + generate_latest(_JobCounts(jobs_by_state, jobs_by_study))

    def close(self) -> None:
        """Mark this process dead in the multi-process folder (its counts stay in the totals)."""
        if self.folder is not None:
            mark_process_dead(os.getpid(), self.folder)


@contextlib.contextmanager
def multiprocess_folder() -> Iterator[str]:
    """A fresh folder named in ``PROMETHEUS_MULTIPROC_DIR`` while the block runs, removed after it.

    Processes started inside the block (the HTTP workers of ``serve``) inherit the variable; it
    must be set before they import :mod:`prometheus_client`.
    """
    previous = os.environ.get(MULTIPROCESS_ENV)
    with tempfile.TemporaryDirectory(prefix="nightbank-metrics-") as folder:
        os.environ[MULTIPROCESS_ENV] = folder
        try:
            yield folder
        finally:
            if previous is None:
                os.environ.pop(MULTIPROCESS_ENV, None)
            else:
                os.environ[MULTIPROCESS_ENV] = previous


class RequestTelemetry:
    """Pure ASGI middleware: request id, timing, metrics and one template-only log line per request."""

    def __init__(self, app: Callable[..., Any], *, metrics: Metrics) -> None:
        self.app = app
        self.metrics = metrics

    async def __call__(self, scope: dict[str, Any], receive: Callable[..., Any], send: Callable[..., Any]) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        start = time.perf_counter()
        request_id = uuid.uuid4().hex[:16]
        scope.setdefault("state", {})["request_id"] = request_id
        status = 500

        async def send_with_id(message: dict[str, Any]) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = int(message["status"])
                headers: Iterable[tuple[bytes, bytes]] = message.get("headers", [])
                message["headers"] = [*headers, (b"x-request-id", request_id.encode())]
            await send(message)

        try:
            await self.app(scope, receive, send_with_id)
        finally:
            elapsed = time.perf_counter() - start
            route = getattr(scope.get("route"), "path", None) or "unmatched"
            self.metrics.observe(scope["method"], route, status, elapsed)
            log.info("%s %s %d %.1f ms id=%s", scope["method"], route, status, elapsed * 1000, request_id)
