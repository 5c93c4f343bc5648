"""The plots router on its own app, over the private Redis server, with auth off: the plot tests' client."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

import httpx
import pytest
from fastapi import FastAPI

from service import problems
from service.routers.plots import router as plots_router
from service.settings import get_settings
from service.store import JobStore
from tests.service._http import make_client


@contextmanager
def plots_app(store: JobStore, monkeypatch: pytest.MonkeyPatch) -> Iterator[tuple[httpx.Client, FastAPI]]:
    """``(client, app)``: an app with the plots router and the problem-details handlers, auth off."""
    monkeypatch.setenv("FIXQ_AUTH", "off")
    get_settings.cache_clear()
    app = FastAPI()
    problems.install(app)
    app.state.settings = get_settings()
    app.state.redis = store.redis
    app.state.store = store
    app.include_router(plots_router)
    with make_client(app) as client:
        yield client, app
    get_settings.cache_clear()
