"""``/v1/sweeps``: one base document × parameter values → many jobs, one table.

A sweep's record carries its rows as a list page, ``"rows": {"data": [...],
"next": ...}`` (``?cursor=`` and ``?limit=`` page through them, ``next``
being the index of the next row); ``?format=csv`` gives every row as one
table.  ``GET /v1/sweeps`` lists the records without their rows.
"""

from __future__ import annotations

import csv
import io
from typing import Annotated, Any, Literal

import orjson
from fastapi import APIRouter, Header, Query, Request, Response
from pydantic import BaseModel, ConfigDict

from service.deps import JsonObject, Owner, SettingsDep, StoreDep, api_key_of
from service.limits import quota_for
from service.problems import Problem
from service.store import JobStore
from service.sweeps import (
    MODES,
    ROW_STATES,
    SWEEP_STATES,
    Sweep,
    SweepRequest,
    cancel_sweep,
    create_sweep,
    list_sweeps,
    load_sweep,
    sweep_view,
)
from service.tables import csv_text

__all__ = ["router"]

router = APIRouter(prefix="/v1/sweeps", tags=["sweeps"])

ROWS_PAGE_DEFAULT = 100
"""Rows in one page of a sweep when ``limit`` is not given (rows)."""
ROWS_PAGE_MAX = 1000
"""Most rows in one page of a sweep (rows)."""
LIST_PAGE_MAX = 200
"""Most sweeps in one page of ``GET /v1/sweeps`` (sweeps)."""

RowState = Literal[ROW_STATES]


class SweepRow(BaseModel):
    """One combination: its values by path, its job and how the job ended."""

    model_config = ConfigDict(extra="allow")
    index: int
    values: dict[str, Any]
    job: str | None
    state: RowState
    status: str | None = None
    iterations: int | None = None
    error_bound: float | None = None
    means: dict[str, float] | None = None
    error: dict[str, Any] | None = None
    after: int | None = None
    search: dict[str, Any] | None = None
    """A search's summary from the job record (status, unknowns, residuals, trials); null without a search."""


class RowPage(BaseModel):
    """One page of rows, in combination order; ``next`` is the index of the next page."""

    data: list[SweepRow]
    next: int | None


class SweepSummary(BaseModel):
    """A sweep without its rows."""

    model_config = ConfigDict(extra="allow")
    id: str
    owner: str
    label: str | None = None
    tags: list[str] = []
    priority: str
    mode: Literal[MODES]
    chain: bool
    vary: dict[str, list[Any]]
    combinations: int
    tag: str
    submitted_at: str
    canceled_at: str | None = None
    links: dict[str, str] = {}


class SweepRecord(SweepSummary):
    """A sweep: its request, ``state`` (active, done, canceled), counts of rows by state, and a page of rows."""

    state: Literal[SWEEP_STATES]
    counts: dict[str, int]
    rows: RowPage


class SweepPage(BaseModel):
    """One page of sweeps, newest first; ``next`` is the cursor of the next page."""

    data: list[SweepSummary]
    next: str | None


def _sweep_or_404(store: JobStore, sweep_id: str, owner: Owner) -> Sweep:
    sweep = load_sweep(store, sweep_id)
    if sweep is None or not owner.may_see(sweep.record):
        raise Problem(404, "not-found", f"there is no sweep {sweep_id!r}")
    return sweep


@router.post("", status_code=202, response_model=SweepRecord, openapi_extra={"requestBody": {
    "required": True, "content": {"application/json": {"schema": SweepRequest.model_json_schema()}}}})  # fmt: skip
def submit_sweep(
    body: JsonObject,
    owner: Owner,
    store: StoreDep,
    settings: SettingsDep,
    response: Response,
    request: Request,
    idempotency_key: Annotated[str | None, Header(max_length=256)] = None,
    fresh: Annotated[bool, Query(description=(
        "Solve every row again, even one whose document this key already solved (otherwise such a row is "
        "answered at once from that job, as a submission is)."))] = False,
) -> dict[str, Any]:
    """Check every combination of a base document and values, then queue their jobs; answers the sweep."""
    quota = quota_for(settings, owner.owner, api_key_of(request))
    sweep = create_sweep(body, owner, store, settings, idempotency_key=idempotency_key, quota=quota, fresh=fresh)
    response.headers["Location"] = f"/v1/sweeps/{sweep.id}"
    return sweep_view(sweep, limit=ROWS_PAGE_DEFAULT)


@router.get("", response_model=SweepPage)
def list_all(
    owner: Owner,
    store: StoreDep,
    cursor: Annotated[str | None, Query(max_length=200, description="The `next` of the previous page.")] = None,
    limit: Annotated[int, Query(ge=1, le=LIST_PAGE_MAX, description="Most sweeps on the page.")] = 50,
) -> dict[str, Any]:
    """List sweeps, newest first, without their rows; paginated."""
    try:
        records, next_cursor = list_sweeps(store, owner=owner.listed_owner, cursor=cursor, limit=limit)
    except ValueError as exc:
        errors = [{"path": "query.cursor", "message": str(exc)}]
        raise Problem(400, "invalid-request", str(exc), errors=errors) from None
    return {"data": records, "next": next_cursor}


@router.get("/{sweep_id}", response_model=SweepRecord, responses={200: {"content": {"text/csv": {}}}})
def get_sweep(
    sweep_id: str,
    owner: Owner,
    store: StoreDep,
    request: Request,
    cursor: Annotated[int, Query(ge=0, description="Index of the first row (the `next` of the previous page).")] = 0,
    limit: Annotated[int, Query(ge=1, le=ROWS_PAGE_MAX, description="Most rows on the page.")] = ROWS_PAGE_DEFAULT,
    format: Annotated[Literal["json", "csv"] | None, Query(description="json (default) or csv: every row.")] = None,
) -> Any:
    """The sweep with a page of rows (values, job, state, iterations, error bound, means); `?format=csv` a table."""
    sweep = _sweep_or_404(store, sweep_id, owner)
    if format is None:
        format = "csv" if "text/csv" in request.headers.get("accept", "") else "json"
    if format == "csv":
        view = sweep_view(sweep, limit=None)
        return Response(
            _csv(list(sweep.record["vary"]), view["rows"]["data"]),
            media_type="text/csv; charset=utf-8",
            headers={"Content-Disposition": f'attachment; filename="fixq-sweep-{sweep.id}.csv"'},
        )
    return sweep_view(sweep, cursor=cursor, limit=limit)


@router.delete("/{sweep_id}", response_model=SweepRecord, responses={202: {"model": SweepRecord}})
def cancel(sweep_id: str, owner: Owner, store: StoreDep, response: Response) -> dict[str, Any]:
    """Cancel the sweep's remaining jobs and create no more; 202 while running ones are still stopping."""
    sweep = _sweep_or_404(store, sweep_id, owner)
    outcomes = cancel_sweep(sweep)
    if outcomes["cancel_requested"]:
        response.status_code = 202
    return sweep_view(sweep, limit=ROWS_PAGE_DEFAULT)


def _csv(paths: list[str], rows: list[dict[str, Any]]) -> str:
    """One header, then one line per combination: index, values, job, state, status, iterations,
    error bound, ``mean.{name}`` for every stationary mean any row reports, with a search ``search.status`` and
    ``search.{name}`` for every unknown any row reports, and the error."""
    mean_names = list(dict.fromkeys(name for row in rows for name in (row.get("means") or {})))
    searched = [row["search"] for row in rows if row.get("search")]
    unknown_names = list(dict.fromkeys(name for search in searched for name in (search.get("unknowns") or {})))
    search_header = ["search.status", *(f"search.{name}" for name in unknown_names)] if searched else []
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow([csv_text(name) for name in ["index", *paths, "job", "state", "status", "iterations",
                     "error_bound", *(f"mean.{name}" for name in mean_names), *search_header, "error"]])  # fmt: skip
    for row in rows:
        means = row.get("means") or {}
        search = row.get("search") or {}
        found = [search.get("status") or "", *((search.get("unknowns") or {}).get(n) for n in unknown_names)]
        error = row.get("error") or {}
        writer.writerow([
            row["index"], *(_cell(row["values"][path]) for path in paths), *map(_cell, (row["job"] or "",
            row["state"], row["status"] or "")), _cell(row["iterations"]), _cell(row["error_bound"]),
            *(_cell(means.get(name)) for name in mean_names), *(map(_cell, found) if searched else ()),
            _cell(error.get("detail") or error.get("title") or ""),
        ])  # fmt: skip
    return buffer.getvalue()


def _cell(value: Any) -> Any:
    if value is None:
        return ""
    if isinstance(value, (dict, list)):
        return orjson.dumps(value).decode()
    if isinstance(value, float):
        return repr(value)
    return csv_text(value)
