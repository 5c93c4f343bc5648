"""A live log (SSE) ends when its key is revoked, when the API is told to stop, and when Redis goes away.

Jobs here are never run: a queued job's live log would stay open for ever,
so each test also cancels its job after ``SAFETY_S`` (the stream then ends
with ``event: end``), and a stream that ended only then fails the test.
"""

from __future__ import annotations

import json
import os
import signal
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
from fastapi import FastAPI

from service.embedded_redis import EmbeddedRedis, free_port
from service.keys import KeyStore
from service.stopping import STOPPING, watch_stop_signals
from service.store import JobStore
from tests._documents import print_shop
from tests.service._http import make_client, submit
from tests.service._live_server import LiveServer

SAFETY_S = 10.0
"""Seconds after which a test cancels its job, so that a stream that would never end does."""
SSE = {"Accept": "text/event-stream"}


@pytest.fixture(autouse=True)
def not_stopping() -> Iterator[None]:
    STOPPING.clear()
    yield
    STOPPING.clear()


def follow_until_over(client: httpx.Client, store: JobStore, job_id: str, event: threading.Timer) -> tuple[str, float]:
    """Read the live log of ``job_id`` whole while ``event`` fires; its text and seconds taken."""
    safety = threading.Timer(SAFETY_S, store.request_cancel, args=(job_id,))
    started = time.monotonic()
    event.start()
    safety.start()
    try:
        text = client.get(f"/v1/jobs/{job_id}/log", headers=SSE).text
    finally:
        safety.cancel()
        event.cancel()
    return text, time.monotonic() - started


def test_a_revoked_keys_live_log_ends_within_seconds(auth_app: FastAPI, keys: KeyStore, store: JobStore) -> None:
    with make_client(auth_app, Authorization=f"Bearer {keys.add('carol')}") as carol:
        job_id = submit(carol)["id"]
        text, seconds = follow_until_over(carol, store, job_id, threading.Timer(0.5, keys.revoke, args=("carol",)))
    assert "event: error" in text and "revoked" in text and "event: end" not in text
    assert seconds < 0.5 + 2 * 2.0 + 1.0


def test_a_live_log_ends_when_the_api_is_stopping(client: httpx.Client, store: JobStore) -> None:
    job_id = submit(client)["id"]
    text, seconds = follow_until_over(client, store, job_id, threading.Timer(0.5, STOPPING.set))
    assert "event: end" not in text
    assert seconds < 2.0


def test_stop_signals_set_stopping_and_reach_the_previous_handler() -> None:
    seen: list[int] = []
    previous = signal.signal(signal.SIGTERM, lambda sig, frame: seen.append(sig))
    try:
        with watch_stop_signals():
            assert not STOPPING.is_set()
            os.kill(os.getpid(), signal.SIGTERM)
            assert STOPPING.is_set() and seen == [signal.SIGTERM]
        os.kill(os.getpid(), signal.SIGTERM)
        assert seen == [signal.SIGTERM] * 2
    finally:
        signal.signal(signal.SIGTERM, previous)


def test_fixq_api_stops_at_once_with_a_live_log_open(redis_url: str, tmp_path: Path) -> None:
    server = LiveServer(redis_url, tmp_path, FIXQ_AUTH="off").start()
    try:
        job_id = httpx.post(f"{server.url}/v1/jobs", json=print_shop(), timeout=10).json()["id"]
        opened = threading.Event()

        def follow() -> None:
            timeout = httpx.Timeout(5.0, read=SAFETY_S)
            with httpx.stream("GET", f"{server.url}/v1/jobs/{job_id}/log", headers=SSE, timeout=timeout) as stream:
                opened.set()
                for _ in stream.iter_bytes():
                    pass

        reader = threading.Thread(target=follow, daemon=True)
        reader.start()
        assert opened.wait(10)
        time.sleep(0.3)
        ((_, api),) = server.processes
        sent = time.monotonic()
        api.send_signal(signal.SIGTERM)
        api.wait(SAFETY_S)
        assert time.monotonic() - sent < 1.0, server.logs()
        reader.join(5)
    finally:
        server.stop()


def test_a_live_log_open_when_redis_goes_away_ends_with_a_503_event(tmp_path: Path) -> None:
    """Before, the stream was cut off mid-chunk ("incomplete chunked read") and the API logged a traceback."""
    server = EmbeddedRedis(tmp_path / "redis", port=free_port()).start()
    api = LiveServer(server.url, tmp_path, FIXQ_AUTH="off", FIXQ_SSE_POLL_S="0.2").start()
    try:
        job_id = httpx.post(f"{api.url}/v1/jobs", json=print_shop(), timeout=10).json()["id"]
        lines: list[str] = []
        with httpx.stream("GET", f"{api.url}/v1/jobs/{job_id}/log", headers=SSE,
                          timeout=httpx.Timeout(5.0, read=SAFETY_S)) as stream:  # fmt: skip
            threading.Timer(0.5, server.kill).start()
            lines.extend(stream.iter_lines())
        events = [line for line in lines if line.startswith(("event:", "data:", "retry:"))]
        assert events[-3:-1] == ["retry: 5000", "event: error"], lines
        problem = json.loads(events[-1][5:])
        assert problem["status"] == 503 and problem["type"] == "urn:fixq:problem:unavailable", problem
        assert "Exception in ASGI application" not in api.logs()
    finally:
        api.stop()
        server.stop()
