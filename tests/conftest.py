"""Shared fixtures: a private Redis server for the whole session.

* ``redis_server`` (session): an ``EmbeddedRedis`` on a free loopback port
  with its data in a temporary directory, stopped at the end of the session.
  The machine's shared Redis (port 6379) is never used.
* ``redis_url``: its URL, and ``FIXQ_REDIS_URL`` set to it for the test (with
  ``get_settings`` re-read, so code under test sees the private server).
* ``redis_client``: a bytes-mode client on it; the database is emptied
  (FLUSHDB on the private server only) before each test that uses it.
* ``settings``: ``get_settings()`` after the environment above.
* ``store``: a ``JobStore`` on ``redis_client`` and ``settings``.
"""

from __future__ import annotations

import os
from collections.abc import Iterator

import pytest
import redis

from service.embedded_redis import EmbeddedRedis
from service.settings import Settings, get_settings
from service.store import JobStore

SHARED_REDIS_PORT = 6379

# No background kernel compiles from first solves (worker.bridge): in a clean clone every model
# structure is new, and a compile process per structure would crowd the two cores and outlive the
# test that started it.  tests/worker/test_bridge.py turns the bridge on where it tests it.
os.environ.setdefault("FIXQ_COLD_BRIDGE", "off")


@pytest.fixture(scope="session")
def redis_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[EmbeddedRedis]:
    server = EmbeddedRedis(tmp_path_factory.mktemp("redis")).start()
    assert server.port != SHARED_REDIS_PORT
    try:
        yield server
    finally:
        server.stop()


@pytest.fixture
def redis_url(redis_server: EmbeddedRedis, monkeypatch: pytest.MonkeyPatch) -> Iterator[str]:
    monkeypatch.setenv("FIXQ_REDIS_URL", redis_server.url)
    get_settings.cache_clear()
    yield redis_server.url
    get_settings.cache_clear()


@pytest.fixture
def redis_client(redis_url: str) -> Iterator[redis.Redis]:
    client = redis.Redis.from_url(redis_url)
    assert client.connection_pool.connection_kwargs["port"] != SHARED_REDIS_PORT
    client.flushdb()
    yield client
    client.close()


@pytest.fixture
def settings(redis_url: str) -> Settings:
    return get_settings()


@pytest.fixture
def store(redis_client: redis.Redis, settings: Settings) -> JobStore:
    return JobStore(redis_client, settings)
