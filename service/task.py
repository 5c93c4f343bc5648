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

``run_worker(burst=False, queues=None)`` runs an RQ worker on ``fixq-high``,
``fixq-normal``, ``fixq-low`` (in that order) with a ``service.reaper.Reaper``
thread beside it.
"""

from __future__ import annotations

import io
import logging
import os
import secrets
import socket
import threading
import time
import zlib
from collections.abc import Sequence
from typing import Any

import numpy as np
import orjson
import redis
from rq import Queue, SimpleWorker, Worker, get_current_job
from rq.timeouts import JobTimeoutException

from service import dispatch
from service.lifecycle import job_finished
from service.queue import ordered_queue_names
from service.reaper import Reaper, reap
from service.settings import Settings, get_settings
from service.store import JobStore, connect, is_job_id
from service.webhooks import Notifier
from worker import solve
from worker.errors import Canceled, FixqError, InvalidDocument

__all__ = ["decode_checkpoint", "encode_checkpoint", "run_job", "run_next", "run_worker"]

logger = logging.getLogger("fixq.task")

_MIB = 2**20


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
    outcome = _Execution(store, job_id).run()
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
    picked = dispatch.next_job(store, ticket)
    if picked is None:
        return {"job": job_id, "outcome": "idle"}
    outcome = _Execution(store, picked).run()
    job_finished(store, picked, outcome)
    return {"job": picked, "outcome": outcome}


_CONNECTIONS: dict[str, redis.Redis] = {}


def _connection(settings: Settings) -> redis.Redis:
    """A client reused across in-process calls (RQ's own is used under a worker)."""
    url = settings.redis_url or ""
    if url not in _CONNECTIONS:
        _CONNECTIONS[url] = connect(settings)
    return _CONNECTIONS[url]


class _Execution:
    """One run of one job under one lease token."""

    def __init__(self, store: JobStore, job_id: str) -> None:
        self.store = store
        self.settings = store.settings
        self.job_id = job_id
        self.token = secrets.token_hex(16)
        self.lease_lost = threading.Event()
        self._heartbeat_stop = threading.Event()
        self._last_renewal = time.monotonic()
        self._stopping = False
        self._last_stop_check = 0.0
        self._buffer: list[dict[str, Any]] = []
        # A log left by an earlier execution is dropped by the first write,
        # unless a checkpoint is resumed (which rewrites it to its own log).
        self._trim_from = -1
        self._finished = False
        self._last_iteration = 0
        self._last_flush = time.monotonic()

    def run(self) -> str:
        worker = f"{socket.gethostname()}:{os.getpid()}"
        claim = self.store.claim(self.job_id, self.token, worker=worker)
        if claim != "ok":
            logger.info("job %s: not run (%s)", self.job_id, claim)
            return claim
        heartbeat = threading.Thread(target=self._heartbeat, name=f"fixq-lease-{self.job_id}", daemon=True)
        heartbeat.start()
        try:
            return self._solve_and_record()
        finally:
            self._heartbeat_stop.set()
            heartbeat.join(timeout=5)
            if not self._finished:
                try:
                    self.store.release_lease(self.job_id, self.token)
                except redis.RedisError:
                    pass  # the lease lapses by itself within lease_s

    def _solve_and_record(self) -> str:
        try:
            document = self.store.get_document(self.job_id)
            if document is None:
                raise InvalidDocument.at("", "the job's document is missing from Redis")
            result = solve(
                document,
                on_progress=self.on_progress,
                checkpoint=_RedisCheckpoint(self),
                should_stop=self.should_stop,
                warm_start=_warm_start(self.store, document),
                limits={"max_bytes": int(self.settings.max_problem_mb * _MIB)},
            )
        except Canceled as exc:
            if self.lease_lost.is_set():
                return self._lost()
            self.flush()
            return self._finish("canceled", iterations=exc.context.get("iteration"))
        except FixqError as exc:
            self.flush()
            return self._finish("failed", error={"title": exc.title, "detail": exc.detail, "errors": exc.errors})
        except redis.RedisError:
            # Not the job's fault: it stays `running`, its lease lapses and the
            # reaper gives it to another execution, which resumes it.
            logger.exception("job %s: Redis failed during the execution; leaving it to the reaper", self.job_id)
            return "redis_error"
        except JobTimeoutException:
            self.flush()
            detail = f"the solve ran longer than job_timeout_s ({self.settings.job_timeout_s} s) and was stopped"
            return self._finish("failed", error={"title": "job timed out", "detail": detail, "errors": []})
        except Exception as exc:
            logger.exception("job %s: the solve raised", self.job_id)
            self.flush()
            detail = f"the solver stopped on an internal error: {type(exc).__name__}: {exc}"[:500]
            return self._finish("failed", error={"title": "solver error", "detail": detail, "errors": []})
        self.flush()
        return self._finish("done", result=result)

    def _finish(self, state: str, **outcome: Any) -> str:
        if self.store.finish(self.job_id, self.token, state, **outcome):
            self._finished = True
            logger.info("job %s: %s", self.job_id, state)
            return state
        return self._lost()

    def _lost(self) -> str:
        logger.warning("job %s: lease lost; stopped without writing", self.job_id)
        return "lease_lost"

    def _heartbeat(self) -> None:
        interval = self.settings.lease_s / 3
        while not self._heartbeat_stop.wait(interval):
            try:
                if not self.store.renew_lease(self.job_id, self.token):
                    self.lease_lost.set()
                    return
                self._last_renewal = time.monotonic()
            except redis.RedisError:
                logger.warning("job %s: could not renew the lease", self.job_id, exc_info=True)
                if time.monotonic() - self._last_renewal > self.settings.lease_s:
                    self.lease_lost.set()
                    return

    def should_stop(self) -> bool:
        """Cancel flag set or lease lost; Redis is asked at most every stop_check_interval_s."""
        if self._stopping:
            return True
        if self.lease_lost.is_set():
            self._stopping = True
            return True
        now = time.monotonic()
        if now - self._last_stop_check < self.settings.stop_check_interval_s:
            return False
        self._last_stop_check = now
        try:
            canceled, ours = self.store.stop_signals(self.job_id, self.token)
        except redis.RedisError:
            # Keep solving through a Redis blip; the heartbeat decides when the lease is gone.
            return False
        if not ours:
            self.lease_lost.set()
        self._stopping = canceled or not ours
        return self._stopping

    def on_progress(self, entry: dict[str, Any]) -> None:
        iteration = entry.get("iteration")
        if isinstance(iteration, int) and iteration <= self._last_iteration:
            # The solver went back (it did not resume from what is stored):
            # drop the stored entries from this iteration on before appending.
            self.flush()
            self._trim_from = iteration
        if isinstance(iteration, int):
            self._last_iteration = iteration
        self._buffer.append(entry)
        if time.monotonic() - self._last_flush >= self.settings.progress_interval_s:
            self.flush()

    def flush(self) -> None:
        """Write buffered log entries and the latest progress under the lease."""
        self._last_flush = time.monotonic()
        if not self._buffer and not self._trim_from:
            return
        entries, self._buffer = self._buffer, []
        progress = None
        if entries:
            last = entries[-1]
            progress = {key: last.get(key) for key in ("iteration", "distance", "error_bound", "seconds")}
        try:
            written = self.store.write_log(
                self.job_id, self.token, entries, progress=progress, trim_from=self._trim_from
            )
        except redis.RedisError:
            logger.warning("job %s: could not write progress", self.job_id, exc_info=True)
            self._buffer = entries + self._buffer
            return
        self._trim_from = 0
        if not written:
            self.lease_lost.set()

    def replace_log(self, entries: list[dict[str, Any]]) -> None:
        """Make the stored log exactly ``entries`` (a checkpoint's log)."""
        self._buffer = []
        self._trim_from = 0
        if not self.store.write_log(self.job_id, self.token, entries, progress=None, trim_from=-1):
            self.lease_lost.set()
        iterations = [e.get("iteration") for e in entries if isinstance(e.get("iteration"), int)]
        self._last_iteration = iterations[-1] if iterations else 0


class _RedisCheckpoint:
    """The ``checkpoint`` object handed to ``solve``."""

    def __init__(self, execution: _Execution) -> None:
        self.execution = execution

    def load(self) -> dict[str, Any] | None:
        execution = self.execution
        stored = execution.store.load_checkpoint(execution.job_id)
        if stored is None:
            return None
        iteration, payload = stored
        try:
            state = decode_checkpoint(payload)
        except (ValueError, OSError, zlib.error):
            logger.warning("job %s: unreadable checkpoint ignored", execution.job_id, exc_info=True)
            return None
        log = [entry for entry in state.get("log", []) if entry.get("iteration", 0) <= iteration]
        execution.replace_log(log)
        logger.info("job %s: resuming from the checkpoint of iteration %d", execution.job_id, iteration)
        return state

    def save(self, state: dict[str, Any]) -> None:
        execution = self.execution
        outcome = execution.store.save_checkpoint(
            execution.job_id, execution.token, int(state["iteration"]), encode_checkpoint(state)
        )
        if outcome == "lease_lost":
            execution.lease_lost.set()


def encode_checkpoint(state: dict[str, Any]) -> bytes:
    """Compress a solver state: arrays as ``np.save`` bytes, the rest as JSON."""
    arrays: list[tuple[str, bytes]] = []
    plain: dict[str, Any] = {}
    for name, value in state.items():
        if isinstance(value, np.ndarray):
            buffer = io.BytesIO()
            np.save(buffer, value, allow_pickle=False)
            arrays.append((name, buffer.getvalue()))
        else:
            plain[name] = value
    header = orjson.dumps(
        {"plain": plain, "arrays": [[name, len(data)] for name, data in arrays]}, option=orjson.OPT_SERIALIZE_NUMPY
    )
    return zlib.compress(len(header).to_bytes(8, "big") + header + b"".join(data for _, data in arrays), 1)


def decode_checkpoint(payload: bytes) -> dict[str, Any]:
    """Inverse of ``encode_checkpoint``."""
    raw = zlib.decompress(payload)
    size = int.from_bytes(raw[:8], "big")
    header = orjson.loads(raw[8 : 8 + size])
    state: dict[str, Any] = dict(header["plain"])
    offset = 8 + size
    for name, length in header["arrays"]:
        state[name] = np.load(io.BytesIO(raw[offset : offset + length]), allow_pickle=False)
        offset += length
    return state


def _warm_start(store: JobStore, document: dict[str, Any]) -> dict[str, Any] | None:
    """``{"axes", "value"}`` of the job named by ``solver.initial.job``, if any."""
    solver = document.get("solver")
    initial = solver.get("initial") if isinstance(solver, dict) else None
    if not isinstance(initial, dict) or "job" not in initial:
        return None
    path = "solver.initial.job"
    earlier = initial["job"]
    record = store.get_job(earlier) if isinstance(earlier, str) else None
    if record is None:
        raise InvalidDocument.at(path, f"there is no job {earlier!r} to start from")
    if record["state"] != "done":
        raise InvalidDocument.at(path, f"job {earlier} is {record['state']}; a warm start needs a job that is done")
    result = store.get_result(earlier)
    if result is None:
        raise InvalidDocument.at(path, f"the result of job {earlier} has expired; start from another job")
    return {"axes": result["axes"], "value": result["value"]}


class _WithoutCommandChannel:
    """An RQ worker that does not listen on RQ's command channel.

    fixq sends RQ no worker commands (a cancel is fixq's own flag, which the
    solver checks), and with RQ 3.0 and redis-py 8 that channel can hold a
    warm shutdown (SIGTERM) for up to a minute: stopping its pub/sub thread
    waits for a subscription the unsubscribe has just ended.
    """

    def subscribe(self) -> None:
        return None


def run_worker(burst: bool = False, queues: Sequence[str] | None = None) -> bool:
    """Run an RQ worker on fixq's queues with a reaper thread; True if it ran a job.

    ``queues``: priorities (``high``) or queue names (``fixq-high``), in the
    order they are drained; default all three, high first.
    """
    settings = get_settings()
    logging.basicConfig(level=settings.worker_log_level.upper(), format="%(asctime)s %(name)s %(message)s")
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
        worker_class = type(f"Fixq{base.__name__}", (_WithoutCommandChannel, base), {})
        worker = worker_class(rq_queues, connection=connection, name=f"fixq-{socket.gethostname()}-{os.getpid()}")
        return worker.work(burst=burst, logging_level=settings.worker_log_level.upper())
    finally:
        notifier.stop()
        reaper.stop()
