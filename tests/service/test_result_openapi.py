"""``GET /v1/jobs/{id}/result`` in the OpenAPI description: the result document's schema for JSON and the long
table for CSV, as documentation only (the route sends the stored result as it is)."""

from __future__ import annotations

import secrets
from typing import Any

import httpx

from service.result_openapi import CSV_TABLE
from service.store import JobStore
from service.store.layout import dumps
from tests._documents import machine_shop
from worker import solve
from worker.result_document import ResultDocument, result_json_schema

RESULT_PATH = "/v1/jobs/{job_id}/result"


def _done_job(client: httpx.Client, store: JobStore, result: dict[str, Any]) -> str:
    """A job finished with ``result`` stored as the worker stores one."""
    response = client.post("/v1/jobs", json=machine_shop())
    assert response.status_code == 202, response.text
    job_id = response.json()["id"]
    token = secrets.token_hex(8)
    store.claim(job_id, token, worker="test:1")
    assert store.finish(job_id, token, "done", result=result)
    return job_id


def test_the_result_route_documents_the_result_document_and_the_csv_table(client: httpx.Client) -> None:
    spec = client.get("/openapi.json").json()
    content = spec["paths"][RESULT_PATH]["get"]["responses"]["200"]["content"]
    assert content["application/json"]["schema"] == {"$ref": "#/components/schemas/ResultDocument"}
    assert content["text/csv"]["schema"] == {"type": "string", "description": CSV_TABLE}
    components = spec["components"]["schemas"]
    schema = result_json_schema()
    assert list(components["ResultDocument"]["properties"]) == list(schema["properties"])
    for name, definition in schema["$defs"].items():
        # The same objects, with the same keys, as the README's reference is generated from.
        assert list(components[name].get("properties", {})) == list(definition.get("properties", {})), name


def test_a_real_result_sent_over_http_validates_against_the_documented_schema(
    client: httpx.Client, store: JobStore
) -> None:
    job_id = _done_job(client, store, solve(machine_shop(report={"stationary": True})))
    response = client.get(f"/v1/jobs/{job_id}/result")
    assert response.headers["content-type"] == "application/json"
    ResultDocument.model_validate_json(response.content)


def test_the_route_neither_validates_nor_rewrites_the_stored_result(client: httpx.Client, store: JobStore) -> None:
    result = {**solve(machine_shop()), "not_in_the_schema": {"kept": [1, 2, 3]}}
    job_id = _done_job(client, store, result)
    response = client.get(f"/v1/jobs/{job_id}/result")
    assert response.status_code == 200
    assert response.content == dumps(result)  # the bytes stored, unchanged
