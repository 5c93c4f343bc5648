"""The service itself: document checks, the schema, health and metrics."""

from __future__ import annotations

from typing import Any

import redis
from fastapi import APIRouter, Request, Response
from fastapi.responses import JSONResponse
from prometheus_client import CONTENT_TYPE_LATEST, generate_latest

from service.admission import admit
from service.deps import JsonObject, Owner, SettingsDep, StoreDep
from service.liveness import live_workers
from worker.document import document_hash, json_schema

__all__ = ["router"]

router = APIRouter()


@router.post("/v1/check", tags=["documents"], openapi_extra={"requestBody": {
    "required": True, "content": {"application/json": {"schema": {"$ref": "/v1/schema"}}}}})  # fmt: skip
def check_document(raw: JsonObject, owner: Owner, store: StoreDep, settings: SettingsDep) -> dict[str, Any]:
    """Validate a document and estimate its size, memory and time; queues nothing."""
    admitted = admit(raw, settings, store=store, may_see=owner.may_see)
    return {
        "valid": True,
        "estimate": admitted.estimate,
        "feasibility": admitted.feasibility,
        "document_hash": document_hash(admitted.document),
    }


@router.get("/v1/schema", tags=["documents"])
def get_schema() -> Response:
    """The JSON Schema (2020-12) of problem documents."""
    return JSONResponse(json_schema(), media_type="application/schema+json")


@router.get("/healthz", tags=["system"])
def health(store: StoreDep) -> JSONResponse:
    """Liveness and Redis reachability: 200 when Redis answers, else 503; `workers` counts live workers."""
    if not store.ping():
        return JSONResponse({"status": "unavailable", "redis": "unreachable"}, status_code=503)
    try:
        workers = live_workers(store)
    except redis.RedisError:
        workers = None
    return JSONResponse({"status": "ok", "redis": "ok", "workers": workers})


@router.get("/metrics", tags=["system"])
def metrics(request: Request) -> Response:
    """Prometheus metrics: jobs by state, queue depths, solve time and iteration histograms."""
    return Response(generate_latest(request.app.state.metrics), media_type=CONTENT_TYPE_LATEST)
