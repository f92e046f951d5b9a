"""Request metrics and logs: counters, latency histograms and Prometheus text exposition.

The ASGI middleware :class:`RequestTelemetry` times every request, counts it by method, route
*template* (``/v1/studies/{study}/...``, never the concrete path) and status, adds an
``X-Request-ID`` header, and logs one INFO line per request with the template only: no token,
participant id or count data reaches the log. Metrics are per process (with several HTTP
workers each process reports its own).
"""

from __future__ import annotations

import logging
import threading
import time
import uuid
from collections import defaultdict
from collections.abc import Callable, Iterable
from typing import Any

__all__ = ["LATENCY_BUCKETS_S", "Metrics", "RequestTelemetry", "render_prometheus"]

log = logging.getLogger("nightbank.http")

#: Upper bounds of the latency histogram buckets, seconds.
LATENCY_BUCKETS_S: tuple[float, ...] = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)


class Metrics:
    """Thread-safe request counters and latency histograms of this process."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self.requests: dict[tuple[str, str, str], int] = defaultdict(int)
        self.buckets: dict[tuple[str, str], list[int]] = defaultdict(lambda: [0] * len(LATENCY_BUCKETS_S))
        self.sums: dict[tuple[str, str], float] = defaultdict(float)
        self.counts: dict[tuple[str, str], int] = defaultdict(int)

    def observe(self, method: str, route: str, status: int, seconds: float) -> None:
        with self._lock:
            self.requests[(method, route, str(status))] += 1
            key = (method, route)
            for i, bound in enumerate(LATENCY_BUCKETS_S):
                if seconds <= bound:
                    self.buckets[key][i] += 1
            self.sums[key] += seconds
            self.counts[key] += 1

    def snapshot(self) -> dict[str, Any]:
        with self._lock:
            return {"requests": dict(self.requests), "buckets": {k: list(v) for k, v in self.buckets.items()},
                    "sums": dict(self.sums), "counts": dict(self.counts)}


def _labels(**labels: str) -> str:
    inner = ",".join(f'{k}="{v.replace(chr(92), chr(92) * 2).replace(chr(34), chr(92) + chr(34))}"'
                     for k, v in labels.items())
    return "{" + inner + "}"


def render_prometheus(metrics: Metrics, *, jobs_by_state: dict[str, int]) -> str:
    """Prometheus text format (version 0.0.4) of the request metrics and the job counts."""
    snap = metrics.snapshot()
    lines: list[str] = [
        "# HELP nightbank_http_requests_total HTTP requests handled by this process.",
        "# TYPE nightbank_http_requests_total counter",
    ]
    for (method, route, status), n in sorted(snap["requests"].items()):
        lines.append(f"nightbank_http_requests_total{_labels(method=method, route=route, status=status)} {n}")
    lines += ["# HELP nightbank_http_request_duration_seconds Time to handle a request.",
              "# TYPE nightbank_http_request_duration_seconds histogram"]
    for (method, route), counts in sorted(snap["buckets"].items()):
        for bound, n in zip(LATENCY_BUCKETS_S, counts, strict=True):
            lines.append("nightbank_http_request_duration_seconds_bucket"
                         f"{_labels(method=method, route=route, le=repr(bound))} {n}")
        total = snap["counts"][(method, route)]
        lines.append(f"nightbank_http_request_duration_seconds_bucket{_labels(method=method, route=route, le='+Inf')}"
                     f" {total}")
        lines.append(f"nightbank_http_request_duration_seconds_sum{_labels(method=method, route=route)} "
                     f"{snap['sums'][(method, route)]:.6f}")
        lines.append(f"nightbank_http_request_duration_seconds_count{_labels(method=method, route=route)} {total}")
    lines += ["# HELP nightbank_jobs Training jobs in the database by state.", "# TYPE nightbank_jobs gauge"]
    for state, n in jobs_by_state.items():
        lines.append(f"nightbank_jobs{_labels(state=state)} {n}")
    return "\n".join(lines) + "\n"


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
