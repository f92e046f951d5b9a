"""Write-behind storage of cached results (scorings, feature matrices), off the request path.

A request that computed a result hands the new row to :class:`CacheWriter` and answers at once;
a background thread of the process inserts queued rows in batches, one transaction each. Rows
are caches: one that conflicts with a row stored meanwhile (same key) or whose night was
deleted is dropped.
"""

from __future__ import annotations

import logging
import queue
import threading

from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, sessionmaker

from ..errors import StorageError
from . import db

__all__ = ["CacheWriter"]

log = logging.getLogger("nightbank.cache")


class CacheWriter:
    """Background inserter of cache rows.

    Parameters
    ----------
    factory : sessionmaker
    batch : int, default=200
        Largest number of rows per transaction.
    """

    def __init__(self, factory: sessionmaker[Session], *, batch: int = 200) -> None:
        self.factory = factory
        self.batch = batch
        self._queue: queue.Queue[db.Base | None] = queue.Queue()
        self._thread = threading.Thread(target=self._run, name="nightbank-cache-writer", daemon=True)
        self._thread.start()

    def submit(self, row: db.Base) -> None:
        """Queue a new ORM row for insertion."""
        self._queue.put(row)

    def flush(self) -> None:
        """Wait until every queued row has been written (or dropped)."""
        self._queue.join()

    def close(self) -> None:
        """Write what is queued, then stop the thread."""
        self._queue.put(None)
        self._thread.join(30)

    def _run(self) -> None:
        while True:
            first = self._queue.get()
            rows = [] if first is None else [first]
            stop = first is None
            while len(rows) < self.batch and not stop:
                try:
                    item = self._queue.get_nowait()
                except queue.Empty:
                    break
                if item is None:
                    stop = True
                else:
                    rows.append(item)
            self._write(rows)
            for _ in range(len(rows) + (1 if stop else 0)):
                self._queue.task_done()
            if stop:
                return

    def _write(self, rows: list[db.Base]) -> None:
        if not rows:
            return
        try:
            with db.session_scope(self.factory, write=True) as session:
                session.add_all(rows)
            return
        except IntegrityError:
            pass
        except StorageError:
            log.warning("cache rows dropped: the database refused them", exc_info=True)
            return
        for row in rows:  # a conflicting row spoilt the batch: insert one by one, dropping conflicts
            try:
                with db.session_scope(self.factory, write=True) as session:
                    session.add(row)
            except (IntegrityError, StorageError):
                continue
