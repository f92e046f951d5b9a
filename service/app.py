"""The FastAPI application: ``create_app(settings)`` wires database, routers, problems and telemetry.

The app never migrates the database: it refuses to start on a database that is not at the newest
schema revision (see :mod:`service.store.schema`). ``nightbank serve`` migrates before starting it.
"""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import FastAPI
from fastapi.routing import APIRoute

from .api.body_limit import BodyLimit
from .api.problems import PROBLEM_RESPONSES, install_problem_handlers
from .api.routes import (
    nights,
    profiles,
    protocol,
    recording_days,
    recordings,
    reports,
    review_queue,
    reviews,
    studies,
    system,
    tokens,
    training,
)
from .api.schemas import Problem
from .config import Settings, get_settings
from .store import db
from .store.cachewriter import CacheWriter
from .store.schema import check_schema
from .store.tokens import TokenCache
from .telemetry import Metrics, RequestTelemetry
from .ui import mount_ui

__all__ = ["app_from_env", "create_app"]

DESCRIPTION = """Sleep/wake scoring of wrist actigraphy, calibrated per participant on PSG-labelled nights.

Research software, not a medical device; not for diagnosis. Every route except `/healthz` (and
these docs) needs `Authorization: Bearer <token>`. Errors are `application/problem+json` with a
stable `code`.
"""


def _operation_id(route: APIRoute) -> str:
    return f"{route.tags[0]}-{route.name}" if route.tags else route.name


def create_app(settings: Settings | None = None) -> FastAPI:
    """Build the application for ``settings`` (default: from the environment).

    Raises
    ------
    DatabaseNotMigrated
        If the database is not at the newest schema revision (the message names
        ``nightbank migrate``).
    """
    settings = settings or get_settings()
    engine = db.make_engine(settings)
    try:
        check_schema(engine)
    except Exception:
        engine.dispose()
        raise

    factory = db.make_session_factory(engine)
    writer = CacheWriter(factory)
    metrics = Metrics()

    @asynccontextmanager
    async def lifespan(_: FastAPI) -> AsyncIterator[None]:
        yield
        writer.close()
        engine.dispose()
        metrics.close()

    app = FastAPI(title="nightbank", version="0.1.0", description=DESCRIPTION, lifespan=lifespan,
                  docs_url="/docs", redoc_url=None, generate_unique_id_function=_operation_id,
                  responses=PROBLEM_RESPONSES)
    app.state.settings = settings
    app.state.engine = engine
    app.state.factory = factory
    app.state.cache_writer = writer
    app.state.metrics = metrics
    app.state.token_cache = TokenCache(settings.token_cache_s)
    install_problem_handlers(app)
    for module in (system, studies, nights, recordings, recording_days, training, reports, profiles, tokens, protocol,
                   review_queue, reviews):
        app.include_router(module.router)
    app.add_middleware(BodyLimit, limit_bytes=int(settings.max_json_body_mb * 2**20))
    app.add_middleware(RequestTelemetry, metrics=app.state.metrics)
    mount_ui(app, settings)
    _register_problem_schema(app)
    return app


def _register_problem_schema(app: FastAPI) -> None:
    """Put the Problem shape into the OpenAPI components (the handlers' responses refer to it)."""
    build = app.openapi

    def openapi() -> dict:  # type: ignore[type-arg]
        if app.openapi_schema is None:
            schema = build()
            schema.setdefault("components", {}).setdefault("schemas", {}).update(
                Problem.model_json_schema(ref_template="#/components/schemas/{model}").get("$defs", {}))
            schema["components"]["schemas"]["Problem"] = {
                k: v for k, v in Problem.model_json_schema(ref_template="#/components/schemas/{model}").items()
                if k != "$defs"}
            app.openapi_schema = schema
        return app.openapi_schema

    app.openapi = openapi  # type: ignore[method-assign]


def app_from_env() -> FastAPI:
    """Factory for ``uvicorn --factory`` (settings from ``NIGHTBANK_*``)."""
    return create_app(get_settings())
