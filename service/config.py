"""Service settings: one pydantic-settings class, read from ``NIGHTBANK_*`` environment variables.

Nothing is read at import time: :func:`get_settings` builds (and caches) the settings on first
call, and :func:`service.app.create_app` accepts a :class:`Settings` so tests pass their own.
Every field ``name`` is read from ``NIGHTBANK_<NAME>``; its ``description`` says what it does.
The Configuration table of the README lists every one with its default (a test compares them).
"""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path
from typing import Literal, Self

from pydantic import Field, model_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

__all__ = ["DEFAULT_DB_URL", "Settings", "get_settings"]

DEFAULT_DB_URL = "sqlite:///./var/nightbank.db"


class Settings(BaseSettings):
    """Every service setting, each also read from ``NIGHTBANK_<NAME>``."""

    model_config = SettingsConfigDict(env_prefix="NIGHTBANK_", extra="ignore", frozen=True)

    db: str = Field(default=DEFAULT_DB_URL, description="SQLAlchemy database URL (postgresql+psycopg://... for "
                                                         "PostgreSQL).")
    host: str = Field(default="127.0.0.1", description="Address nightbank serve listens on.")
    port: int = Field(default=8765, ge=0, le=65535, description="Port nightbank serve listens on.")
    workers: int = Field(default=1, ge=1, description="HTTP worker processes (uvicorn).")
    job_workers: int = Field(default=1, ge=0, description="Training worker processes started by serve.")
    auto_migrate: bool = Field(default=True, description="serve upgrades the database before starting.")
    lease_s: float = Field(default=60.0, gt=0, description="Job lease, seconds: a dead worker's job is taken over "
                                                           "once it runs out.")
    heartbeat_s: float = Field(default=5.0, gt=0, description="Lease renewal interval, seconds.")
    poll_s: float = Field(default=1.0, gt=0, description="How often an idle worker looks for a queued job, seconds.")
    max_attempts: int = Field(default=3, ge=1, description="Claims of one job before it is failed.")
    n_trials: int = Field(default=30, ge=1, description="Hyper-parameter trials per training job (a request may "
                                                        "set its own).")
    training_threads: int = Field(default=1, ge=1, description="Threads of one training job.")
    worker_nice: int = Field(default=10, ge=0, le=19, description="Niceness added to worker processes, so requests "
                                                                  "keep priority over training.")
    max_body_mb: float = Field(default=20.0, gt=0, description="Largest accepted request body, MB.")
    max_json_body_mb: float = Field(default=1.0, gt=0, description="Largest JSON or form request body (every "
                                                                   "route but the uploads), MB.")
    token_cache_s: float = Field(default=5.0, ge=0, description="Seconds a verified token is remembered (a "
                                                                "revocation takes effect within it).")
    log_level: str = Field(default="INFO", description="Log level of the service and its workers.")
    prepare_review_queue: bool = Field(default=True, description="After storing a version, a training job scores "
                                                                 "the study's nights without PSG for the review "
                                                                 "queue, so its first request reads stored "
                                                                 "scorings (off: that request computes them).")
    executor: Literal["local", "dask"] = Field(default="local", description="Where workers run trainings: local "
                                                                            "(in the worker process) or dask.")
    dask_scheduler: str | None = Field(default=None, description="Dask scheduler address for the dask executor, "
                                                                 "e.g. tcp://10.0.0.5:8786.")

    @model_validator(mode="after")
    def _scheduler_for_dask(self) -> Self:
        if self.executor == "dask" and not self.dask_scheduler:
            raise ValueError("executor 'dask' needs a scheduler address (NIGHTBANK_DASK_SCHEDULER or "
                             "--dask-scheduler, e.g. tcp://HOST:8786)")
        return self

    @property
    def is_sqlite(self) -> bool:
        return self.db.startswith("sqlite")

    def sqlite_path(self) -> Path | None:
        """File of a file-based SQLite URL (None for other databases and in-memory SQLite)."""
        if not self.is_sqlite:
            return None
        path = self.db.split("///", 1)[1] if "///" in self.db else ""
        return Path(path) if path and path != ":memory:" else None


@lru_cache(maxsize=1)
def get_settings() -> Settings:
    """The process-wide settings from the environment (built on first call)."""
    return Settings()
