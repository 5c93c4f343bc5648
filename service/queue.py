"""fixq's RQ queues: their names, and enqueueing one execution by import path.

The service never imports the task it enqueues: RQ is handed the import path
``service.task.run_job`` and the job id.  Each *execution* of a job gets its own
RQ job id, ``{job_id}-{n}`` with ``n`` counting enqueues (RQ 3.0 allows only
``[A-Za-z0-9_-]`` in ids), so an RQ job left behind by a dead worker never
shares its id, its registries or its result with the execution that replaces it.

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

TASK = "service.task.run_job"
"""Import path of the RQ task; its only argument is the fixq job id."""

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


def ordered_queue_names(queues: Sequence[str] | None = None) -> list[str]:
    """RQ queue names to listen on: priorities or queue names, default all three."""
    if queues is None:
        return [QUEUE_NAMES[p] for p in PRIORITIES]
    return [QUEUE_NAMES.get(q, q) for q in queues]
