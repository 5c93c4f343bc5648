"""What ``GET /v1/sweeps/{id}`` shows: the sweep's state, its counts and a page of rows.

Reading a sweep never writes: rows whose job is missing are shown as
``waiting`` (or ``canceled`` in a canceled sweep) until a creator makes
their job (``service.sweeps.creation``).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import orjson

from service.sweeps.records import Sweep, row_states

__all__ = ["ROW_STATES", "SWEEP_STATES", "sweep_view"]

ROW_STATES = ("waiting", "queued", "running", "done", "failed", "canceled")
"""States of a row: a job's state, or ``waiting`` while its job is not created yet."""
SWEEP_STATES = ("active", "done", "canceled")
"""States of a whole sweep: ``done`` once every row is done, failed or canceled."""


def sweep_view(sweep: Sweep, *, cursor: int = 0, limit: int | None = 100) -> dict[str, Any]:
    """The sweep record with ``state``, ``counts`` and a page of ``rows`` (``limit=None``: all rows).

    ``state`` is ``canceled`` once the sweep was canceled, ``done`` when
    every row is done, failed or canceled, else ``active``.  ``rows`` is
    ``{"data": [...], "next": index of the next page or null}``; a row is
    ``{"index", "values", "job", "state", "status", "iterations",
    "error_bound", "means", "error", "after", "search"}`` (``search``: the job record's summary of a search,
    else null).
    """
    jobs, states = row_states(sweep)
    total = sweep.record["combinations"]
    errors = {int(k): orjson.loads(v) for k, v in sweep.store.redis.hgetall(sweep.keys.errors).items()}

    def row_state(index: int) -> str:
        if index in states:
            return states[index]
        if index in errors:
            return "failed"
        return "canceled" if sweep.canceled_at is not None else "waiting"

    counts = dict.fromkeys(ROW_STATES, 0)
    for index in range(total):
        counts[row_state(index)] += 1
    if sweep.canceled_at is not None:
        state = "canceled"
    else:
        state = "done" if counts["waiting"] + counts["queued"] + counts["running"] == 0 else "active"
    end = total if limit is None else min(total, cursor + limit)
    page = range(min(cursor, total), end)
    rows = _rows(sweep, page, jobs, states, errors, row_state)
    next_row = end if end < total else None
    return {**sweep.public(), "state": state, "counts": counts, "rows": {"data": rows, "next": next_row}}


def _means(sweep: Sweep, jobs: dict[int, str], states: dict[int, str]) -> dict[int, Any]:
    """Stationary means of the ``done`` rows among ``jobs``: those the finish hook kept, else read from the result."""
    store = sweep.store
    indices = list(jobs)
    kept = dict(zip(indices, store.redis.hmget(sweep.keys.means, indices))) if indices else {}
    out: dict[int, Any] = {}
    for index, blob in kept.items():
        if blob is not None:
            out[index] = orjson.loads(blob)
        elif sweep.stationary and states.get(index) == "done":
            result = store.get_result(jobs[index])
            stationary = result.get("stationary") if result is not None else None
            if result is not None:
                out[index] = stationary.get("means") if isinstance(stationary, dict) else None
    return out


def _rows(
    sweep: Sweep,
    page: range,
    jobs: dict[int, str],
    states: dict[int, str],
    errors: dict[int, Any],
    row_state: Callable[[int], str],
) -> list[dict[str, Any]]:
    store, plan = sweep.store, sweep.plan
    on_page = [i for i in page if i in jobs]
    with store.redis.pipeline(transaction=False) as pipe:
        for index in on_page:
            pipe.hmget(store.keys.job(jobs[index]), "status", "iterations", "error_bound", "error", "search")
        fields = dict(zip(on_page, pipe.execute()))
    means = _means(sweep, {i: jobs[i] for i in on_page}, states)
    rows = []
    for index in page:
        status, iterations, error_bound, error, search = fields.get(index, (None,) * 5)
        rows.append({
            "index": index,
            "values": plan.values_of(index),
            "job": jobs.get(index),
            "state": row_state(index),
            "status": status.decode() if status else None,
            "iterations": orjson.loads(iterations) if iterations else None,
            "error_bound": orjson.loads(error_bound) if error_bound else None,
            "means": means.get(index),
            "error": orjson.loads(error) if error else errors.get(index),
            "after": plan.predecessor(index) if plan.chain else None,
            "search": orjson.loads(search) if search else None,
        })  # fmt: skip
    return rows
