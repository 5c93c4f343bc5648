"""fixq's RQ queues: enqueue by import path, requeue, and the reaper.

The service never imports the task it enqueues: RQ is handed the import path
``service.task.run_job`` and the job id.  Each *execution* of a job gets its own
RQ job id, ``{job_id}-{n}`` with ``n`` counting enqueues (RQ 3.0 allows only
``[A-Za-z0-9_-]`` in ids), so an RQ job left behind by a dead worker never
shares its id, its registries or its result with the execution that replaces it.

The reaper
----------
RQ notices a job abandoned by a dead worker only after its heartbeat lapses
and a maintenance pass runs (minutes).  fixq does not wait for that: every
worker process runs a ``Reaper`` thread which, every ``reaper_interval_s``,

* takes a fleet-wide pass lock (``SET NX PX``) so one reaper per interval
  does the work;
* finds ``running`` jobs whose lease (``lease_s``) has lapsed and re-enqueues
  them (the next execution resumes from the checkpoint); a job with a cancel
  flag becomes ``canceled``, and one that has already started
  ``max_attempts`` executions becomes ``failed``;
* finds ``queued`` jobs whose current RQ job is in no fixq queue and has not
  started for ``lease_s`` (a lost enqueue, or a worker that died between
  popping the job and starting it) and enqueues them again.

Every state change is a compare-and-set Lua script in ``service.store``, so
two reapers racing (or a reaper and a late execution) cannot both act; an
extra execution that slips through anyway finds the lease held or the job
finished and returns without writing.
"""

from __future__ import annotations

import logging
import secrets
import time
from collections.abc import Sequence
from datetime import datetime, timezone
from typing import TYPE_CHECKING

import redis
from rq import Queue
from rq.job import Job
from rq.utils import utcparse

from service._periodic import PeriodicThread

if TYPE_CHECKING:
    from service.settings import Settings
    from service.store import JobStore

__all__ = [
    "PRIORITIES",
    "QUEUE_NAMES",
    "RQ_RECORD_TTL_S",
    "TASK",
    "Reaper",
    "enqueue_execution",
    "execution_id",
    "ordered_queue_names",
    "queue_key",
    "queue_name",
    "reap",
    "rq_job_key",
]

TASK = "service.task.run_job"
"""Import path of the RQ task; its only argument is the fixq job id."""

PRIORITIES: tuple[str, ...] = ("high", "normal", "low")
"""Job priorities, in the order workers drain their queues."""

QUEUE_NAMES: dict[str, str] = {priority: f"fixq-{priority}" for priority in PRIORITIES}
"""RQ queue name per priority."""

RQ_RECORD_TTL_S = 86_400
"""Seconds RQ keeps its own record of a finished or failed execution (1 day);
fixq's job state lives in fixq's keys, so RQ's copy is only for debugging."""

logger = logging.getLogger("fixq.reaper")


def queue_name(priority: str) -> str:
    """The RQ queue name of a priority (``high``, ``normal`` or ``low``)."""
    try:
        return QUEUE_NAMES[priority]
    except KeyError:
        raise ValueError(f"unknown priority {priority!r}; expected one of {', '.join(PRIORITIES)}") from None


def queue_key(priority: str) -> str:
    """The Redis list RQ keeps the queue of ``priority`` in."""
    return Queue.redis_queue_namespace_prefix + queue_name(priority)


def rq_job_key(rq_job_id: str) -> str:
    """The Redis hash RQ keeps one of its jobs in."""
    return Job.key_for(rq_job_id)


def execution_id(job_id: str, enqueue_number: int) -> str:
    """The RQ job id of the ``enqueue_number``-th enqueue of a fixq job."""
    return f"{job_id}-{enqueue_number}"


def enqueue_execution(
    connection: redis.Redis, settings: Settings, job_id: str, rq_job_id: str, priority: str
) -> None:
    """Put one execution of ``job_id`` on the RQ queue of ``priority``."""
    Queue(queue_name(priority), connection=connection).enqueue(
        TASK,
        job_id,
        job_id=rq_job_id,
        job_timeout=settings.job_timeout_s,
        result_ttl=RQ_RECORD_TTL_S,
        failure_ttl=RQ_RECORD_TTL_S,
        description=f"fixq job {job_id}",
    )


def reap(store: JobStore, *, use_lock: bool = True) -> dict[str, list[str]]:
    """One reaper pass; returns the job ids acted on, by what was done.

    With ``use_lock`` (the default) the pass is skipped, returning empty lists,
    when another reaper already made one within the last interval.
    """
    report: dict[str, list[str]] = {"requeued": [], "rescued": [], "failed": [], "canceled": []}
    settings = store.settings
    if use_lock:
        lock_ms = max(1, int(settings.reaper_interval_s * 900))
        if not store.redis.set(store.keys.reaper_lock, secrets.token_hex(8), nx=True, px=lock_ms):
            return report
    _reap_abandoned(store, report)
    _rescue_lost(store, report)
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
            # Imported here: service.lifecycle imports the store, which imports this module.
            from service.lifecycle import job_finished

            job_finished(store, job_id, outcome)


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
    """True while a worker has popped the RQ job and is about to claim it."""
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


def ordered_queue_names(queues: Sequence[str] | None = None) -> list[str]:
    """RQ queue names to listen on: priorities or queue names, default all three."""
    if queues is None:
        return [QUEUE_NAMES[p] for p in PRIORITIES]
    return [QUEUE_NAMES.get(q, q) for q in queues]
