"""A sweep's rows answered without solving: the owner's solved twin of a row's document (as
``service.resubmission`` answers a submission; not for a sweep submitted with ``?fresh=true``), and the
stationary means a done row leaves in its sweep."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import orjson

from service.limits import ActiveJobs, Quota, Reservation
from service.problems import Problem
from service.resubmission import SolvedJobs, start_free_hash
from service.store import JobStore
from service.sweeps.records import Sweep
from service.sweeps.request import SweepRequest
from worker.document import document_hash, parse_document
from worker.errors import FixqError

__all__ = ["record_means", "remember_row", "reserve_first_rows", "reused_row"]


def reused_row(sweep: Sweep, raw: dict[str, Any], prepared: dict[str, Any]) -> tuple[dict[str, Any] | None, bool,
                                                                                      str | None]:
    """A done job answering row ``raw`` from the owner's solved twin: (record, True, start-free hash); else
    (None, False, hash), or (an unqueued record, False, hash) when the twin's result expired a moment ago (the
    caller queues it).  The hash is :func:`~service.resubmission.start_free_hash` of the row's document."""
    start_free = start_free_hash(parse_document(raw))
    if sweep.fresh:
        return None, False, start_free
    solved = SolvedJobs(sweep.store)
    earlier = solved.find(sweep.owner, prepared["document_hash"]) or solved.find_start_free(sweep.owner, start_free)
    if earlier is None:
        return None, False, start_free
    record, reused = solved.create_reused(raw, earlier, owner=sweep.owner, **prepared)
    return record, reused, start_free


def reserve_first_rows(
    active: ActiveJobs, quota: Quota, high: bool, request: SweepRequest, sweep_id: str, store: JobStore,
    rows: Sequence[int], fresh: bool,
) -> Reservation:  # fmt: skip
    """Slots of the owner's active-job caps for the door's first ``rows``, or the 429.

    When they do not all fit, the rows a solved twin of the owner answers (unless ``fresh``) are left out, as
    a resubmitted job takes no slot when it is answered from its twin; the twins are looked up as
    :func:`reused_row` finds them, without the door's admission, and the lookup stops once the rows that need a
    slot are more than the caps allow (a row that does not parse needs one; admission refuses it later).
    """
    try:
        return active.reserve(quota, high=high, count=len(rows))
    except Problem:
        if fresh:
            raise
        most = min(cap for cap in (quota.max_active_jobs, quota.max_active_high_jobs if high else 0) if cap > 0)
        solved, needed = SolvedJobs(store), 0
        for index in rows:
            try:
                document = parse_document(request.document(index, sweep_id=sweep_id))
                twin = solved.find(quota.owner, document_hash(document)) or solved.find_start_free(
                    quota.owner, start_free_hash(document))  # fmt: skip
            except FixqError:
                twin = None
            needed += twin is None
            if needed > most or needed == len(rows):
                raise  # never fits, or no row is answered by a twin
        return active.reserve(quota, high=high, count=needed)


def remember_row(sweep: Sweep, prepared: dict[str, Any], start_free: str | None, job_id: str) -> None:
    """Note a row's new job among the owner's solves, so that later submissions and sweeps may reuse it."""
    solved = SolvedJobs(sweep.store)
    solved.remember(sweep.owner, prepared["document_hash"], job_id)
    solved.remember_start_free(sweep.owner, start_free, job_id)


def record_means(sweep: Sweep, job_id: str, index: int) -> None:
    """Keep a done row's stationary means in the sweep (when the sweep reports them)."""
    store = sweep.store
    if sweep.stationary and store.redis.hget(store.keys.job(job_id), "state") == b"done":
        result = store.get_result(job_id)
        if result is not None:
            stationary = result.get("stationary")
            means = stationary.get("means") if isinstance(stationary, dict) else None
            store.redis.hset(sweep.keys.means, index, orjson.dumps(means))
