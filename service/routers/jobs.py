"""``/v1/jobs``: submit, read, follow, cancel and list jobs.

A submission passes, in order: the caller's ``Idempotency-Key`` (a replay
answers the job it made, ``service.resubmission``), the door
(``service.submission.admit_submission``: validation, size, warm start from
the caller's own jobs, webhook target), the key's memory cap
(``service.limits``), the reuse of a solved twin (answered ``201`` with a job
that is already ``done``; ``?fresh=true`` skips it), and the key's caps on
active jobs, taken race-free before the job is created (``429``).
"""

from __future__ import annotations

import logging
import time
import zlib
from collections.abc import AsyncIterator, Callable
from functools import partial
from typing import Annotated, Any, Literal

import anyio
import orjson
from fastapi import APIRouter, Header, Query, Request, Response
from fastapi.responses import StreamingResponse
from pydantic import BaseModel, ConfigDict

from service import webhooks
from service.accept import wants_csv
from service.deps import Caller, JsonObject, Owner, SettingsDep, StoreDep, api_key_of, current_owner
from service.flat import flat_result
from service.keys import ApiKey
from service.limits import ActiveJobs, check_problem_size, quota_for
from service.problems import STORE_UNAVAILABLE, TYPE_PREFIX, UNAVAILABLE_DETAIL, Problem
from service.resubmission import IdempotencyKeys, SolvedJobs, start_free_hash, with_reuse_fields
from service.result_openapi import RESULT_RESPONSES
from service.settings import Settings
from service.stopping import STOPPING
from service.store import TERMINAL_STATES, JobStore, is_job_id
from service.submission import admit_submission, admitted_summary
from service.tables import csv_chunks
from worker.convergence_log import KEEP_LATEST

__all__ = ["router", "solved_job"]

ARRAYS_QUERY = (
    "nested (default): arrays as nested lists, the first axis outermost; flat: every numeric array as "
    "{shape, order, data}, data the elements in one list (see order), for one reshape in R, Julia or MATLAB."
)
ORDER_QUERY = (
    "With arrays=flat: row_major (default; last index fastest, numpy's C order) or column_major (first index "
    "fastest: R's array(data, dim = shape), Julia's and MATLAB's reshape(data, shape))."
)

router = APIRouter(prefix="/v1/jobs", tags=["jobs"])
logger = logging.getLogger("fixq.service")

LOG_PAGE_MAX = 1000
"""Most log entries in one page of ``GET /v1/jobs/{id}/log`` (entries)."""
LIST_PAGE_MAX = 200
"""Most jobs in one page of ``GET /v1/jobs`` (jobs)."""
SSE_FIRST_POLL_S = 0.005
"""Seconds between the first polls of a live log."""
SSE_POLL_GROWTH = 1 / 100
"""Poll wait added per second a live log has been open (s/s), up to ``sse_poll_s``: short
jobs are followed closely (their end is seen within milliseconds), long ones cheaply."""
SSE_KEEPALIVE_S = 15.0
"""Seconds of silence after which a live log sends a comment line, so proxies keep it open."""
SSE_BATCH = 500
"""Most log entries read from Redis per poll of a live log (entries)."""
SSE_KEY_CHECK_S = 2.0
"""Seconds between two checks, inside a live log, that the caller's key is still valid (revoked: it ends)."""

MAX_LOG_INDEX = 10**12
"""Largest log index a client may name (Redis list indices are 64-bit)."""

JobState = Literal["queued", "running", "done", "failed", "canceled"]


class Progress(BaseModel):
    """The latest convergence-log entry of a running job."""

    model_config = ConfigDict(extra="allow")
    iteration: int | None = None
    distance: float | None = None
    error_bound: float | None = None
    seconds: float | None = None


class JobRecord(BaseModel):
    """A job: its state, times, progress and, once finished, how it ended."""

    model_config = ConfigDict(extra="allow")
    id: str
    state: JobState
    label: str | None = None
    tags: list[str] = []
    owner: str | None = None
    priority: str | None = None
    submitted_at: str | None = None
    started_at: str | None = None
    finished_at: str | None = None
    attempts: int = 0
    progress: Progress | None = None
    estimate: dict[str, Any] | None = None
    status: str | None = None
    iterations: int | None = None
    error_bound: float | None = None
    search: dict[str, Any] | None = None
    error: dict[str, Any] | None = None
    reused: bool = False
    reused_from: str | None = None
    links: dict[str, str] = {}


class JobPage(BaseModel):
    """One page of jobs, newest first; ``next`` is the cursor of the next page."""

    data: list[JobRecord]
    next: str | None


class LogPage(BaseModel):
    """One page of the convergence log; ``next`` is the cursor of the next page.

    The stored log is bounded (``worker.convergence_log``): every early
    iteration, then a sampling, then the latest ones; ``dropped`` counts the
    iterations it no longer holds.
    """

    data: list[dict[str, Any]]
    next: int | None
    dropped: int = 0


def _job_or_404(store: JobStore, job_id: str, owner: Owner) -> dict[str, Any]:
    record = store.get_job(job_id) if is_job_id(job_id) else None
    if record is None or not owner.may_see(record):
        raise Problem(404, "not-found", f"there is no job {job_id!r}")
    return record


_PROBLEM = {"content": {"application/problem+json": {}}}


@router.post(
    "",
    status_code=202,
    response_model=JobRecord,
    responses={
        201: {"model": JobRecord, "description": "The caller solved this problem already: a new job, done at once."},
        409: {**_PROBLEM, "description": "A request with the same Idempotency-Key is still being handled."},
        413: {**_PROBLEM, "description": "The body, or the problem's estimated memory, is over a cap."},
        422: {**_PROBLEM, "description": "An invalid document, or an Idempotency-Key reused with another body."},
        429: {**_PROBLEM, "description": "The key has as many active (or high-priority) jobs as its cap allows."},
    },
    openapi_extra={"requestBody": {
        "required": True, "content": {"application/json": {"schema": {"$ref": "/v1/schema"}}}}},
)  # fmt: skip
def submit_job(
    owner: Owner,
    raw: JsonObject,
    store: StoreDep,
    settings: SettingsDep,
    request: Request,
    response: Response,
    idempotency_key: Annotated[
        str | None,
        Header(max_length=256, description="Resending a body with the same key answers the job it made (per key)."),
    ] = None,
    fresh: Annotated[
        bool, Query(description="Solve again even if this key has already solved the same problem.")
    ] = False,
) -> dict[str, Any]:
    """Validate a problem document and queue it (202); one the caller already solved is answered done (201)."""
    idempotency = IdempotencyKeys(store)
    claim = None
    if idempotency_key is not None:
        found = idempotency.begin(owner.owner, idempotency_key, raw)
        if isinstance(found, dict):
            response.headers["Location"] = f"/v1/jobs/{found['id']}"
            response.headers["Idempotent-Replayed"] = "true"
            return with_reuse_fields(store, [found])[0]
        claim = found
    try:
        job_id = claim.job_id if claim is not None else None
        record, reused = _create(raw, owner, api_key_of(request), store, settings, fresh=fresh, job_id=job_id)
    except BaseException:
        if claim is not None:
            idempotency.abandon(claim)
        raise
    if claim is not None:
        idempotency.complete(claim, record["id"])
    if reused:
        response.status_code = 201
    response.headers["Location"] = f"/v1/jobs/{record['id']}"
    return with_reuse_fields(store, [record])[0]


def _create(
    raw: dict[str, Any], owner: Caller, key: ApiKey | None, store: JobStore, settings: Settings, *, fresh: bool,
    job_id: str | None = None,
) -> tuple[dict[str, Any], bool]:  # fmt: skip
    """Admit ``raw`` and make its job (with ``job_id``, an idempotency claim's, if given): (record, True) for a
    reused solve, (record, False) for a queued one."""
    admitted = admit_submission(raw, settings, store, may_see=owner.may_see)
    quota = quota_for(settings, owner.owner, key)
    check_problem_size(quota, admitted.estimate)
    summary = admitted_summary(admitted)
    solved = SolvedJobs(store)
    unqueued = None
    start_free = start_free_hash(admitted.document)
    earlier = None if fresh else (solved.find(owner.owner, summary["document_hash"])
                                  or solved.find_start_free(owner.owner, start_free))
    if earlier is not None:
        record, reused = solved.create_reused(raw, earlier, owner=owner.owner, job_id=job_id, **summary)
        if reused:
            if raw.get("notify") is not None:
                webhooks.schedule(store, record["id"])
            return record, True
        # The earlier result expired a moment ago: this job is solved afresh.
        unqueued = record
    active = ActiveJobs(store.redis, settings.redis_prefix)
    try:
        reservation = active.reserve(quota, high=admitted.document.priority == "high")
    except Problem:
        if unqueued is not None:
            store.request_cancel(unqueued["id"])
        raise
    try:
        if unqueued is None:
            record = store.create_job(raw, owner=owner.owner, job_id=job_id, **summary)
        else:
            solved.enqueue(unqueued)
            record = unqueued
    except BaseException:
        active.release(reservation)
        raise
    active.bind(reservation, [record["id"]])
    solved.remember(owner.owner, summary["document_hash"], record["id"])
    solved.remember_start_free(owner.owner, start_free, record["id"])
    return record, False


@router.get("", response_model=JobPage)
def list_jobs(
    owner: Owner,
    store: StoreDep,
    state: Annotated[list[JobState] | None, Query(description="Only jobs in these states (repeatable).")] = None,
    tag: Annotated[str | None, Query(max_length=200, description="Only jobs carrying this tag.")] = None,
    label: Annotated[str | None, Query(max_length=500, description="Only jobs with exactly this label.")] = None,
    cursor: Annotated[str | None, Query(max_length=200, description="The `next` of the previous page.")] = None,
    limit: Annotated[int, Query(ge=1, le=LIST_PAGE_MAX, description="Most jobs on the page.")] = 50,
) -> dict[str, Any]:
    """List jobs, newest first, filtered by state, tag or label; paginated."""
    try:
        records, next_cursor = store.list_jobs(
            owner=owner.listed_owner, state=state, tag=tag, label=label, cursor=cursor, limit=limit
        )
    except ValueError as exc:
        error = {"path": "query.cursor", "message": str(exc)}
        raise Problem(400, "invalid-request", str(exc), errors=[error]) from None
    return {"data": with_reuse_fields(store, records), "next": next_cursor}


@router.get("/{job_id}", response_model=JobRecord)
def get_job(job_id: str, owner: Owner, store: StoreDep) -> dict[str, Any]:
    """The job record: state, times, progress (iteration, distance, error bound)."""
    return with_reuse_fields(store, [_job_or_404(store, job_id, owner)])[0]


@router.get("/{job_id}/result", responses=RESULT_RESPONSES)
def get_result(
    job_id: str,
    owner: Owner,
    store: StoreDep,
    request: Request,
    format: Annotated[Literal["json", "csv"] | None, Query(description="json (default) or csv.")] = None,
    arrays: Annotated[Literal["nested", "flat"] | None, Query(description=ARRAYS_QUERY)] = None,
    order: Annotated[Literal["row_major", "column_major"] | None, Query(description=ORDER_QUERY)] = None,
) -> Response:
    """The result document once done; `?format=csv` the long table, `?arrays=flat` arrays as {shape, order, data}."""
    solved_job(store, job_id, owner)
    # The stored result is zlib-compressed JSON (DEVELOPERS.md, "Jobs in
    # Redis"): JSON answers send it as stored, without a parse and re-encode.
    blob = store.redis.get(store.keys.result(job_id))
    if blob is None:
        raise Problem(410, "expired", f"the result of job {job_id} has expired (results are kept result_ttl_s)")
    document = zlib.decompress(blob)
    if format is None:
        format = "csv" if wants_csv(request.headers.get("accept", "")) else "json"
    if arrays == "flat" or order is not None:
        return _flat(document, format, arrays, order)
    if format == "csv":
        return StreamingResponse(
            csv_chunks(orjson.loads(document)),
            media_type="text/csv; charset=utf-8",
            headers={"Content-Disposition": f'attachment; filename="fixq-{job_id}.csv"'},
        )
    return Response(document, media_type="application/json")


def _flat(document: bytes, format: str, arrays: str | None, order: str | None) -> Response:
    """The result with its numeric arrays flat (``?arrays=flat``, optionally ``&order=column_major``)."""
    if arrays != "flat":
        raise _bad_query("order", "order applies to flat arrays: add arrays=flat")
    if format == "csv":
        raise _bad_query("arrays", "arrays=flat applies to the JSON result, not to format=csv")
    return Response(orjson.dumps(flat_result(orjson.loads(document), order or "row_major")),
                    media_type="application/json")


def _bad_query(parameter: str, message: str) -> Problem:
    return Problem(400, "invalid-request", f"query.{parameter}: {message}",
                   errors=[{"path": f"query.{parameter}", "message": message}])


def solved_job(store: JobStore, job_id: str, owner: Caller) -> dict[str, Any]:
    """The record of a job the caller may see and that is done; else 404, or 409 saying why it has no result."""
    record = _job_or_404(store, job_id, owner)
    if record["state"] != "done":
        raise Problem(
            409,
            "not-ready",
            _not_ready(record),
            title="result not ready",
            state=record["state"],
            progress=record.get("progress"),
        )
    return record


def _not_ready(record: dict[str, Any]) -> str:
    state = record["state"]
    job = f"job {record['id']}"
    if state == "queued":
        return f"{job} is queued; the result is ready when it is done"
    if state == "running":
        progress = record.get("progress") or {}
        where = ""
        if progress.get("iteration") is not None:
            where = f" (iteration {progress['iteration']}"
            if progress.get("error_bound") is not None:
                where += f", error bound {progress['error_bound']:.3g}"
            where += ")"
        return f"{job} is running{where}; the result is ready when it is done"
    if state == "failed":
        error = record.get("error") or {}
        return f"{job} failed: {error.get('detail') or error.get('title') or 'no reason recorded'}; it has no result"
    return f"{job} was canceled; it has no result"


@router.get("/{job_id}/log", response_model=LogPage, responses={200: {"content": {"text/event-stream": {}}}})
async def get_log(
    job_id: str,
    owner: Owner,
    store: StoreDep,
    settings: SettingsDep,
    request: Request,
    cursor: Annotated[
        int, Query(ge=0, le=MAX_LOG_INDEX, description="Index of the first entry (the `next` of the previous page).")
    ] = 0,
    limit: Annotated[int, Query(ge=1, le=LOG_PAGE_MAX, description="Most entries on the page.")] = LOG_PAGE_MAX,
    last_event_id: Annotated[str | None, Header(max_length=32)] = None,
) -> Any:
    """The convergence log; with `Accept: text/event-stream`, live progress (SSE) until the job ends."""
    await anyio.to_thread.run_sync(_job_or_404, store, job_id, owner)
    if "text/event-stream" in request.headers.get("accept", ""):
        after = min(int(last_event_id), MAX_LOG_INDEX) if last_event_id and last_event_id.isdigit() else 0
        key_valid = partial(_key_still_valid, request, settings) if settings.auth else None
        return StreamingResponse(
            _live_log(store, job_id, after, settings.sse_poll_s, key_valid),
            media_type="text/event-stream",
            headers={"Cache-Control": "no-store", "X-Accel-Buffering": "no"},
        )
    entries, length, dropped = await anyio.to_thread.run_sync(_log_page, store, job_id, cursor, limit)
    end = cursor + len(entries)
    return {"data": entries, "next": end if end < length else None, "dropped": dropped}


def _log_page(store: JobStore, job_id: str, cursor: int, limit: int) -> tuple[list[dict[str, Any]], int, int]:
    with store.redis.pipeline(transaction=True) as pipe:
        pipe.lrange(store.keys.log(job_id), cursor, cursor + limit - 1)
        pipe.llen(store.keys.log(job_id))
        pipe.hget(store.keys.job(job_id), "log_dropped")
        rows, length, dropped = pipe.execute()
    return [orjson.loads(row) for row in rows], int(length), int(dropped or 0)


def _poll_log(store: JobStore, job_id: str, cursor: int) -> tuple[list[bytes], int, str | None]:
    """New log rows from ``cursor``, the log's length and the job's state: one atomic round trip."""
    with store.redis.pipeline(transaction=True) as pipe:
        pipe.lrange(store.keys.log(job_id), cursor, cursor + SSE_BATCH - 1)
        pipe.llen(store.keys.log(job_id))
        pipe.hget(store.keys.job(job_id), "state")
        rows, length, state = pipe.execute()
    return rows, int(length), state.decode() if state is not None else None


def _key_still_valid(request: Request, settings: Settings) -> bool:
    """True while the key that opened ``request`` still authenticates (the one key check, run again)."""
    try:
        current_owner(request, settings)
    except Problem:
        return False
    return True


async def _live_log(
    store: JobStore, job_id: str, after: int, poll_s: float, key_valid: Callable[[], bool] | None = None
) -> AsyncIterator[bytes]:
    """:func:`_follow_log`, ended by ``event: error`` (a 503 problem) when Redis goes away while it is open,
    rather than cut off mid-chunk (the client reconnects with ``Last-Event-ID`` once Redis is back)."""
    try:
        async for chunk in _follow_log(store, job_id, after, poll_s, key_valid):
            yield chunk
    except STORE_UNAVAILABLE as exc:
        logger.warning("redis unavailable while following the log of job %s: %s", job_id, exc)
        problem = {"type": TYPE_PREFIX + "unavailable", "title": "service unavailable", "status": 503,
                   "detail": UNAVAILABLE_DETAIL}
        yield b"retry: 5000\nevent: error\ndata: " + orjson.dumps(problem) + b"\n\n"


async def _follow_log(
    store: JobStore, job_id: str, after: int, poll_s: float, key_valid: Callable[[], bool] | None = None
) -> AsyncIterator[bytes]:
    """SSE: ``event: entry`` per log entry (``id:`` its iteration), then ``event: end``.

    The stream also ends, without ``end``, when the API is stopping (the
    client reconnects with ``Last-Event-ID``), and with ``event: error`` (a
    401 problem) once ``key_valid``, asked every :data:`SSE_KEY_CHECK_S`
    seconds, says the caller's key was revoked.
    """
    # Entries come in iteration order, at most one per iteration, and skipping
    # what was sent copes with a log trimmed back to a checkpoint and regrown.
    # The bounded log (worker.convergence_log) also removes entries: at most
    # the KEEP_LATEST + 1 last ones, except when its sampling step doubles.
    # So each poll re-reads that many entries before the cursor, and reads
    # from the start again when even the first of those was not sent yet.
    cursor, sent = after, after
    started = last_write = key_checked = time.monotonic()
    while not STOPPING.is_set():
        start = max(0, cursor - KEEP_LATEST - 1)
        rows, length, state = await anyio.to_thread.run_sync(_poll_log, store, job_id, start)
        if start and not rows and start >= length > 0:
            # Past the log's end: a Last-Event-ID (an iteration) beyond a bounded log's length, say after an
            # API restart while a long solve ended. Its last entries are read again, so the tail is sent.
            start = max(0, length - KEEP_LATEST - 1)
            rows, length, state = await anyio.to_thread.run_sync(_poll_log, store, job_id, start)
        if start and rows and _iteration_of_row(rows[0], sent) > sent:
            start = 0
            rows, length, state = await anyio.to_thread.run_sync(_poll_log, store, job_id, start)
        cursor = start + len(rows) if rows else min(start, length)
        chunk = bytearray()
        for row in rows:
            entry = orjson.loads(row)
            iteration = entry.get("iteration")
            if isinstance(iteration, int):
                if iteration <= sent:
                    continue
                sent = iteration
                chunk += b"id: %d\n" % iteration
            chunk += b"event: entry\ndata: " + row + b"\n\n"
        now = time.monotonic()
        if chunk:
            last_write = now
            yield bytes(chunk)
        if len(rows) == SSE_BATCH:
            continue
        if state is None or state in TERMINAL_STATES:
            yield b"event: end\ndata: " + orjson.dumps({"state": state or "missing"}) + b"\n\n"
            return
        if now - last_write >= SSE_KEEPALIVE_S:
            last_write = now
            yield b": keepalive\n\n"
        if key_valid is not None and now - key_checked >= SSE_KEY_CHECK_S:
            key_checked = now
            if not await anyio.to_thread.run_sync(key_valid):
                problem = {"status": 401, "title": "unauthorized", "detail": "the key was revoked"}
                yield b"event: error\ndata: " + orjson.dumps(problem) + b"\n\n"
                return
        await anyio.sleep(min(poll_s, SSE_FIRST_POLL_S + (now - started) * SSE_POLL_GROWTH))


def _iteration_of_row(row: bytes, default: int) -> int:
    iteration = orjson.loads(row).get("iteration")
    return iteration if isinstance(iteration, int) else default


@router.delete("/{job_id}", response_model=JobRecord, responses={202: {"model": JobRecord}})
def cancel_job(job_id: str, owner: Owner, store: StoreDep, response: Response) -> dict[str, Any]:
    """Cancel a queued job now, or ask a running one to stop (202) at its next iteration or evaluation step."""
    _job_or_404(store, job_id, owner)
    outcome = store.request_cancel(job_id)
    if outcome is None:
        raise Problem(404, "not-found", f"there is no job {job_id!r}")
    if outcome["outcome"] == "cancel_requested":
        response.status_code = 202
    return with_reuse_fields(store, [outcome["job"]])[0]

