"""Fixtures of the in-process HTTP tests: the app on the private Redis, and a client for it.

``client`` is a plain synchronous ``httpx.Client`` whose transport hands each
request to the ASGI app (``httpx.ASGITransport``) in a fresh event loop, so
tests stay plain functions; a response is read whole before it is returned,
so a live log (SSE) returns once its job has ended.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import anyio
import httpx
import pytest
from fastapi import FastAPI

from service.app import create_app
from service.settings import Settings


class ASGIBridge(httpx.BaseTransport):
    """A sync httpx transport that serves each request from an ASGI app."""

    def __init__(self, app: Any) -> None:
        self.app = app

    def handle_request(self, request: httpx.Request) -> httpx.Response:
        body = request.read()

        async def serve() -> httpx.Response:
            transport = httpx.ASGITransport(app=self.app, raise_app_exceptions=False)
            forwarded = httpx.Request(request.method, request.url, headers=request.headers, content=body)
            response = await transport.handle_async_request(forwarded)
            content = await response.aread()
            return httpx.Response(response.status_code, headers=response.headers, content=content, request=request)

        return anyio.run(serve)


def make_client(app: FastAPI, **headers: str) -> httpx.Client:
    """A sync client talking to ``app`` in process."""
    return httpx.Client(transport=ASGIBridge(app), base_url="http://fixq.test", headers=headers)


@pytest.fixture
def app_settings(settings: Settings) -> Settings:
    """The private-Redis settings with auth off (keys do not exist yet)."""
    return settings.model_copy(update={"auth": False})


@pytest.fixture
def app(app_settings: Settings, redis_client: Any) -> FastAPI:
    return create_app(app_settings)


@pytest.fixture
def client(app: FastAPI) -> Iterator[httpx.Client]:
    with make_client(app) as http:
        yield http


def machine_shop(**overrides) -> dict:
    """An invented three-state machine: run it, or repair it at a cost."""
    document = {
        "version": 1,
        "label": "machine shop (invented)",
        "tags": ["shop"],
        "discount": 0.9,
        "model": {
            "kind": "tabular",
            "states": ["new", "worn", "broken"],
            "actions": ["run", "repair"],
            "reward": [[3.0, -1.0], [2.0, -1.0], [None, -4.0]],
            "transition": [
                [[0.8, 0.2, 0.0], [1.0, 0.0, 0.0]],
                [[0.0, 0.7, 0.3], [1.0, 0.0, 0.0]],
                [[0.0, 0.0, 1.0], [1.0, 0.0, 0.0]],
            ],
        },
        "solver": {"method": "value_iteration", "tolerance": 1e-8},
    }
    document.update(overrides)
    return document
