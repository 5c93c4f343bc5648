"""One execution of a job: its lease, its heartbeat, its writes, and how it rides through Redis outages.

``Execution(store, job_id).run()`` claims the job under a fresh lease token,
renews the lease from a heartbeat thread, calls ``worker.solve`` with the
progress, checkpoint and stop hooks, and writes the outcome under the lease
(see :mod:`service.task` for the whole story of a job's execution).

A Redis outage does not end a solve: a failed checkpoint save, progress
write or stop check is logged and the solve goes on; the heartbeat takes a
lease that lapsed meanwhile back if nobody else claimed the job; the final
writes are retried with backoff for up to ``redis_retry_s``, and write
nothing once the lease is known to be another execution's.
"""

from __future__ import annotations

import logging
import os
import secrets
import socket
import threading
import time
from collections.abc import Callable
from typing import Any, TypeVar

import redis
from rq.timeouts import JobTimeoutException

from service.checkpoints import RedisCheckpoint
from service.store import JobStore
from service.store.execution import failed_search_summary
from worker import solve
from worker.convergence_log import ConvergenceLog
from worker.errors import Canceled, FixqError, InvalidDocument

__all__ = ["FIRST_RETRY_S", "LONGEST_RETRY_S", "Execution", "warm_start"]

logger = logging.getLogger("fixq.task")
_T = TypeVar("_T")

_MIB = 2**20
FIRST_RETRY_S = 0.1
"""Seconds before the first retry of a Redis write that failed (the wait doubles up to ``LONGEST_RETRY_S``)."""
LONGEST_RETRY_S = 2.0
"""Longest wait in seconds between two retries of a Redis write."""

# The lease heartbeat: renew the lease if it is ours; take it again if it
# lapsed (a Redis outage outlasted it) while nobody else claimed the job —
# still `running`, with the attempt count of our claim — so that the
# execution keeps its work rather than leave it to the reaper.
# KEYS 1 lease, 2 job.  ARGV 1 token, 2 lease ms, 3 attempts at our claim.
_RENEW_OR_RETAKE = """
local holder = redis.call('GET', KEYS[1])
if holder == ARGV[1] then
  redis.call('PEXPIRE', KEYS[1], ARGV[2])
  return 1
end
if holder then return 0 end
local job = redis.call('HMGET', KEYS[2], 'state', 'attempts')
if job[1] ~= 'running' or job[2] ~= ARGV[3] then return 0 end
redis.call('SET', KEYS[1], ARGV[1], 'PX', ARGV[2])
return 2
"""


class Execution:
    """One run of one job under one lease token."""

    def __init__(self, store: JobStore, job_id: str) -> None:
        self.store = store
        self.settings = store.settings
        self.job_id = job_id
        self.token = secrets.token_hex(16)
        self.lease_lost = threading.Event()
        self._heartbeat_stop = threading.Event()
        self._stopping = False
        self._last_stop_check = 0.0
        self._buffer: list[dict[str, Any]] = []
        # A log left by an earlier execution is dropped by the first write,
        # unless a checkpoint is resumed (which rewrites it to its own log).
        self._trim_from = -1
        self._finished = False
        self._last_iteration = 0
        # A search's trial rows by number (log entries with ``search_trial``, a resumed checkpoint's included):
        # the record's summary of a search that ends without a result (canceled, failed) is made from them.
        self._trials: dict[int, dict[str, Any]] = {}
        self._last_flush = time.monotonic()
        self.worker = f"{socket.gethostname()}:{os.getpid()}"
        self._attempts = b""
        self._renew = store.redis.register_script(_RENEW_OR_RETAKE)

    def run(self) -> str:
        claim = self.store.claim(self.job_id, self.token, worker=self.worker)
        if claim != "ok":
            logger.info("job %s: not run (%s)", self.job_id, claim)
            return claim
        heartbeat = threading.Thread(target=self._heartbeat, name=f"fixq-lease-{self.job_id}", daemon=True)
        heartbeat.start()
        try:
            self._attempts = self.store.redis.hget(self.store.keys.job(self.job_id), "attempts") or b""
            return self._solve_and_record()
        except redis.RedisError:
            logger.exception("job %s: Redis stayed unreachable; leaving the job to the reaper", self.job_id)
            return "redis_error"
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
                checkpoint=RedisCheckpoint(self),
                should_stop=self.should_stop,
                warm_start=warm_start(self.store, document),
                limits={
                    "max_bytes": int(self.settings.max_problem_mb * _MIB),
                    "max_seconds": self.settings.max_solve_s,
                    "enforce_memory": True,
                },
            )
        except Canceled as exc:
            if self.lease_lost.is_set():
                return self._lost()
            self._final_flush()
            return self._finish("canceled", iterations=exc.context.get("iteration"), search=self._stopped("canceled"))
        except FixqError as exc:
            self._final_flush()
            trials = exc.context.get("trials")
            search = failed_search_summary(trials) if isinstance(trials, list) else self._stopped("failed")
            return self._finish("failed", error={"title": exc.title, "detail": exc.detail, "errors": exc.errors},
                                search=search)
        except redis.RedisError:
            # Not the job's fault: it stays `running`, its lease lapses and the
            # reaper gives it to another execution, which resumes it.
            logger.exception("job %s: Redis failed during the execution; leaving it to the reaper", self.job_id)
            return "redis_error"
        except JobTimeoutException:
            self._final_flush()
            detail = f"the solve ran longer than job_timeout_s ({self.settings.job_timeout_s} s) and was stopped"
            return self._finish("failed", error={"title": "job timed out", "detail": detail, "errors": []},
                                search=self._stopped("failed"))
        except Exception as exc:
            logger.exception("job %s: the solve raised", self.job_id)
            self._final_flush()
            detail = f"the solver stopped on an internal error: {type(exc).__name__}: {exc}"[:500]
            return self._finish("failed", error={"title": "solver error", "detail": detail, "errors": []},
                                search=self._stopped("failed"))
        self._final_flush()
        return self._finish("done", result=result)

    def _stopped(self, state: str) -> dict[str, Any] | None:
        """The record's ``search`` of a search that ended ``state`` without a result: the trials it made, the
        last one's unknowns and residuals (:func:`failed_search_summary`); None when no trial ended."""
        if not self._trials:
            return None
        return failed_search_summary([self._trials[number] for number in sorted(self._trials)], status=state)

    def _keep_trials(self, entries: list[dict[str, Any]]) -> None:
        """Keep the search trials of ``entries``; a trial's number again (a search not resumed from what is
        stored) supersedes it and every later one."""
        for entry in entries:
            number, row = entry.get("iteration"), entry.get("search_trial")
            if isinstance(number, int) and isinstance(row, dict):
                for later in [n for n in self._trials if n >= number]:
                    del self._trials[later]
                self._trials[number] = row

    def _finish(self, state: str, **outcome: Any) -> str:
        def write() -> bool:
            return self.store.finish(self.job_id, self.token, state, **outcome)

        written, retried = self._retrying(write)
        if not written and retried and self._finished_by_us(state):
            written = True
        elif not written and self._retrying(self.still_ours)[0]:
            # The lease lapsed while Redis was away and nobody took the job: write under it again.
            written = self._retrying(write)[0]
        if written:
            self._finished = True
            logger.info("job %s: %s", self.job_id, state)
            return state
        return self._lost()

    def _finished_by_us(self, state: str) -> bool:
        """After a retried ``finish``: whether the attempt whose reply was lost wrote ``state`` itself."""
        fields = self.store.redis.hmget(self.store.keys.job(self.job_id), "state", "worker", "attempts")
        return fields == [state.encode(), self.worker.encode(), self._attempts]

    def _retrying(self, write: Callable[[], _T]) -> tuple[_T, bool]:
        """``write()``'s value, retried with backoff through Redis errors for up to ``redis_retry_s``;
        (value, whether it was retried).  Raises the last ``RedisError`` once that time is up."""
        deadline = time.monotonic() + self.settings.redis_retry_s
        wait_s = FIRST_RETRY_S
        retried = False
        while True:
            try:
                return write(), retried
            except redis.RedisError as exc:
                if time.monotonic() + wait_s > deadline:
                    raise
                logger.warning("job %s: Redis write failed (%s); retrying in %.1f s", self.job_id, exc, wait_s)
            time.sleep(wait_s)
            wait_s = min(2 * wait_s, LONGEST_RETRY_S)
            retried = True

    def _lost(self) -> str:
        logger.warning("job %s: lease lost; stopped without writing", self.job_id)
        return "lease_lost"

    def _heartbeat(self) -> None:
        # Only Redis can say the lease is lost: while it is unreachable the
        # solve goes on, and every write is compare-and-set on the token.
        # While Redis is unreachable it asks more often, to take a lapsed lease
        # back before a reaper gives the job to another execution.
        interval = self.settings.lease_s / 3
        wait_s = interval
        failing = False
        while not self._heartbeat_stop.wait(wait_s):
            wait_s = min(interval, 2 * FIRST_RETRY_S)
            try:
                renewed = self._renew_or_retake()
            except redis.RedisError as exc:
                if not failing:
                    self._log_quietly("job %s: could not renew the lease (%s); retrying", self.job_id, exc)
                failing = True
                continue
            except MemoryError:
                # The solve's memory limit is process-wide: this thread may hit it too; try again soon.
                continue
            wait_s, failing = interval, False
            if not renewed:
                self.lease_lost.set()
                return
            if renewed == 2:
                self._log_quietly("job %s: the lease had lapsed during a Redis outage; taken again", self.job_id)

    def _renew_or_retake(self) -> int:
        """0: the lease is another execution's (or the job is no longer running); 1: renewed; 2: taken back."""
        return int(
            self._renew(
                keys=[self.store.keys.lease(self.job_id), self.store.keys.job(self.job_id)],
                args=[self.token, int(self.settings.lease_s * 1000), self._attempts],
            )
        )

    def still_ours(self) -> bool:
        """After a write refused for want of the lease: take it back if it only lapsed (a Redis outage
        outlasted it) and nobody claimed the job since; else the lease is lost."""
        if self._renew_or_retake():
            logger.info("job %s: the lease had lapsed; taken again", self.job_id)
            return True
        self.lease_lost.set()
        return False

    @staticmethod
    def _log_quietly(message: str, *args: Any) -> None:
        try:
            logger.warning(message, *args)
        except MemoryError:
            pass

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
            ours = ours or self.still_ours()
        except redis.RedisError:
            # Keep solving through a Redis outage; only Redis can say the lease is gone.
            return False
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
        self._keep_trials([entry])
        self._buffer.append(entry)
        if time.monotonic() - self._last_flush >= self.settings.progress_interval_s:
            self.flush()

    def flush(self) -> None:
        """Write buffered log entries and the latest progress under the lease; a Redis error keeps them buffered."""
        try:
            self._write_buffer()
        except redis.RedisError as exc:
            logger.warning("job %s: could not write progress (%s)", self.job_id, exc)

    def _final_flush(self) -> None:
        """Write what is buffered, retrying through a Redis outage (see :meth:`_retrying`)."""
        self._retrying(self._write_buffer)

    def _write_buffer(self) -> None:
        self._last_flush = time.monotonic()
        if not self._buffer and not self._trim_from:
            return
        entries, self._buffer = self._buffer, []
        progress = None
        if entries:
            last = entries[-1]
            progress = {key: last.get(key) for key in ("iteration", "distance", "error_bound", "seconds")}
            # A finite horizon's entries also say which period was solved and how many there are.
            progress.update((key, last[key]) for key in ("period", "periods") if key in last)
        try:
            written = self.store.write_log(
                self.job_id, self.token, entries, progress=progress, trim_from=self._trim_from
            )
            if not written and self.still_ours():
                written = self.store.write_log(
                    self.job_id, self.token, entries, progress=progress, trim_from=self._trim_from
                )
        except redis.RedisError:
            # Kept bounded as the stored log is (the entries it drops would be dropped
            # by write_log anyway), so a long outage cannot grow the buffer without end.
            self._buffer = ConvergenceLog(entries + self._buffer)
            raise
        self._trim_from = 0
        if not written:
            self.lease_lost.set()

    def replace_log(self, entries: list[dict[str, Any]]) -> None:
        """Make the stored log exactly ``entries`` (a checkpoint's log)."""
        self._buffer = []
        self._trim_from = 0
        self._trials = {}
        self._keep_trials(entries)
        written = self.store.write_log(self.job_id, self.token, entries, progress=None, trim_from=-1)
        if not written and self.still_ours():
            written = self.store.write_log(self.job_id, self.token, entries, progress=None, trim_from=-1)
        if not written:
            self.lease_lost.set()
        iterations = [e.get("iteration") for e in entries if isinstance(e.get("iteration"), int)]
        self._last_iteration = iterations[-1] if iterations else 0


def warm_start(store: JobStore, document: dict[str, Any]) -> dict[str, Any] | None:
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
    return {key: result[key] for key in ("axes", "axis_order", "value") if key in result}
