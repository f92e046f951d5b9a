"""Commands that run the service on this machine: ``serve``, ``worker``, ``migrate``."""

from __future__ import annotations

import contextlib
import logging.config
import os
import shutil
import signal
import tempfile
from typing import Annotated, Any

import typer

from ..errors import InvalidSettings
from .application import app
from .console import console

__all__ = ["DaskSchedulerOption", "DbOption", "ExecutorOption", "configure_logging", "local_settings"]

DbOption = Annotated[str | None, typer.Option("--db", help="Database URL (default NIGHTBANK_DB or "
                                                          "sqlite:///./var/nightbank.db).")]
ExecutorOption = Annotated[str | None, typer.Option(
    "--executor", help="Where trainings run: 'local' (in the worker process) or 'dask' (default NIGHTBANK_EXECUTOR "
                       "or local).")]
DaskSchedulerOption = Annotated[str | None, typer.Option(
    "--dask-scheduler", help="Dask scheduler address for --executor dask, e.g. tcp://HOST:8786 (default "
                             "NIGHTBANK_DASK_SCHEDULER).")]


def local_settings(**overrides: Any) -> Any:
    """Settings from the environment with the given command-line values on top (None = not given).

    Raises
    ------
    InvalidSettings
        With every reason, if the settings are invalid (an unknown executor, dask without a
        scheduler); the command then exits with code 2.
    """
    from pydantic import ValidationError

    from ..config import Settings

    try:
        return Settings(**{k: v for k, v in overrides.items() if v is not None})
    except ValidationError as exc:
        reasons = "; ".join(f"{'.'.join(map(str, e['loc'])) or 'settings'}: {e['msg']}" for e in exc.errors())
        raise InvalidSettings(reasons) from None


def log_config(level: str) -> dict[str, Any]:
    """Logging configuration: one line per record on stderr; uvicorn's access log stays off."""
    handler = {"class": "logging.StreamHandler", "formatter": "plain", "stream": "ext://sys.stderr"}
    return {
        "version": 1, "disable_existing_loggers": False,
        "formatters": {"plain": {"format": "%(asctime)s %(levelname)s %(name)s: %(message)s"}},
        "handlers": {"stderr": handler},
        "loggers": {name: {"handlers": ["stderr"], "level": level.upper(), "propagate": False}
                    for name in ("nightbank", "uvicorn", "uvicorn.error")},
    }


def configure_logging(level: str) -> None:
    """Apply :func:`log_config` to this process."""
    logging.config.dictConfig(log_config(level))


@app.command()
def migrate(db: DbOption = None,
            revision: Annotated[str, typer.Option(help="Target revision (default: the newest).")] = "head") -> None:
    """Create or upgrade the database schema (safe to run again)."""
    from ..store.schema import upgrade

    settings = local_settings(db=db)
    upgrade(settings, revision)
    console.print(f"database at revision [bold]{revision}[/bold]: {_safe_url(settings.db)}")


def _safe_url(url: str) -> str:
    """The URL without a password."""
    from sqlalchemy.engine import make_url

    return make_url(url).render_as_string(hide_password=True)


@app.command()
def serve(
    host: Annotated[str | None, typer.Option(help="Address to bind (default 127.0.0.1).")] = None,
    port: Annotated[int | None, typer.Option(help="Port (default 8765).")] = None,
    db: DbOption = None,
    workers: Annotated[int | None, typer.Option(min=1, help="HTTP worker processes (default 1).")] = None,
    job_workers: Annotated[int | None, typer.Option(min=0, help="Training worker processes (default 1).")] = None,
    executor: ExecutorOption = None,
    dask_scheduler: DaskSchedulerOption = None,
    migrate_first: Annotated[bool, typer.Option("--migrate/--no-migrate",
                                                help="Upgrade the database before starting.")] = True,
) -> None:
    """Run the HTTP API with its training workers until Ctrl-C."""
    import uvicorn

    from ..config import get_settings
    from ..jobs.supervisor import STATUS_ENV, WorkerSupervisor
    from ..jobs.workers import settings_env
    from ..store.db import make_engine
    from ..store.schema import check_schema, upgrade
    from ..telemetry import multiprocess_folder

    settings = local_settings(host=host, port=port, db=db, workers=workers, job_workers=job_workers,
                              executor=executor, dask_scheduler=dask_scheduler)
    if migrate_first and settings.auto_migrate:
        upgrade(settings)
    engine = make_engine(settings)
    try:
        check_schema(engine)  # fail fast, with the fix in the message, before starting any process
    finally:
        engine.dispose()
    os.environ.update(settings_env(settings))  # the app factory and the workers read these
    get_settings.cache_clear()
    status_dir = tempfile.mkdtemp(prefix="nightbank-workers-")
    os.environ[STATUS_ENV] = os.path.join(status_dir, "status.json")  # read by /healthz in every HTTP process
    status_path = os.environ[STATUS_ENV] if settings.job_workers else None
    supervisor = WorkerSupervisor(settings, settings.job_workers, status_path=status_path).start()
    # uvicorn restores this handler after its own graceful shutdown and raises the signal again: leaving
    # through SystemExit lets the ``finally`` below stop the training workers
    signal.signal(signal.SIGTERM, _leave)
    console.print(f"nightbank on http://{settings.host}:{settings.port} (docs /docs), {settings.workers} HTTP "
                  f"worker(s), {settings.job_workers} training worker(s){_where(settings)}; database "
                  f"{_safe_url(settings.db)}")
    try:
        # several HTTP workers share their metrics through a folder, so /metrics counts for all of them
        with multiprocess_folder() if settings.workers > 1 else contextlib.nullcontext():
            # a worker process imports the whole service before it first answers the supervisor's health
            # check; on a loaded machine that takes longer than uvicorn's 5 s and the worker is killed
            uvicorn.run("service.app:app_from_env", factory=True, host=settings.host, port=settings.port,
                        workers=settings.workers, access_log=False, log_config=log_config(settings.log_level),
                        timeout_worker_healthcheck=60)
    finally:
        supervisor.stop()
        shutil.rmtree(status_dir, ignore_errors=True)


def _leave(*_: object) -> None:
    raise SystemExit(0)


def _where(settings: Any) -> str:
    return f" training on Dask at {settings.dask_scheduler}" if settings.executor == "dask" else ""


@app.command()
def worker(db: DbOption = None, executor: ExecutorOption = None, dask_scheduler: DaskSchedulerOption = None) -> None:
    """Run one more training worker in the foreground (same database as the server, any machine)."""
    import signal

    from ..jobs.workers import Worker
    from ..store.db import make_engine, make_session_factory
    from ..store.schema import check_schema

    settings = local_settings(db=db, executor=executor, dask_scheduler=dask_scheduler)
    configure_logging(settings.log_level)
    engine = make_engine(settings)
    check_schema(engine)
    w = Worker(settings, factory=make_session_factory(engine))
    for sig in (signal.SIGTERM, signal.SIGINT):
        signal.signal(sig, lambda *_: w.stopping.set())
    console.print(f"worker {w.worker_id} waiting for training jobs{_where(settings)} (Ctrl-C to stop)")
    w.run_forever()
