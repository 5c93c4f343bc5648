"""A corpus of hostile documents over HTTP: each is refused 4xx problem+json and never reaches a worker.

The app runs in process with auth on and a valid key (the path a real
caller takes), on the private Redis server.  After the whole corpus, no job
record, document, RQ job or queue entry may exist.
"""

from __future__ import annotations

import base64
import json
from collections.abc import Iterator
from typing import Any

import httpx
import pytest
import redis
from fastapi import FastAPI

from service import queue as rq_queues
from service.app import create_app
from service.keys import KeyStore
from service.settings import Settings
from service.store import JobStore
from tests.service.conftest import make_client
from tests.service.test_auth import PROBLEM_JSON, print_shop

BODY_CAP_MB = 2.0
"""The request-body cap of the app under attack, in MiB (small, so huge bodies stay cheap to send)."""


def grid_document(**model: Any) -> dict[str, Any]:
    """A small invented grid model (a bakery choosing its stock), to be broken in many ways."""
    base: dict[str, Any] = {
        "kind": "grid",
        "params": {"price": 2.0, "cost": 0.5},
        "states": {"stock": {"min": 0.0, "max": 10.0, "points": 11}},
        "choices": {"stock_next": {"next_of": "stock"}},
        "define": {"sold": "min(stock, 4)"},
        "reward": "price * sold - cost * stock_next",
        "feasible": ["stock_next >= stock - sold"],
    }
    base.update(model)
    return {"version": 1, "discount": 0.9, "model": base}


def with_reward(expression: str) -> dict[str, Any]:
    return grid_document(reward=expression)


def packed(shape: list[int], data: bytes, dtype: str = "float64") -> dict[str, Any]:
    return {"dtype": dtype, "shape": shape, "base64": base64.b64encode(data).decode()}


def nested(depth: int) -> Any:
    value: Any = 0.5
    for _ in range(depth):
        value = [value]
    return value


def tabular(**model: Any) -> dict[str, Any]:
    document = print_shop()
    document["model"].update(model)
    return document


EXPRESSIONS = [
    "__import__('os').system('touch /tmp/fixq-pwned')",
    "eval('1 + 1')",
    "exec('x = 1')",
    "open('/etc/passwd')",
    "(lambda: stock)()",
    "stock.__class__.__mro__",
    "().__class__.__bases__[0].__subclasses__()",
    "stock.real",
    "price[0]",
    "[c for c in (1, 2)]",
    "{'a': 1}",
    "'a string'",
    "f'{stock}'",
    "globals()",
    "getattr(stock, 'real')",
    "stock if price else cost",
    "stock; import os",
    "stock := 3",
    "(" * 5000 + "stock" + ")" * 5000,
    "-" * 20000 + "stock",
    "+".join(["stock"] * 50000),
    "unknown_name * 2",
    "log(stock, 2, 3, 4)",
    "\x00stock",
]
"""Expressions outside the grammar (DESIGN section 3b): no calls beyond the list, no attributes, no indexing,
no strings, no comprehensions; plus ones built to exhaust the parser."""


def corpus() -> Iterator[tuple[str, bytes]]:
    """(name, request body) of every hostile document."""
    for i, expression in enumerate(EXPRESSIONS):
        yield f"expression {i}: {expression[:40]!r}", json.dumps(with_reward(expression)).encode()
    yield "expression in define", json.dumps(grid_document(define={"sold": "__import__('os')"})).encode()
    yield "expression in feasible", json.dumps(grid_document(feasible=["stock.__dict__"])).encode()
    yield "expression in next", json.dumps(grid_document(next={"stock": "open('x')"})).encode()
    yield "expression as a number", json.dumps(grid_document(reward=12)).encode()
    yield "parameter named like a builtin", json.dumps(grid_document(params={"__class__": 1.0})).encode()

    for depth in (50, 2000, 100_000):
        yield f"JSON nested {depth} deep", b'{"version": 1, "model": ' + b"[" * depth + b"1" + b"]" * depth + b"}"
        yield f"objects nested {depth} deep", b'{"a": ' * depth + b"1" + b"}" * depth
    yield "reward nested 300 deep", json.dumps(tabular(reward=nested(300))).encode()

    yield "a million-element reward of the wrong shape", json.dumps(tabular(reward=[0.0] * 1_000_000)).encode()
    yield "packed array claiming 10^10 elements", json.dumps(tabular(reward=packed([100_000, 100_000], b"\0" * 64))).encode()
    yield "packed array with a bad dtype", json.dumps(tabular(reward=packed([2, 2], b"\0" * 32, dtype="object"))).encode()
    yield "packed array that is not base64", json.dumps(tabular(reward={"dtype": "float64", "shape": [2, 2], "base64": "!!"})).encode()
    yield "packed array with a negative shape", json.dumps(tabular(reward=packed([-2, -2], b""))).encode()
    yield "a billion tabular states", json.dumps(tabular(states=10**9, actions=10**9)).encode()
    yield "a billion-point grid", json.dumps(grid_document(states={"stock": {"min": 0, "max": 1, "points": 10**9}})).encode()
    yield "a billion points as a product", json.dumps(grid_document(
        states={"stock": {"min": 0, "max": 1, "points": 40_000}, "cash": {"min": 0, "max": 1, "points": 40_000}},
        next={"cash": "cash"},
    )).encode()  # fmt: skip
    yield "grid points as a 40-digit number", b'{"version": 1, "discount": 0.9, "model": {"kind": "grid", "states": {"k": {"min": 0, "max": 1, "points": 1' + b"0" * 40 + b"}}}}"
    yield "a shock with a billion points", json.dumps(grid_document(
        shocks={"z": {"ar1": {"rho": 0.9, "sigma": 0.1, "points": 10**9}}})).encode()  # fmt: skip

    for literal in (b"NaN", b"Infinity", b"-Infinity", b"1e999", b"-1e999"):
        yield f"{literal.decode()} literal", b'{"version": 1, "discount": ' + literal + b', "model": {"kind": "tabular"}}'
    yield "NaN inside a packed reward", json.dumps(tabular(reward=packed([2, 2], b"\0\0\0\0\0\0\xf8\x7f" * 4))).encode()
    yield "infinity inside a packed transition", json.dumps(tabular(
        transition=packed([2, 2, 2], b"\0\0\0\0\0\0\xf0\x7f" * 8))).encode()  # fmt: skip

    for beta in (1.0, 1, 1.5, 0.0, -0.5, True, "0.9", None):
        document = print_shop(discount=beta)
        yield f"discount {beta!r}", json.dumps(document).encode()
    yield "discount 1 in a grid model", json.dumps({**grid_document(), "discount": 1.0}).encode()

    yield "rows that do not sum to 1", json.dumps(tabular(transition=[[[0.5, 0.6], [1, 0]], [[0, 1], [1, 0]]])).encode()
    yield "negative probabilities", json.dumps(tabular(transition=[[[1.5, -0.5], [1, 0]], [[0, 1], [1, 0]]])).encode()
    yield "a state with no allowed action", json.dumps(tabular(reward=[[None, None], [1.0, 1.0]])).encode()
    yield "an unknown key", json.dumps({**print_shop(), "shell": "rm -rf /"}).encode()
    yield "an unknown version", json.dumps(print_shop(version=99)).encode()
    yield "an unknown method", json.dumps(print_shop(solver={"method": "simplex"})).encode()
    yield "a warm start from a malformed id", json.dumps(print_shop(solver={"initial": {"job": "../../etc/passwd"}})).encode()
    yield "a warm start from nobody's job", json.dumps(print_shop(solver={"initial": {"job": "0123456789abcdef"}})).encode()
    yield "a priority that is no queue", json.dumps(print_shop(priority="urgent")).encode()
    yield "ten thousand tags", json.dumps(print_shop(tags=[f"t{i}" for i in range(10_000)])).encode()
    yield "a label of a million characters", json.dumps(print_shop(label="x" * 1_000_000)).encode()
    yield "a million unknown keys", json.dumps({**print_shop(), **{f"k{i}": i for i in range(200_000)}}).encode()
    yield "not an object", b"[1, 2, 3]"
    yield "not JSON", b"\xff\xfe\x00garbage"
    yield "an empty body", b""
    yield "a huge body", b'{"label": "' + b"x" * int((BODY_CAP_MB + 1) * 2**20) + b'"}'


@pytest.fixture
def hostile_app(settings: Settings, redis_client: redis.Redis) -> FastAPI:
    return create_app(settings.model_copy(update={"auth": True, "max_body_mb": BODY_CAP_MB}))


@pytest.fixture
def caller(hostile_app: FastAPI, redis_client: redis.Redis, settings: Settings) -> Iterator[httpx.Client]:
    key = KeyStore(redis_client, settings.redis_prefix).add("mallory")
    with make_client(hostile_app, Authorization=f"Bearer {key}") as client:
        yield client


def nothing_reached_a_worker(store: JobStore, redis_client: redis.Redis) -> None:
    assert sum(store.counts_by_state().values()) == 0
    assert redis_client.zcard(store.keys.jobs) == 0
    assert store.queue_depths() == {priority: 0 for priority in rq_queues.PRIORITIES}
    leftovers = [name for pattern in ("rq:job:*", f"{store.keys.prefix}:doc:*", f"{store.keys.prefix}:job:*")
                 for name in redis_client.scan_iter(match=pattern)]  # fmt: skip
    assert leftovers == []


def test_every_hostile_document_is_refused_4xx_and_queues_nothing(
    caller: httpx.Client, store: JobStore, redis_client: redis.Redis
) -> None:
    seen = []
    for name, body in corpus():
        for path in ("/v1/jobs", "/v1/check"):
            response = caller.post(path, content=body, headers={"content-type": "application/json"})
            assert 400 <= response.status_code < 500, (name, path, response.status_code, response.text[:500])
            assert response.headers["content-type"] == PROBLEM_JSON, (name, path)
            problem = response.json()
            assert problem["status"] == response.status_code and problem["detail"], (name, path)
        seen.append(name)
    assert len(seen) > 70
    nothing_reached_a_worker(store, redis_client)
    assert not __import__("os").path.exists("/tmp/fixq-pwned")


def test_refusals_say_what_is_wrong_where(caller: httpx.Client) -> None:
    def problem(document: dict[str, Any]) -> dict[str, Any]:
        return caller.post("/v1/jobs", json=document).json()

    beta = problem(print_shop(discount=1.0))
    assert beta["status"] == 422 and beta["errors"][0]["path"] == "discount"
    attribute = problem(with_reward("stock.__class__"))
    assert attribute["status"] == 422 and attribute["errors"][0]["path"] == "model.reward"
    billion = problem(grid_document(states={"stock": {"min": 0, "max": 1, "points": 10**9}}))
    assert billion["status"] in (413, 422)
    assert any("points" in e["path"] or e["path"] == "model" for e in billion["errors"]), billion
    nan = caller.post("/v1/jobs", content=b'{"discount": NaN}', headers={"content-type": "application/json"}).json()
    assert nan["status"] == 400 and nan["line"] == 1


def test_hostile_idempotency_keys_change_nothing(
    caller: httpx.Client, store: JobStore, redis_client: redis.Redis
) -> None:
    overlong = caller.post("/v1/jobs", json=print_shop(), headers={"Idempotency-Key": "k" * 257})
    assert overlong.status_code == 400 and overlong.json()["errors"][0]["path"].endswith("idempotency-key")
    for key in ("\u2028newline".encode(), "a" * 256, "../../fixq:jobs", "*", "\x00"):
        response = caller.post("/v1/jobs", json=print_shop(discount=1.0), headers={"Idempotency-Key": key})
        assert response.status_code == 422 and response.headers["content-type"] == PROBLEM_JSON
    nothing_reached_a_worker(store, redis_client)
