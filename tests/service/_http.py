"""Helpers of the in-process HTTP tests: a sync client for the ASGI app, and the few calls they share.

``make_client`` returns a plain synchronous ``httpx.Client`` whose transport
hands each request to the ASGI app (``httpx.ASGITransport``) in a fresh event
loop, so tests stay plain functions; a response is read whole before it is
returned, so a live log (SSE) returns once its job has ended.
"""

from __future__ import annotations

from typing import Any

import anyio
import httpx
from fastapi import FastAPI

from service import queue as rq_queues
from service.keys import KeyStore
from service.store import JobStore
from service.task import run_job
from tests._documents import print_shop

PROBLEM_JSON = "application/problem+json"


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


def client_for(app: FastAPI, keys: KeyStore, name: str, **options: Any) -> httpx.Client:
    """A client of ``app`` carrying a new API key named ``name`` (``options``: its limits)."""
    return make_client(app, Authorization=f"Bearer {keys.add(name, **options)}")


def assert_problem(response: httpx.Response, status: int) -> dict[str, Any]:
    """Check ``response`` is an RFC 9457 problem with ``status``; its body."""
    assert response.status_code == status, response.text
    assert response.headers["content-type"] == PROBLEM_JSON
    body = response.json()
    assert body["status"] == status
    assert body["type"].startswith("urn:fixq:problem:")
    assert body["title"] and body["detail"]
    return body


def run_inline(job_id: str) -> dict[str, Any]:
    """One real execution in this process, taking its RQ entry off the queue as a worker would."""
    store = JobStore.from_settings()
    try:
        record = store.get_job(job_id)
        assert record is not None
        store.redis.lrem(rq_queues.queue_key(record["priority"]), 0, rq_queues.execution_id(job_id, 1))
    finally:
        store.redis.close()
    return run_job(job_id)


def submit(client: httpx.Client, document: dict[str, Any] | None = None, **params: Any) -> dict[str, Any]:
    """POST ``document`` (default :func:`print_shop`) with query ``params``; the 202's record."""
    response = client.post("/v1/jobs", json=document or print_shop(), params=params)
    assert response.status_code == 202, response.text
    return response.json()
