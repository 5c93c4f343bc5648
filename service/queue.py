"""fixq's RQ queues: their names, the keys of the pending jobs, and enqueueing one job.

Enqueueing a job makes it pending for its owner and puts a *ticket* on the RQ
queue of its priority (see ``service.dispatch`` for why and how a worker
picks the job a ticket runs).  The service never imports the task it
enqueues: RQ is handed the import path ``service.task.run_next`` and the id
of the job the ticket is issued for.  Each enqueue of a job gets its own RQ
job id, ``{job_id}-{n}`` with ``n`` counting enqueues (RQ 3.0 allows only
``[A-Za-z0-9_-]`` in ids), so an RQ job left behind by a dead worker never
shares its id, its registries or its result with the one that replaces it.

This module is the bottom of the queue side: of fixq's own it imports only
the document's priorities and the settings' type, so the job store can
enqueue and the reaper (``service.reaper``) can sit above both.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING

import redis
from rq import Queue
from rq.job import Job

from worker.document import PRIORITIES

if TYPE_CHECKING:
    from service.settings import Settings

__all__ = [
    "PRIORITIES",
    "WAKE_BACKLOG",
    "DispatchKeys",
    "drop_pending",
    "QUEUE_NAMES",
    "RQ_RECORD_TTL_S",
    "TASK",
    "enqueue_execution",
    "execution_id",
    "ordered_queue_names",
    "queue_key",
    "queue_name",
    "rq_job_key",
]

TASK = "service.task.run_next"
"""Import path of a ticket's RQ task; its only argument is the id of the job the ticket was issued for."""

WAKE_BACKLOG = 16
"""Most wake-ups kept for workers waiting on capped owners (count); one per waiting worker is all that is useful."""

QUEUE_NAMES: dict[str, str] = {priority: f"fixq-{priority}" for priority in PRIORITIES}
"""RQ queue name per priority (``worker.document.PRIORITIES``, in the order workers drain their queues)."""

RQ_RECORD_TTL_S = 86_400
"""Seconds RQ keeps its own record of a finished or failed execution (1 day);
fixq's job state lives in fixq's keys, so RQ's copy is only for debugging."""


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


class DispatchKeys:
    """Names of the Redis keys that order the pending jobs (``service.dispatch``), under one prefix."""

    def __init__(self, prefix: str) -> None:
        self.prefix = prefix
        self.tickets = f"{prefix}:dispatch:tickets"
        """Hash: each waiting ticket's RQ job id → the job it stands for."""
        self.wake = f"{prefix}:dispatch:wake"
        """List a worker waiting on capped owners blocks on; pushed to by enqueues and finished jobs."""
        # The Lua scripts build the per-priority and per-owner names from these prefixes alike.
        self.ring_prefix = f"{prefix}:dispatch:ring:"
        self.pending_prefix = f"{prefix}:dispatch:pending:"
        self.picked_prefix = f"{prefix}:dispatch:picked:"

    def ring(self, priority: str) -> str:
        """List of the owners with pending jobs of ``priority``, in the order of their turns."""
        return f"{self.ring_prefix}{priority}"

    def pending(self, priority: str, owner: str) -> str:
        """List of the pending job ids of ``owner`` at ``priority``, oldest first."""
        return f"{self.pending_prefix}{priority}:{owner}"

    def picked(self, owner: str) -> str:
        """Sorted set of the jobs of ``owner`` taken by workers, scored by when (ms): its running count."""
        return f"{self.picked_prefix}{owner}"


# ARGV 1 job id, 2 ticket, 3 job-hash key prefix, 4 ring key prefix, 5 pending key prefix,
# 6 tickets hash, 7 wake list, 8 wake backlog, 9 '1' for a job's first enqueue (it cannot be pending yet).
_ENQUEUE = """
local id = ARGV[1]
local owner, priority = unpack(redis.call('HMGET', ARGV[3] .. id, 'owner', 'priority'))
if not owner then return 0 end
priority = priority or 'normal'
local ring = ARGV[4] .. priority
local pending = ARGV[5] .. priority .. ':' .. owner
if ARGV[9] == '1' or not redis.call('LPOS', pending, id) then redis.call('RPUSH', pending, id) end
if not redis.call('LPOS', ring, owner) then redis.call('RPUSH', ring, owner) end
redis.call('HSET', ARGV[6], ARGV[2], id)
redis.call('RPUSH', ARGV[7], '1')
redis.call('LTRIM', ARGV[7], -tonumber(ARGV[8]), -1)
return 1
"""


def enqueue_execution(connection: redis.Redis, settings: Settings, job_id: str, rq_job_id: str, priority: str) -> None:
    """Make the ``queued`` job ``job_id`` pending for its owner; put its ticket ``rq_job_id`` on its queue.

    Making it pending is idempotent (a job already pending keeps its place),
    so the reaper may call this again for a job whose ticket was lost.
    """
    keys = DispatchKeys(settings.redis_prefix)
    connection.register_script(_ENQUEUE)(
        args=[job_id, rq_job_id, f"{settings.redis_prefix}:job:", keys.ring_prefix, keys.pending_prefix,
              keys.tickets, keys.wake, WAKE_BACKLOG, "1" if rq_job_id == execution_id(job_id, 1) else "0"],
    )  # fmt: skip
    Queue(queue_name(priority), connection=connection).enqueue(
        TASK,
        job_id,
        job_id=rq_job_id,
        job_timeout=settings.job_timeout_s,
        result_ttl=RQ_RECORD_TTL_S,
        failure_ttl=RQ_RECORD_TTL_S,
        description=f"fixq ticket of job {job_id}",
    )


def drop_pending(
    connection: redis.Redis, settings: Settings, job_id: str, rq_job_id: str, owner: str, priority: str
) -> None:
    """Take a job canceled in its queue off its owner's pending list, and forget its ticket."""
    keys = DispatchKeys(settings.redis_prefix)
    with connection.pipeline(transaction=False) as pipe:
        pipe.lrem(keys.pending(priority, owner), 0, job_id)
        pipe.hdel(keys.tickets, rq_job_id or "none")
        pipe.execute()


def ordered_queue_names(queues: Sequence[str] | None = None) -> list[str]:
    """RQ queue names to listen on: priorities or queue names, default all three."""
    if queues is None:
        return [QUEUE_NAMES[p] for p in PRIORITIES]
    return [QUEUE_NAMES.get(q, q) for q in queues]
