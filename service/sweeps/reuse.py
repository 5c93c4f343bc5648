"""A sweep's rows answered without solving: the owner's solved twin of a row's document (as
``service.resubmission`` answers a submission; not for a sweep submitted with ``?fresh=true``), and the
stationary means a done row leaves in its sweep."""

from __future__ import annotations

from typing import Any

import orjson

from service.resubmission import SolvedJobs, start_free_hash
from service.sweeps.records import Sweep
from worker.document import parse_document

__all__ = ["record_means", "remember_row", "reused_row"]


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
