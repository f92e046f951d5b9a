"""The task runner: result order, progress in the caller's thread, errors propagated."""

from __future__ import annotations

import threading

import pytest

from models.learning.tasks import Reporter, run_tasks


def test_run_tasks_keeps_order_reports_in_the_caller_thread_and_propagates_errors() -> None:
    seen: list[int] = []
    caller = threading.get_ident()

    def progress(done: int, total: int, stage: str) -> None:
        assert threading.get_ident() == caller and total == 6
        seen.append(done)

    def task(i: int):
        def run(reporter: Reporter) -> int:
            reporter.tick(f"task {i}")
            reporter.tick(f"task {i}")
            return i * i
        return run

    assert run_tasks([task(i) for i in range(3)], n_jobs=2, total=6, progress=progress) == [0, 1, 4]
    assert seen == [1, 2, 3, 4, 5, 6]

    def broken(reporter: Reporter) -> int:
        raise KeyError("boom")

    with pytest.raises(KeyError, match="boom"):
        run_tasks([task(0), broken], n_jobs=2, total=2, progress=None)
