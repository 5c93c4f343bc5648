"""Request bodies: large inline arrays are refused before parsing, and parsing never holds the event loop.

A body writing more than ``max_inline_elements`` values inline is answered
413 before any Python object is built (the same arrays packed are welcome);
the parse of the bodies that pass runs in a worker thread, so ``/healthz``
answers while a large one is being read.
"""

from __future__ import annotations

import base64
import time

import anyio
import httpx
import numpy as np
import orjson
import pytest
from fastapi import FastAPI

from service import deps
from service.app import create_app
from service.bodylimit import inline_values
from service.settings import Settings
from tests._documents import machine_shop
from tests.service._http import assert_problem, make_client

STATES = 40
"""States of the invented chain below: 40 × 1 × 40 = 1,600 transition probabilities."""


def ring_shop() -> dict:
    """An invented shop whose machine moves round a ring of STATES states; transition written inline."""
    transition = np.zeros((STATES, 1, STATES))
    for state in range(STATES):
        transition[state, 0, (state + 1) % STATES] = 1.0
    model = {"kind": "tabular", "states": [f"stage {i}" for i in range(STATES)], "actions": ["run"],
             "reward": [[float(i % 5)] for i in range(STATES)], "transition": transition.tolist()}  # fmt: skip
    return machine_shop(model=model)


def packed(array: list) -> dict:
    values = np.asarray(array, dtype="<f8")
    return {"dtype": "float64", "shape": list(values.shape), "base64": base64.b64encode(values.tobytes()).decode()}


@pytest.fixture
def small_cap_app(app_settings: Settings, redis_client: object) -> FastAPI:
    return create_app(app_settings.model_copy(update={"max_inline_elements": 1000}))


def test_inline_values_counts_separators_and_containers_outside_strings() -> None:
    assert inline_values(b"[1,2,3]") == 3
    assert inline_values(b"[[[[[1]]]]]") == 5  # nesting cannot hide the lists it makes
    assert inline_values(b'{"a": "x,[y{,z", "b": [1, 2]}') == 4
    assert inline_values(b'{"a": "x\\",[y", "b": [1, 2]}') == 4
    assert inline_values(b'{"a": "x\\\\", "b": [1, 2]}') == 4
    assert inline_values(b'"unclosed, [string') == 0


@pytest.mark.parametrize("route", ["/v1/jobs", "/v1/check", "/v1/sweeps"])
def test_too_many_inline_values_are_413_and_packed_arrays_pass(small_cap_app: FastAPI, route: str) -> None:
    document = ring_shop()
    body = {"base": document, "vary": {"discount": [0.9]}} if route == "/v1/sweeps" else document
    with make_client(small_cap_app) as client:
        problem = assert_problem(client.post(route, content=orjson.dumps(body)), 413)
        assert problem["type"].endswith("too-many-inline-values") and problem["max_inline_elements"] == 1000
        assert "packed ({dtype, shape, base64})" in problem["detail"] and "README" in problem["detail"]
        document["model"]["transition"] = packed(document["model"]["transition"])
        assert client.post(route, content=orjson.dumps(body)).status_code in (200, 202)


def test_commas_inside_strings_do_not_count(small_cap_app: FastAPI) -> None:
    document = machine_shop(label="a, " * 2000)
    with make_client(small_cap_app) as client:
        response = client.post("/v1/check", content=orjson.dumps(document))
    assert response.status_code != 413, response.text


def test_parsing_a_body_does_not_hold_the_event_loop(app: FastAPI, monkeypatch: pytest.MonkeyPatch) -> None:
    parse = orjson.loads

    def slow_parse(text: bytes) -> object:
        time.sleep(1.0)  # a large document's parse, holding its thread
        return parse(text)

    monkeypatch.setattr(deps.orjson, "loads", slow_parse)
    answered: dict[str, float] = {}

    async def scenario() -> None:
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://fixq.test") as client:
            started = time.monotonic()

            async def post() -> None:
                await client.post("/v1/check", content=orjson.dumps(machine_shop()))
                answered["post"] = time.monotonic() - started

            async def health() -> None:
                await anyio.sleep(0.2)
                await client.get("/healthz")
                answered["healthz"] = time.monotonic() - started

            async with anyio.create_task_group() as group:
                group.start_soon(post)
                group.start_soon(health)

    anyio.run(scenario)
    assert answered["post"] >= 1.0
    assert answered["healthz"] < 0.9, answered
