"""Running independent pieces of training on threads, with progress reported to the caller.

Training calls take an optional ``progress(done, total, stage)`` callable. Workers never call it
themselves: they put ticks on a queue through a :class:`Reporter`, and :func:`run_tasks` calls
``progress`` from the caller's thread (so a service can touch its database session there). If
``progress`` raises, every worker stops at its next tick or check and the exception is re-raised
to the caller: that is how a running training job is cancelled.

Errors::

    NightbankError
    └── TrainingCancelled   raised inside workers once the progress callback has failed
"""

from __future__ import annotations

import queue
import threading
from collections.abc import Callable, Sequence
from concurrent.futures import FIRST_COMPLETED, ThreadPoolExecutor, wait
from typing import TypeVar

from threadpoolctl import threadpool_limits

from ..errors import NightbankError

__all__ = ["Progress", "Reporter", "TrainingCancelled", "run_tasks"]

#: ``progress(done, total, stage)``; raising inside it stops training.
Progress = Callable[[int, int, str], None]

T = TypeVar("T")


class TrainingCancelled(NightbankError):
    """Raised inside worker threads once the progress callback has failed."""

    code = "training_cancelled"


class Reporter:
    """Thread-safe progress channel from worker threads to the caller's thread."""

    def __init__(self) -> None:
        self._events: queue.Queue[str] = queue.Queue()
        self._cancel = threading.Event()

    def tick(self, stage: str) -> None:
        """One unit of work is done; raises :class:`TrainingCancelled` after a failed callback."""
        if self._cancel.is_set():
            raise TrainingCancelled("training stopped by the progress callback")
        self._events.put(stage)

    def check(self) -> None:
        """Raise :class:`TrainingCancelled` if training was stopped."""
        if self._cancel.is_set():
            raise TrainingCancelled("training stopped by the progress callback")

    def cancel(self) -> None:
        """Make every later :meth:`tick` and :meth:`check` raise."""
        self._cancel.set()

    def pending(self) -> list[str]:
        """Stages ticked since the last call, oldest first."""
        out = []
        while True:
            try:
                out.append(self._events.get_nowait())
            except queue.Empty:
                return out


def run_tasks(tasks: Sequence[Callable[[Reporter], T]], *, n_jobs: int, total: int, progress: Progress | None,
              done: int = 0) -> list[T]:
    """Run tasks on ``n_jobs`` threads; call ``progress`` from the caller's thread only.

    Each task gets a :class:`Reporter` and calls ``tick(stage)`` per unit of work. If
    ``progress`` raises, every task stops at its next tick and that exception is re-raised here.
    Results come back in task order.
    """
    reporter = Reporter()
    error: BaseException | None = None

    def drain() -> None:
        nonlocal done, error
        for stage in reporter.pending():
            done += 1
            if progress is not None and error is None:
                try:
                    progress(min(done, total), total, stage)
                except BaseException as exc:  # the caller's own signal to stop
                    error = exc
                    reporter.cancel()

    # one BLAS thread per worker: BLAS threads competing with XGBoost's make small PCA fits 50x slower
    with threadpool_limits(limits=1, user_api="blas"), ThreadPoolExecutor(max_workers=max(1, n_jobs)) as pool:
        futures = [pool.submit(task, reporter) for task in tasks]
        pending = set(futures)
        while pending:
            _, pending = wait(pending, timeout=0.05, return_when=FIRST_COMPLETED)
            drain()
            if any(f.done() and f.exception() is not None for f in futures):
                reporter.cancel()
        drain()
    if error is not None:
        raise error
    for f in futures:
        exc = f.exception()
        if exc is not None and not isinstance(exc, TrainingCancelled):
            raise exc
    return [f.result() for f in futures]
