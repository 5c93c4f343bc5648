"""API fuzzing with schemathesis against the app's own OpenAPI document: no input may cause a 5xx.

The OpenAPI document names the problem-document schema by reference
(``{"$ref": "/v1/schema"}``); the test inlines that JSON Schema into
``components`` so schemathesis generates bodies from it, both conforming and
broken ones.  Every operation is called with a valid key (auth on), a fixed
number of examples each (``derandomize``: the same cases every run), and
every answer must be below 500; error answers must be problem+json.  Bounded
to well under a minute.
"""

from __future__ import annotations

import copy
from collections import Counter
from typing import Any

import pytest
import redis
import schemathesis
from fastapi import FastAPI
from hypothesis import HealthCheck, given
from hypothesis import settings as hypothesis_settings
from hypothesis import strategies as st

from service.app import create_app
from service.examples import load_example
from service.keys import KeyStore
from service.settings import Settings
from tests.service._http import make_client
from worker.document import json_schema

MUTATIONS = 150
"""Documents the mutation fuzzer sends (count), each to /v1/check and /v1/jobs."""
EXAMPLES_PER_OPERATION = 25
"""Generated cases per operation (count): enough to cross every parameter's edges, small enough to be quick."""
PROBLEM_JSON = "application/problem+json"
DOCUMENT_PREFIX = "ProblemDocument_"


def inline_document_schema(spec: dict[str, Any]) -> dict[str, Any]:
    """``spec`` with each reference to ``/v1/schema`` pointing at the problem-document schema, in ``components``."""
    document = json_schema()
    definitions = document.pop("$defs", {})
    document.pop("$schema", None)

    def rewrite(node: Any) -> Any:
        if isinstance(node, dict):
            out = {key: rewrite(value) for key, value in node.items()}
            ref = out.get("$ref")
            if isinstance(ref, str) and ref.startswith("#/$defs/"):
                out["$ref"] = "#/components/schemas/" + DOCUMENT_PREFIX + ref[len("#/$defs/") :]
            elif ref in ("#", "/v1/schema"):
                out["$ref"] = "#/components/schemas/ProblemDocument"
            return out
        if isinstance(node, list):
            return [rewrite(item) for item in node]
        return node

    spec = rewrite(spec)
    schemas = spec.setdefault("components", {}).setdefault("schemas", {})
    schemas.update({DOCUMENT_PREFIX + name: rewrite(value) for name, value in definitions.items()})
    schemas["ProblemDocument"] = rewrite(document)
    return spec


@pytest.fixture
def fuzzed_app(settings: Settings, redis_client: redis.Redis) -> FastAPI:
    return create_app(settings.model_copy(update={"auth": True, "max_body_mb": 1.0}))


def test_no_generated_request_gets_a_5xx(fuzzed_app: FastAPI, redis_client: redis.Redis, settings: Settings) -> None:
    key = KeyStore(redis_client, settings.redis_prefix).add("fuzzer")
    spec = inline_document_schema(fuzzed_app.openapi())
    schema = schemathesis.openapi.from_dict(spec)
    schema.app = fuzzed_app
    headers = {"Authorization": f"Bearer {key}"}
    failures: list[str] = []
    statuses: Counter[tuple[str, int]] = Counter()
    operations = [result.ok() for result in schema.get_all_operations()]
    assert len(operations) >= 10

    for operation in operations:

        @given(case=operation.as_strategy())
        @hypothesis_settings(
            max_examples=EXAMPLES_PER_OPERATION, deadline=None, derandomize=True, database=None,
            suppress_health_check=list(HealthCheck),
        )  # fmt: skip
        def call(case: schemathesis.Case) -> None:
            response = case.call(headers=headers)
            statuses[(f"{case.method} {operation.path}", response.status_code)] += 1
            if response.status_code >= 500:
                failures.append(f"{case.method} {case.formatted_path}: {response.status_code} {response.text[:300]}")
            elif response.status_code >= 400:
                assert response.headers.get("content-type", [""])[0].startswith(PROBLEM_JSON) or response.headers.get(
                    "content-type"
                ) == PROBLEM_JSON, (case.method, case.formatted_path, response.headers)

        call()
    assert failures == []
    answered = {status for (_, status) in statuses}
    # The key was accepted (not everything is 401), and both good and bad requests were generated.
    assert statuses[("POST /v1/jobs", 401)] == 0 and {200, 404, 422} <= answered, statuses


JSON_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers(min_value=-(2**63), max_value=2**63 - 1)
    | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=30),
    lambda children: st.lists(children, max_size=4) | st.dictionaries(st.text(max_size=10), children, max_size=4),
    max_leaves=12,
)
"""Any JSON value (strict JSON: no NaN or infinity, integers within 64 bits as orjson reads them)."""


def paths_of(value: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    """Every path (keys and indices) inside a JSON value, the value itself included."""
    paths = [prefix]
    if isinstance(value, dict):
        for key, item in value.items():
            paths += paths_of(item, (*prefix, key))
    elif isinstance(value, list):
        for index, item in enumerate(value[:3]):
            paths += paths_of(item, (*prefix, index))
    return paths


def replaced(document: Any, path: tuple[Any, ...], value: Any) -> Any:
    if not path:
        return value
    out = copy.deepcopy(document)
    node = out
    for step in path[:-1]:
        node = node[step]
    node[path[-1]] = value
    return out


SEEDS = [load_example("machine_replacement"), load_example("household_saving"), load_example("translator_contracts")]
"""Valid documents (bundled invented examples) that the mutation fuzzer breaks one field at a time."""


def test_valid_documents_with_one_field_replaced_never_get_a_5xx(
    fuzzed_app: FastAPI, redis_client: redis.Redis, settings: Settings
) -> None:
    key = KeyStore(redis_client, settings.redis_prefix).add("mutator")
    seen: Counter[int] = Counter()
    mutations = st.sampled_from(SEEDS).flatmap(
        lambda seed: st.tuples(st.just(seed), st.sampled_from(paths_of(seed)), JSON_VALUES)
    )
    with make_client(fuzzed_app, Authorization=f"Bearer {key}") as client:

        @given(mutation=mutations)
        @hypothesis_settings(
            max_examples=MUTATIONS, deadline=None, derandomize=True, database=None,
            suppress_health_check=list(HealthCheck),
        )  # fmt: skip
        def submit(mutation: tuple[dict[str, Any], tuple[Any, ...], Any]) -> None:
            seed, path, value = mutation
            document = replaced(seed, path, value)
            for route in ("/v1/check", "/v1/jobs"):
                response = client.post(route, params={"fresh": "true"}, json=document)
                seen[response.status_code] += 1
                assert response.status_code < 500, (route, path, value, response.text[:300])
                if response.status_code >= 400:
                    assert response.headers["content-type"] == PROBLEM_JSON, (route, path, value)

        submit()
    assert seen[422] > 0 and (seen[200] + seen[202]) > 0, seen
