"""The app factory: ``create_app(settings=None)`` builds the fixq API.

``fixq api`` serves ``create_app()`` with uvicorn; tests call it with their
own settings.  Resources live in ``service/routers`` (one module each); the
Redis client, the job store and the metrics registry hang on ``app.state``
for the dependencies in ``service.deps``.
"""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from importlib.metadata import PackageNotFoundError, version

import redis
from fastapi import FastAPI

from service import problems
from service.bodylimit import BodyLimit
from service.metrics import build_registry
from service.routers import changes, dashboard, examples, jobs, plots, sweeps, system
from service.settings import Settings, get_settings
from service.stopping import watch_stop_signals
from service.store import JobStore

__all__ = ["create_app"]

REDIS_CONNECT_TIMEOUT_S = 2.0
"""Seconds the API waits to connect to Redis before it answers 503."""
REDIS_SOCKET_TIMEOUT_S = 10.0
"""Seconds the API waits for one Redis reply before it answers 503."""

_MIB = 2**20


def _version() -> str:
    try:
        return version("fixq")
    except PackageNotFoundError:
        return "0+unknown"


def create_app(settings: Settings | None = None) -> FastAPI:
    """Build the API for ``settings`` (default: ``get_settings()``, from ``FIXQ_*``)."""
    settings = settings or get_settings()
    if not settings.redis_url:
        raise RuntimeError("FIXQ_REDIS_URL is not set: point it at Redis, or use `fixq run` for an embedded one")
    connection = redis.Redis.from_url(
        settings.redis_url,
        decode_responses=False,
        health_check_interval=30,
        socket_connect_timeout=REDIS_CONNECT_TIMEOUT_S,
        socket_timeout=REDIS_SOCKET_TIMEOUT_S,
    )

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        with watch_stop_signals():
            yield
        connection.close()

    app = FastAPI(
        title="fixq",
        version=_version(),
        summary="Solve discounted dynamic programs: submit a problem document, get the value function and policy.",
        lifespan=lifespan,
        redoc_url=None,
    )
    store = JobStore(connection, settings)
    app.state.settings = settings
    app.state.redis = connection
    app.state.store = store
    app.state.metrics = build_registry(store)
    problems.install(app)
    app.add_middleware(BodyLimit, max_bytes=int(settings.max_body_mb * _MIB))
    # changes before plots: its /plots/changes.{fmt} would otherwise be taken by /plots/{picture}.{fmt}.
    routers = (jobs.router, changes.router, sweeps.router, plots.router, examples.router, system.router)
    for router in (*routers, dashboard.router):
        app.include_router(router)
    return app
