"""Fixtures of the in-process HTTP tests: the app on the private Redis, and clients for it.

* ``app_settings``, ``app``, ``client``: the app with auth off and a client of it.
* ``keys``: the API key store on the private Redis.
* ``auth_settings``, ``auth_app``: the app with auth on; ``alice`` and ``bob``
  are clients with ordinary keys, ``admin`` one with an admin key.

The client and the calls the tests share are in ``tests/service/_http.py``, the
documents in ``tests/_documents.py``.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import httpx
import pytest
import redis
from fastapi import FastAPI

from service.app import create_app
from service.keys import KeyStore
from service.settings import Settings
from tests.service._http import client_for, make_client


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


@pytest.fixture
def keys(redis_client: redis.Redis, settings: Settings) -> KeyStore:
    return KeyStore(redis_client, settings.redis_prefix)


@pytest.fixture
def auth_settings(settings: Settings) -> Settings:
    return settings.model_copy(update={"auth": True})


@pytest.fixture
def auth_app(auth_settings: Settings, redis_client: redis.Redis) -> FastAPI:
    return create_app(auth_settings)


@pytest.fixture
def alice(auth_app: FastAPI, keys: KeyStore) -> Iterator[httpx.Client]:
    with client_for(auth_app, keys, "alice") as http:
        yield http


@pytest.fixture
def bob(auth_app: FastAPI, keys: KeyStore) -> Iterator[httpx.Client]:
    with client_for(auth_app, keys, "bob") as http:
        yield http


@pytest.fixture
def admin(auth_app: FastAPI, keys: KeyStore) -> Iterator[httpx.Client]:
    with client_for(auth_app, keys, "operator", admin=True) as http:
        yield http
