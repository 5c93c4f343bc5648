"""The writes an execution of a job makes, each under the job's lease, and the reaper's transitions.

Used by ``service.task`` (one execution) and ``service.reaper`` only, through
``JobStore``, which inherits them.  Every write here is one Lua script of
``service.store.scripts``: it does nothing unless the lease still holds the
execution's token, or, for the reaper, unless the lease has lapsed.
"""

from __future__ import annotations

import re
import time
from collections.abc import Sequence
from typing import Any

import orjson
import redis

from service._formats import iso_utc
from service.settings import Settings
from service.store import scripts
from service.store.layout import (
    SOLVE_ITERATION_BUCKETS,
    SOLVE_SECONDS_BUCKETS,
    TERMINAL_STATES,
    Keys,
    bucket_field,
    compress,
    dumps,
    register_script,
)
from worker.convergence_log import KEEP_FIRST, KEEP_LATEST, iteration_of, kept, stride
from worker.interpolate import axes_summary

__all__ = ["RESULT_AXES_FIELD", "ExecutionWrites", "failed_search_summary", "search_summary"]

RESULT_AXES_FIELD = "result_axes"
"""The record hash's field holding a done job's axes summary (``worker.interpolate.axes_summary``)."""
RESULT_AXES_MAX_BYTES = 64 * 1024
"""Largest axes summary kept (bytes of JSON; a tabular model's labels): listings read whole records, so a
larger one is not kept, and the worker alone checks a warm start from that job (choice: keeps a listing
page of 50 records under a few MiB)."""

_CKPT_HEADER = re.compile(rb"fixq-ckpt:(\d+)\n")



def search_summary(search: dict[str, Any]) -> dict[str, Any]:
    """What the job record keeps of a search: its status, the unknowns found, the residuals and the number
    of trials, so that a client reads the answer without downloading the result."""
    return {"status": search.get("status"), "unknowns": search.get("unknowns"), "residuals": search.get("residuals"),
            "trials": len(search.get("trials") or [])}


def failed_search_summary(trials: list[dict[str, Any]], status: str = "no_root") -> dict[str, Any]:
    """The record's ``search`` of a search that ended without a result: ``status`` (``no_root``: no sign
    change in the bracket; ``canceled``, ``failed``: the job's state, for a search canceled or stopped by
    another fault after ``trials``), the unknowns and residuals of its last trial, and the number of trials.
    None of these statuses is ``converged``: the last trial is where the search was, not a point found."""
    last = trials[-1] if trials else {}
    return {"status": status, "unknowns": last.get("unknowns"), "residuals": last.get("residuals"),
            "trials": len(trials)}


class ExecutionWrites:
    """The lease-guarded writes of an execution and the reaper's compare-and-set transitions."""

    redis: redis.Redis
    settings: Settings
    keys: Keys

    def _register_execution_scripts(self) -> None:
        def register(source: str) -> Any:
            return register_script(self.redis, source)

        self._claim = register(scripts.LUA_PRELUDE + scripts.CLAIM)
        self._renew = register(scripts.RENEW)
        self._release = register(scripts.RELEASE)
        self._write_log = register(scripts.WRITE_LOG)
        self._save_checkpoint = register(scripts.SAVE_CHECKPOINT)
        self._finish = register(scripts.LUA_PRELUDE + scripts.FINISH)
        self._requeue_abandoned = register(scripts.LUA_PRELUDE + scripts.REQUEUE_ABANDONED)
        self._rescue_lost = register(scripts.LUA_PRELUDE + scripts.RESCUE_LOST)

    def claim(self, job_id: str, token: str, *, worker: str) -> str:
        """Take the lease and mark the job ``running``.

        Returns ``"ok"``; or, having written nothing, ``"missing"``,
        ``"terminal"`` (already finished) or ``"busy"`` (another execution
        holds the lease); or ``"canceled"`` when a cancel was pending.
        """
        return self._claim(
            keys=[*self.keys.states, self.keys.job(job_id), self.keys.lease(job_id), self.keys.cancel(job_id),
                  self.keys.checkpoint(job_id), self.keys.log(job_id), self.keys.doc(job_id)],
            args=[job_id, token, int(self.settings.lease_s * 1000), iso_utc(), worker, self.settings.job_ttl_s],
        ).decode()  # fmt: skip

    def renew_lease(self, job_id: str, token: str) -> bool:
        """Extend the lease by ``lease_s`` if ``token`` still holds it."""
        return bool(self._renew(keys=[self.keys.lease(job_id)], args=[token, int(self.settings.lease_s * 1000)]))

    def release_lease(self, job_id: str, token: str) -> bool:
        """Drop the lease if ``token`` holds it."""
        return bool(self._release(keys=[self.keys.lease(job_id)], args=[token]))

    def stop_signals(self, job_id: str, token: str) -> tuple[bool, bool]:
        """(cancel requested, lease still held by ``token``), in one round trip."""
        with self.redis.pipeline(transaction=False) as pipe:
            pipe.exists(self.keys.cancel(job_id))
            pipe.get(self.keys.lease(job_id))
            canceled, holder = pipe.execute()
        return bool(canceled), holder == token.encode()

    def write_log(
        self, job_id: str, token: str, entries: Sequence[dict[str, Any]], *, progress: dict[str, Any] | None,
        trim_from: int = 0,
    ) -> bool:  # fmt: skip
        """Append log entries and set ``progress``, under the lease.

        ``trim_from`` first drops stored entries: ``n > 0`` those at the end
        whose iteration is ``>= n``, ``-1`` all of them.  The stored log keeps
        what ``worker.convergence_log`` keeps (so that it stays bounded) and
        the record's ``log_dropped`` counts the rest.  False (nothing
        written) when the lease is not ``token``'s.
        """
        last = next((i for i in map(iteration_of, reversed(entries)) if i is not None), 0)
        k = stride(last)
        survivors = [entry for entry in entries if (i := iteration_of(entry)) is None or kept(i, last, k)]
        return bool(
            self._write_log(
                keys=[self.keys.lease(job_id), self.keys.log(job_id), self.keys.job(job_id)],
                args=[token, dumps(progress) if progress is not None else "", trim_from, KEEP_FIRST, KEEP_LATEST,
                      k, last, *(dumps(entry) for entry in survivors)],
            )  # fmt: skip
        )

    def last_logged_iteration(self, job_id: str) -> int:
        """Iteration of the last stored log entry (0 when there is none)."""
        tail = self.redis.lindex(self.keys.log(job_id), -1)
        if tail is None:
            return 0
        iteration = orjson.loads(tail).get("iteration")
        return int(iteration) if isinstance(iteration, int | float) else 0

    def save_checkpoint(self, job_id: str, token: str, iteration: int, payload: bytes) -> str:
        """Store a checkpoint under the lease unless a later one is stored.

        Returns ``"saved"``, ``"stale"`` (the stored one is later) or
        ``"lease_lost"``.
        """
        blob = b"fixq-ckpt:%d\n" % iteration + payload
        return self._save_checkpoint(
            keys=[self.keys.lease(job_id), self.keys.checkpoint(job_id)],
            args=[token, iteration, blob, int(self.settings.checkpoint_ttl_s * 1000)],
        ).decode()

    def load_checkpoint(self, job_id: str) -> tuple[int, bytes] | None:
        """(iteration, payload) of the stored checkpoint, or None."""
        blob = self.redis.get(self.keys.checkpoint(job_id))
        if blob is None:
            return None
        match = _CKPT_HEADER.match(blob)
        if match is None:
            return None
        return int(match.group(1)), blob[match.end() :]

    def result_axes(self, job_id: str) -> dict[str, list[Any] | None] | None:
        """The axes summary ``finish`` kept of a ``done`` job's result (names, labels of label axes), without
        reading the result; None for a job finished before it was kept, or none at all."""
        text = self.redis.hget(self.keys.job(job_id), RESULT_AXES_FIELD)
        return orjson.loads(text) if text else None

    def finish(
        self,
        job_id: str,
        token: str,
        state: str,
        *,
        result: dict[str, Any] | None = None,
        error: dict[str, Any] | None = None,
        iterations: int | None = None,
        search: dict[str, Any] | None = None,
    ) -> bool:
        """Write the final state (and for ``done`` the result) under the lease.

        One script stores the result (``SET NX``, TTL ``result_ttl_s``), sets
        ``status``, ``iterations``, ``error_bound``, ``search`` (a search's summary: the result's, or
        ``search`` given for a failed one), ``error``, the hash field ``result_axes`` (the result's
        ``worker.interpolate.axes_summary``, for :meth:`result_axes`, when at most ``RESULT_AXES_MAX_BYTES``;
        not part of the public record) and
        ``finished_at``, moves the state, drops lease, checkpoint and cancel
        flag, gives record, document and log their lifetime (``job_ttl_s``)
        and, for ``done``, records the histograms.  False (nothing
        written) when the lease is not ``token``'s.
        """
        if state not in TERMINAL_STATES:
            raise ValueError(f"{state!r} is not a terminal state")
        fields: dict[str, str] = {}
        histogram = ["", 0, "", 0]
        blob: bytes | str = ""
        if result is not None:
            blob = compress(result)
            iterations = int(result.get("iterations") or 0)
            seconds = float(result.get("seconds") or 0.0)
            fields["status"] = str(result.get("status"))
            fields["error_bound"] = dumps(result.get("error_bound")).decode()
            if isinstance(result.get("search"), dict):
                fields["search"] = dumps(search_summary(result["search"])).decode()
            summary = dumps(axes_summary(result["axes"])) if isinstance(result.get("axes"), dict) else b""
            if 0 < len(summary) <= RESULT_AXES_MAX_BYTES:
                fields[RESULT_AXES_FIELD] = summary.decode()
            histogram = [
                bucket_field(seconds, SOLVE_SECONDS_BUCKETS), seconds,
                bucket_field(iterations, SOLVE_ITERATION_BUCKETS), iterations,
            ]  # fmt: skip
        if search is not None and "search" not in fields:
            fields["search"] = dumps(search).decode()
        if iterations is not None:
            fields["iterations"] = str(int(iterations))
        if error is not None:
            fields["error"] = dumps(error).decode()
        return bool(
            self._finish(
                keys=[*self.keys.states, self.keys.job(job_id), self.keys.lease(job_id), self.keys.result(job_id),
                      self.keys.checkpoint(job_id), self.keys.cancel(job_id), self.keys.log(job_id),
                      self.keys.solve_seconds, self.keys.solve_iterations, self.keys.doc(job_id)],
                args=[job_id, token, state, iso_utc(), blob, self.settings.result_ttl_s, *histogram,
                      self.settings.job_ttl_s, *(item for pair in fields.items() for item in pair)],
            )  # fmt: skip
        )

    def requeue_abandoned(self, job_id: str) -> tuple[str, str | None, str]:
        """Move a ``running`` job whose lease lapsed back to ``queued``.

        Returns (outcome, new RQ job id or None, priority); outcome is
        ``"requeued"``, ``"canceled"`` (a cancel was pending), ``"failed"``
        (``max_attempts`` executions started already), ``"alive"`` or
        ``"skip"`` (not running any more).
        """
        attempts = self.redis.hget(self.keys.job(job_id), "attempts")
        error = {
            "title": "job abandoned",
            "detail": f"the job's execution stopped without finishing {int(attempts or 0)} times "
            f"(max_attempts is {self.settings.max_attempts}); it is not retried again",
            "errors": [],
        }
        reply = self._requeue_abandoned(
            keys=[*self.keys.states, self.keys.job(job_id), self.keys.lease(job_id), self.keys.cancel(job_id),
                  self.keys.checkpoint(job_id), self.keys.log(job_id), self.keys.doc(job_id)],
            args=[job_id, self.settings.max_attempts, iso_utc(), int(time.time() * 1000),
                  self.settings.job_ttl_s, dumps(error)],
        )  # fmt: skip
        outcome = reply[0].decode()
        if outcome == "requeued":
            return outcome, reply[1].decode(), reply[2].decode()
        return outcome, None, ""

    def rescue_lost(self, job_id: str, expected_rq_job: str) -> tuple[str, str] | None:
        """Give a ``queued`` job whose RQ job ``expected_rq_job`` was lost a new
        RQ job id; (new id, priority), or None if the job moved on meanwhile."""
        reply = self._rescue_lost(
            keys=[*self.keys.states, self.keys.job(job_id), self.keys.lease(job_id)],
            args=[job_id, expected_rq_job, int(time.time() * 1000)],
        )
        if not reply:
            return None
        return reply[0].decode(), reply[1].decode()
