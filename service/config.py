"""Service settings: one pydantic-settings class, read from ``NIGHTBANK_*`` environment variables.

Nothing is read at import time: :func:`get_settings` builds (and caches) the settings on first
call, and :func:`service.app.create_app` accepts a :class:`Settings` so tests pass their own.

==============================  ===================================  ==========================================
environment variable            default                              meaning
==============================  ===================================  ==========================================
``NIGHTBANK_DB``                ``sqlite:///./var/nightbank.db``     SQLAlchemy URL (``postgresql+psycopg://``)
``NIGHTBANK_HOST``              ``127.0.0.1``                        address ``nightbank serve`` binds
``NIGHTBANK_PORT``              ``8765``                             port ``nightbank serve`` binds
``NIGHTBANK_WORKERS``           ``1``                                HTTP worker processes (uvicorn)
``NIGHTBANK_JOB_WORKERS``       ``1``                                training worker processes ``serve`` starts
``NIGHTBANK_AUTO_MIGRATE``      ``true``                             ``serve`` upgrades the database first
``NIGHTBANK_LEASE_S``           ``60``                               job lease, seconds (a dead worker's job is
                                                                     taken over after it expires)
``NIGHTBANK_HEARTBEAT_S``       ``5``                                lease renewal interval, seconds
``NIGHTBANK_POLL_S``            ``1``                                idle worker's queue polling interval, seconds
``NIGHTBANK_MAX_ATTEMPTS``      ``3``                                claims of one job before it is failed
``NIGHTBANK_N_TRIALS``          ``30``                               hyper-parameter trials per training job
``NIGHTBANK_TRAINING_THREADS``  ``1``                                threads of one training job
``NIGHTBANK_WORKER_NICE``       ``10``                               niceness added to worker processes, so
                                                                     requests keep priority over training
``NIGHTBANK_MAX_BODY_MB``       ``20``                               largest accepted request body, MB
``NIGHTBANK_TOKEN_CACHE_S``     ``5``                                seconds a verified token is remembered
                                                                     (a revocation takes effect within it)
``NIGHTBANK_LOG_LEVEL``         ``INFO``                             service log level
``NIGHTBANK_EXECUTOR``          ``local``                            where workers run trainings: ``local``
                                                                     (in the worker process) or ``dask``
``NIGHTBANK_DASK_SCHEDULER``    (none)                               Dask scheduler address for ``dask``,
                                                                     e.g. ``tcp://10.0.0.5:8786``
==============================  ===================================  ==========================================
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
    """Every service setting, each also read from ``NIGHTBANK_<NAME>`` (see module docstring)."""

    model_config = SettingsConfigDict(env_prefix="NIGHTBANK_", extra="ignore", frozen=True)

    db: str = Field(default=DEFAULT_DB_URL, description="SQLAlchemy database URL.")
    host: str = "127.0.0.1"
    port: int = Field(default=8765, ge=0, le=65535)
    workers: int = Field(default=1, ge=1, description="HTTP worker processes.")
    job_workers: int = Field(default=1, ge=0, description="Training worker processes started by serve.")
    auto_migrate: bool = True
    lease_s: float = Field(default=60.0, gt=0)
    heartbeat_s: float = Field(default=5.0, gt=0)
    poll_s: float = Field(default=1.0, gt=0)
    max_attempts: int = Field(default=3, ge=1)
    n_trials: int = Field(default=30, ge=1)
    training_threads: int = Field(default=1, ge=1)
    worker_nice: int = Field(default=10, ge=0, le=19)
    max_body_mb: float = Field(default=20.0, gt=0)
    token_cache_s: float = Field(default=5.0, ge=0)
    log_level: str = "INFO"
    executor: Literal["local", "dask"] = "local"
    dask_scheduler: str | None = None

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
