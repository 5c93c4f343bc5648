"""The RQ task around ``worker.solve``, and the worker process entry point (``fixq worker``).

This is the queue side's glue and sits on the service side of the wall: it
imports the numerics (``worker``), and nothing in ``worker`` imports it.
``run_job(job_id)`` is one *execution* of a job.  The RQ queues carry
tickets, ``run_next`` (import path ``service.queue.TASK``), each running one
execution of the job ``service.dispatch`` picks in turn.  An execution

1. claims the job: takes the lease ``fixq:lease:{id}`` (``SET NX PX``, a fresh
   token per execution) and marks it ``running`` in one Lua script; if another
   live execution holds the lease, or the job is finished, it returns having
   written nothing;
2. renews the lease from a heartbeat thread every ``lease_s / 3``;
3. calls ``solve`` with

   * ``on_progress``: buffers log entries and writes them, with the record's
     ``progress``, at most every ``progress_interval_s`` (and once at the end);
   * ``checkpoint``: ``save`` stores the compressed state if its iteration is
     not older than the stored one and the lease is still ours; ``load``
     returns it and rewrites the stored log to the checkpoint's, so that every
     iteration appears once, in order, after a resume;
   * ``should_stop``: true once a cancel is requested or the lease is lost,
     checked against Redis at most every ``stop_check_interval_s``;
   * ``warm_start`` from ``solver.initial.job`` and ``limits`` from settings;

4. writes the outcome under the lease: ``done`` with the result (one script,
   result stored once), ``canceled``, or ``failed`` with the document's errors
   or a plain message (the traceback goes to the worker log only);
5. hands a finished job to ``service.lifecycle.job_finished`` (its webhook,
   its sweep's next jobs).

An execution that loses its lease (its worker was taken for dead and the job
re-enqueued) stops at its next iteration without writing anything, so an orphaned
work-horse can never overwrite or duplicate the result.  RQ gets back a tiny
summary dict, never arrays.

A Redis outage does not end a solve: a failed checkpoint save, progress
write or stop check is logged and the solve goes on; the heartbeat takes a
lease that lapsed meanwhile back if nobody else claimed the job; the final
writes are retried with backoff for up to ``redis_retry_s``, and write
nothing once the lease is known to be another execution's.

``run_worker(burst=False, queues=None)`` imports what jobs import lazily (``preload``), then runs an RQ
worker on ``fixq-high``, ``fixq-normal``, ``fixq-low`` (in that order) with a ``service.reaper.Reaper``
and a ``service.liveness.Beacon`` thread beside it; ``worker_main`` is one
such process under ``fixq worker`` (``service.supervisor``), which stops
taking jobs once ``worker._codegen.recycle_due()`` and exits with
``RECYCLE_EXIT`` to be replaced.
"""

from __future__ import annotations

import logging
import os
import socket
from collections.abc import Sequence
from typing import Any

import redis
from rq import Queue, SimpleWorker, Worker, get_current_job

from service import dispatch
from service.execution import Execution
from service.lifecycle import job_finished
from service.liveness import Beacon
from service.notifier import Notifier
from service.queue import ordered_queue_names
from service.reaper import Reaper, reap
from service.settings import Settings, get_settings
from service.store import JobStore, connect, is_job_id
from service.supervisor import RECYCLE_EXIT
from worker._codegen import recycle_due

__all__ = ["preload", "run_job", "run_next", "run_worker", "worker_main"]

logger = logging.getLogger("fixq.task")


def run_job(job_id: str) -> dict[str, Any]:
    """Run one execution of a job; returns ``{"job", "outcome"}``.

    ``outcome`` is the state written (``done``, ``failed``, ``canceled``) or
    why none was: ``busy`` (another execution holds the lease), ``terminal``
    (already finished), ``missing``, ``lease_lost``, ``redis_error`` (Redis
    failed mid-way; the reaper requeues the job once its lease lapses).
    """
    if not is_job_id(job_id):
        return {"job": job_id, "outcome": "missing"}
    settings = get_settings()
    current = get_current_job()
    connection = current.connection if current is not None else _connection(settings)
    store = JobStore(connection, settings)
    outcome = Execution(store, job_id).run()
    job_finished(store, job_id, outcome)
    return {"job": job_id, "outcome": outcome}


def run_next(job_id: str) -> dict[str, Any]:
    """Run one ticket (``service.dispatch``): an execution of the next job in turn; ``{"job", "outcome"}``.

    ``job_id`` is the job the ticket was issued for; ``job`` is the one run.
    ``outcome`` is ``run_job``'s, or ``idle`` when nothing was pending (or
    every owner stayed at its cap and the ticket went back on its queue).
    """
    settings = get_settings()
    current = get_current_job()
    connection = current.connection if current is not None else _connection(settings)
    store = JobStore(connection, settings)
    ticket = current.id if current is not None else ""
    try:
        picked = dispatch.next_job(store, ticket)
    except redis.RedisError:
        # The job this ticket stood for keeps a ticket that ran: the reaper issues it a new one.
        logger.exception("ticket %s: Redis failed while picking a job; left to the reaper", ticket)
        return {"job": job_id, "outcome": "redis_error"}
    if picked is None:
        return {"job": job_id, "outcome": "idle"}
    outcome = Execution(store, picked).run()
    job_finished(store, picked, outcome)
    return {"job": picked, "outcome": outcome}


_CONNECTIONS: dict[str, redis.Redis] = {}


def _connection(settings: Settings) -> redis.Redis:
    """A client reused across in-process calls (RQ's own is used under a worker)."""
    url = settings.redis_url or ""
    if url not in _CONNECTIONS:
        _CONNECTIONS[url] = connect(settings)
    return _CONNECTIONS[url]


def preload() -> None:
    """Import what jobs import lazily, once per worker process before it takes a job (or counts as live).

    ``worker.solve`` imports the grid models (numba) and the searches (scipy.optimize, 147 modules) only when
    a document needs them, so that ``import worker`` stays light; in a worker process the first job of each kind
    paid that import: 126 ms for the grid models and 58 ms for the searches in a quiet process, and the first
    search job in a fresh worker ran 150-170 ms against 60-75 ms for the next ones on a loaded machine
    (``bench/bench_aiyagari.py``'s household at 200 points, measured).
    """
    import worker.gridmodel  # noqa: F401
    import worker.search  # noqa: F401


class _WithoutCommandChannel:
    """An RQ worker that does not listen on RQ's command channel.

    fixq sends RQ no worker commands (a cancel is fixq's own flag, which the
    solver checks), and with RQ 3.0 and redis-py 8 that channel can hold a
    warm shutdown (SIGTERM) for up to a minute: stopping its pub/sub thread
    waits for a subscription the unsubscribe has just ended.
    """

    def subscribe(self) -> None:
        return None


class _Recycling:
    """An RQ worker that stops taking jobs once ``worker._codegen.recycle_due()`` (checked after each job)."""

    recycle = False

    def execute_job(self, job: Any, queue: Any) -> None:
        super().execute_job(job, queue)  # type: ignore[misc]
        if recycle_due():
            logger.info("worker: it has loaded FIXQ_MAX_LOADED_STRUCTURES compiled kernels; stopping to be recycled")
            self.recycle = True
            self._stop_requested = True


def worker_main(burst: bool = False) -> int:
    """One RQ worker process under ``fixq worker`` (``service.supervisor``); its exit code.

    0 when it stopped as asked (or, with ``burst``, the queues are empty);
    ``RECYCLE_EXIT`` when it stopped to be replaced by a fresh process.
    """
    return RECYCLE_EXIT if _run(burst, None)[1] else 0


def run_worker(burst: bool = False, queues: Sequence[str] | None = None) -> bool:
    """Run an RQ worker on fixq's queues with a reaper thread; True if it ran a job.

    ``queues``: priorities (``high``) or queue names (``fixq-high``), in the
    order they are drained; default all three, high first.
    """
    return _run(burst, queues)[0]


def _run(burst: bool, queues: Sequence[str] | None) -> tuple[bool, bool]:
    """(ran a job, stopped to be recycled)."""
    settings = get_settings()
    logging.basicConfig(level=settings.worker_log_level.upper(), format="%(asctime)s %(name)s %(message)s")
    preload()
    connection = connect(settings)
    rq_queues = [Queue(name, connection=connection) for name in ordered_queue_names(queues)]
    reaper_store = JobStore(connect(settings), settings)
    if burst:
        reap(reaper_store)
    reaper = Reaper(reaper_store).start()
    notifier = Notifier(JobStore(connect(settings), settings)).start()
    try:
        # A SimpleWorker sends RQ no heartbeats while a job runs; fixq's own lease
        # heartbeat carries liveness, and RQ extends a SimpleWorker's key to the job timeout.
        base = SimpleWorker if settings.worker_class == "simple" else Worker
        worker_class = type(f"Fixq{base.__name__}", (_WithoutCommandChannel, _Recycling, base), {})
        name = f"fixq-{socket.gethostname()}-{os.getpid()}"
        beacon = Beacon(JobStore(connect(settings), settings), name).start()
        try:
            worker = worker_class(rq_queues, connection=connection, name=name)
            ran = worker.work(burst=burst, logging_level=settings.worker_log_level.upper())
            return ran, worker.recycle
        finally:
            beacon.stop()
    finally:
        notifier.stop()
        reaper.stop()
