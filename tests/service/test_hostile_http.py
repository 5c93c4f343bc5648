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
from tests._documents import print_shop
from tests.service._http import PROBLEM_JSON, make_client

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
"""Expressions outside the grammar (the README's expression reference): no calls beyond the list, no
attributes, no indexing, no strings, no comprehensions; plus ones built to exhaust the parser."""


def corpus() -> Iterator[tuple[str, Any]]:
    """(name, document) of every hostile document; bytes are sent as they are, anything else as JSON."""
    for i, expression in enumerate(EXPRESSIONS):
        yield f"expression {i}: {expression[:40]!r}", with_reward(expression)
    yield "expression in define", grid_document(define={"sold": "__import__('os')"})
    yield "expression in feasible", grid_document(feasible=["stock.__dict__"])
    yield "expression in next", grid_document(next={"stock": "open('x')"})
    yield "expression as a number", grid_document(reward=12)
    yield "parameter named like a builtin", grid_document(params={"__class__": 1.0})

    for depth in (50, 2000, 100_000):
        yield f"JSON nested {depth} deep", b'{"version": 1, "model": ' + b"[" * depth + b"1" + b"]" * depth + b"}"
        yield f"objects nested {depth} deep", b'{"a": ' * depth + b"1" + b"}" * depth
    yield "reward nested 300 deep", tabular(reward=nested(300))

    yield "a million-element reward of the wrong shape", tabular(reward=[0.0] * 1_000_000)
    yield "packed array claiming 10^10 elements", tabular(reward=packed([100_000, 100_000], b"\0" * 64))
    yield "packed array with a bad dtype", tabular(reward=packed([2, 2], b"\0" * 32, dtype="object"))
    yield "packed array that is not base64", tabular(reward={"dtype": "float64", "shape": [2, 2], "base64": "!!"})
    yield "packed array with a negative shape", tabular(reward=packed([-2, -2], b""))
    yield "a billion tabular states", tabular(states=10**9, actions=10**9)
    yield "a billion-point grid", grid_document(states={"stock": {"min": 0, "max": 1, "points": 10**9}})
    yield "a billion points as a product", grid_document(
        states={"stock": {"min": 0, "max": 1, "points": 40_000}, "cash": {"min": 0, "max": 1, "points": 40_000}},
        next={"cash": "cash"},
    )  # fmt: skip
    forty_digits = b"1" + b"0" * 40
    yield "grid points as a 40-digit number", (
        b'{"version": 1, "discount": 0.9, "model": {"kind": "grid", "states": {"k": {"min": 0, "max": 1, "points": '
        + forty_digits + b"}}}}"
    )
    yield "a shock with a billion points", grid_document(
        shocks={"z": {"ar1": {"rho": 0.9, "sigma": 0.1, "points": 10**9}}})  # fmt: skip

    for literal in (b"NaN", b"Infinity", b"-Infinity", b"1e999", b"-1e999"):
        yield f"{literal.decode()} literal", b'{"version": 1, "discount": ' + literal + b', "model": {}}'
    yield "NaN inside a packed reward", tabular(reward=packed([2, 2], b"\0\0\0\0\0\0\xf8\x7f" * 4))
    yield "infinity inside a packed transition", tabular(
        transition=packed([2, 2, 2], b"\0\0\0\0\0\0\xf0\x7f" * 8))  # fmt: skip

    for beta in (1.0, 1, 1.5, 0.0, -0.5, True, "0.9", None):
        yield f"discount {beta!r}", print_shop(discount=beta)
    yield "discount 1 in a grid model", {**grid_document(), "discount": 1.0}

    yield "rows that do not sum to 1", tabular(transition=[[[0.5, 0.6], [1, 0]], [[0, 1], [1, 0]]])
    yield "negative probabilities", tabular(transition=[[[1.5, -0.5], [1, 0]], [[0, 1], [1, 0]]])
    yield "a state with no allowed action", tabular(reward=[[None, None], [1.0, 1.0]])
    yield "an unknown key", {**print_shop(), "shell": "rm -rf /"}
    yield "an unknown version", print_shop(version=99)
    yield "an unknown method", print_shop(solver={"method": "simplex"})
    yield "a warm start from a malformed id", print_shop(solver={"initial": {"job": "../../etc/passwd"}})
    yield "a warm start from nobody's job", print_shop(solver={"initial": {"job": "0123456789abcdef"}})
    yield "a priority that is no queue", print_shop(priority="urgent")
    yield "ten thousand tags", print_shop(tags=[f"t{i}" for i in range(10_000)])
    yield "a label of a million characters", print_shop(label="x" * 1_000_000)
    yield "200,000 unknown keys", {**print_shop(), **{f"k{i}": i for i in range(200_000)}}
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
        content = body if isinstance(body, bytes) else json.dumps(body).encode()
        for path in ("/v1/jobs", "/v1/check"):
            response = caller.post(path, content=content, headers={"content-type": "application/json"})
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
