"""The Python client's ``wait`` on a live log that falls silent without closing (a dropped network): the stream
counts as broken after ``STREAM_SILENCE_S`` and the job record is asked, instead of waiting for ever."""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

import pytest

from service.client import FixqClient

JOB = "5961923c264d3f72"
HOLD_S = 20.0
"""How long the stalled stream stays open without a byte (a dead peer's connection, as far as the client sees)."""


@pytest.fixture
def stalling_api() -> Iterator[str]:
    """An API whose live log sends one entry and then nothing, and whose job record says ``done``."""

    class Handler(BaseHTTPRequestHandler):
        def do_GET(self) -> None:
            if self.path.endswith("/log"):
                self.send_response(200)
                self.send_header("Content-Type", "text/event-stream")
                self.end_headers()
                self.wfile.write(b'id: 1\nevent: entry\ndata: {"iteration": 1}\n\n')
                self.wfile.flush()
                time.sleep(HOLD_S)
                return
            body = json.dumps({"id": JOB, "state": "done", "iterations": 1}).encode()
            self.send_response(200)
            self.send_header("Content-Type", "application/json")
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def log_message(self, *args: Any) -> None:
            pass

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    server.daemon_threads = True
    server.block_on_close = False
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}"
    finally:
        server.shutdown()
        server.server_close()


def test_a_silent_stream_is_given_up_and_the_record_read(stalling_api: str, monkeypatch) -> None:
    # Before: the stream was read with no read timeout, and wait() sat out the whole silence (HOLD_S here; for
    # ever on a network that dropped the connection).
    monkeypatch.setattr("service.client.STREAM_SILENCE_S", 0.5)
    monkeypatch.setattr("service.client.RECONNECT_S", 0.0)
    seen: list[int] = []
    started = time.monotonic()
    with FixqClient(stalling_api, key="") as client:
        record = client.wait(JOB, on_progress=lambda entry: seen.append(entry["iteration"]))
    assert record["state"] == "done"
    assert time.monotonic() - started < HOLD_S / 2
    assert seen[0] == 1
