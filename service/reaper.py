"""The reaper: the pass every worker process runs to rescue jobs and sweeps a dead process left behind.

RQ notices a job abandoned by a dead worker only after its heartbeat lapses
and a maintenance pass runs (minutes).  fixq does not wait for that: every
worker process runs a ``Reaper`` thread which, every ``reaper_interval_s``,

* takes a fleet-wide pass lock (``SET NX PX``) so one reaper per interval
  does the work;
* finds ``running`` jobs whose lease (``lease_s``) has lapsed and re-enqueues
  them (the next execution resumes from the checkpoint); a job with a cancel
  flag becomes ``canceled``, and one that has already started
  ``max_attempts`` executions becomes ``failed`` (and goes through
  ``service.lifecycle`` as any finished job does);
* finds ``queued`` jobs whose ticket (``rq_job``, see ``service.dispatch``)
  is in no fixq queue and has not started for ``lease_s`` (a lost enqueue, or
  a worker that died between taking the ticket and claiming the job it
  picked) and enqueues them again: pending for their owner once more, with a
  new ticket; and forgets the tickets of jobs no longer queued;
* drops jobs whose record expired (``job_ttl_s``) from the listings and
  state sets, and deletes sweeps whose jobs have all expired;
* creates the sweep rows nobody created: a chained row whose predecessor
  finished while the process that was to create its successor died, or a
  row the ``POST`` left behind (``service.sweeps.rescue_pending``).

Every state change is a compare-and-set Lua script in ``service.store``, so
two reapers racing (or a reaper and a late execution) cannot both act; an
extra execution that slips through anyway finds the lease held or the job
finished and returns without writing.
"""

from __future__ import annotations

import logging
import secrets
import time
from datetime import datetime, timezone

import redis
from rq.utils import utcparse

from service import dispatch, lifecycle, sweeps
from service._periodic import PeriodicThread
from service.queue import PRIORITIES, enqueue_execution, queue_key, rq_job_key
from service.store import JobStore

__all__ = ["Reaper", "reap"]

logger = logging.getLogger("fixq.reaper")


def reap(store: JobStore, *, use_lock: bool = True) -> dict[str, list[str]]:
    """One reaper pass; returns the job ids acted on, by what was done.

    With ``use_lock`` (the default) the pass is skipped, returning empty lists,
    when another reaper already made one within the last interval.  Sweep rows
    created by the pass are counted under ``"sweep_rows"`` only when there are some.
    """
    report: dict[str, list[str]] = {"requeued": [], "rescued": [], "failed": [], "canceled": []}
    settings = store.settings
    if use_lock:
        lock_ms = max(1, int(settings.reaper_interval_s * 900))
        if not store.redis.set(store.keys.reaper_lock, secrets.token_hex(8), nx=True, px=lock_ms):
            return report
    _reap_abandoned(store, report)
    _rescue_lost(store, report)
    dispatch.prune_tickets(store)
    store.forget_expired()
    sweeps.forget_expired_sweeps(store)
    created = sweeps.rescue_pending(store)
    if created:
        logger.warning("created %d sweep jobs nobody had created: %s", len(created), ", ".join(created))
        report["sweep_rows"] = created
    return report


def _reap_abandoned(store: JobStore, report: dict[str, list[str]]) -> None:
    running = store.job_ids_in_state("running")
    if not running:
        return
    with store.redis.pipeline(transaction=False) as pipe:
        for job_id in running:
            pipe.exists(store.keys.lease(job_id))
        alive = pipe.execute()
    for job_id, has_lease in zip(running, alive):
        if has_lease:
            continue
        outcome, rq_job_id, priority = store.requeue_abandoned(job_id)
        if outcome == "requeued":
            logger.warning("job %s lost its execution (lease lapsed); requeued as %s", job_id, rq_job_id)
            _enqueue_quietly(store, job_id, rq_job_id, priority)
            report["requeued"].append(job_id)
        elif outcome in ("failed", "canceled"):
            logger.warning("job %s lost its execution and is now %s", job_id, outcome)
            report[outcome].append(job_id)
            lifecycle.job_finished(store, job_id, outcome)


def _rescue_lost(store: JobStore, report: dict[str, list[str]]) -> None:
    queued = store.job_ids_in_state("queued")
    if not queued:
        return
    grace_ms = store.settings.lease_s * 1000
    now_ms = time.time() * 1000
    with store.redis.pipeline(transaction=False) as pipe:
        for job_id in queued:
            pipe.hmget(store.keys.job(job_id), "rq_job", "enqueued_at", "priority")
        rows = pipe.execute()
    stale = [
        (job_id, rq_job.decode())
        for job_id, (rq_job, enqueued_at, _) in zip(queued, rows)
        if rq_job is not None and enqueued_at is not None and now_ms - float(enqueued_at) > grace_ms
    ]
    if not stale:
        return
    waiting: set[bytes] = set()
    for priority in PRIORITIES:
        waiting.update(store.redis.lrange(queue_key(priority), 0, -1))
    for job_id, rq_job_id in stale:
        if rq_job_id.encode() in waiting or _started_recently(store, rq_job_id, grace_ms):
            continue
        rescued = store.rescue_lost(job_id, rq_job_id)
        if rescued is not None:
            new_rq_job_id, priority = rescued
            logger.warning("job %s was in no RQ queue (%s); enqueued again as %s", job_id, rq_job_id, new_rq_job_id)
            _enqueue_quietly(store, job_id, new_rq_job_id, priority)
            report["rescued"].append(job_id)


def _started_recently(store: JobStore, rq_job_id: str, grace_ms: float) -> bool:
    """True while a worker has taken the ticket and is picking a job, waiting for a slot, or claiming."""
    status, started_at = store.redis.hmget(rq_job_key(rq_job_id), "status", "started_at")
    if status != b"started" or not started_at:
        return False
    started = utcparse(started_at.decode()).replace(tzinfo=timezone.utc)
    return (datetime.now(timezone.utc) - started).total_seconds() * 1000 < grace_ms


def _enqueue_quietly(store: JobStore, job_id: str, rq_job_id: str, priority: str) -> None:
    try:
        enqueue_execution(store.redis, store.settings, job_id, rq_job_id, priority)
    except redis.RedisError:
        # The job stays `queued` in no RQ queue; the next pass rescues it.
        logger.exception("could not enqueue job %s; the reaper will try again", job_id)


class Reaper(PeriodicThread):
    """A daemon thread running ``reap`` every ``settings.reaper_interval_s``."""

    name = "fixq-reaper"

    def __init__(self, store: JobStore, *, interval_s: float | None = None) -> None:
        super().__init__(interval_s if interval_s is not None else store.settings.reaper_interval_s)
        self.store = store

    def run_once(self) -> bool:
        reap(self.store)
        return False
