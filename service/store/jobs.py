"""The job records in Redis: create, read, list, cancel, and the counts the metrics show.

See the package docstring (``service.store``) for the record, the states
and the keys.  ``JobStore`` also carries the execution's lease-guarded writes
(``service.store.execution``).
"""

from __future__ import annotations

import math
import secrets
import time
import unicodedata
from collections.abc import Iterable, Iterator
from typing import Any

import orjson
import redis

from service import queue as rq_queues
from service._formats import decode_cursor, encode_cursor, iso_utc
from service.settings import Settings, get_settings
from service.store import scripts
from service.store.execution import ExecutionWrites
from service.store.layout import (
    JOB_STATES,
    LIST_SCAN_LIMIT,
    SOLVE_ITERATION_BUCKETS,
    SOLVE_SECONDS_BUCKETS,
    Keys,
    compress,
    connect,
    decompress,
    dumps,
    is_job_id,
    register_script,
)
from worker.document import DEFAULT_PRIORITY

__all__ = ["FORGET_SCAN_LIMIT", "JobStore"]

FORGET_SCAN_LIMIT = 2000
"""Most old jobs one ``forget_expired`` call examines in each listing (count)."""

_JSON_FIELDS = frozenset({"tags", "progress", "estimate", "error", "attempts", "iterations", "error_bound",
                          "search"})


class JobStore(ExecutionWrites):
    """fixq's job data model in Redis; see the ``service.store`` package docstring."""

    def __init__(self, redis_client: redis.Redis, settings: Settings | None = None) -> None:
        if redis_client.connection_pool.connection_kwargs.get("decode_responses"):
            raise ValueError("JobStore needs a Redis client with decode_responses=False")
        self.redis = redis_client
        self.settings = settings or get_settings()
        self.keys = Keys(self.settings.redis_prefix)
        self._create = register_script(redis_client, scripts.CREATE)
        self._cancel = register_script(redis_client, scripts.LUA_PRELUDE + scripts.CANCEL)
        self._register_execution_scripts()

    @classmethod
    def from_settings(cls, settings: Settings | None = None) -> JobStore:
        """A store on a new client for ``settings.redis_url``."""
        settings = settings or get_settings()
        return cls(connect(settings), settings)

    def key(self, *parts: str) -> str:
        """A key under the fixq prefix, e.g. ``key("sweep", sweep_id)``."""
        return ":".join((self.keys.prefix, *parts))

    def ping(self) -> bool:
        """True when Redis answers."""
        try:
            return bool(self.redis.ping())
        except redis.RedisError:
            return False

    def create_job(
        self,
        raw_document: dict[str, Any],
        *,
        owner: str,
        estimate: dict[str, Any],
        document_hash: str,
        priority: str | None = None,
        idempotency_key: str | None = None,
        enqueue: bool = True,
        job_id: str | None = None,
    ) -> dict[str, Any]:
        """Store a validated document as a new ``queued`` job and enqueue it.

        ``job_id``: the id to use (one an ``Idempotency-Key`` claim already names), else a fresh one.
        """
        priority = priority or raw_document.get("priority") or DEFAULT_PRIORITY
        rq_queues.queue_name(priority)
        job_id = job_id or secrets.token_hex(8)
        now_ms = int(time.time() * 1000)
        rq_job_id = rq_queues.execution_id(job_id, 1)
        fields: dict[str, str] = {
            "id": job_id,
            "owner": owner,
            "state": "queued",
            "priority": priority,
            "submitted_at": iso_utc(),
            "attempts": "0",
            "tags": dumps(list(raw_document.get("tags") or [])).decode(),
            "estimate": dumps(estimate).decode(),
            "document_hash": document_hash,
            "rq_job": rq_job_id,
            "enqueues": "1",
            "enqueued_at": str(now_ms),
        }
        if raw_document.get("label") is not None:
            fields["label"] = str(raw_document["label"])
        idempotency = self.keys.idempotency(owner, idempotency_key) if idempotency_key else self.keys.job(job_id)
        created = self._create(
            keys=[*self.keys.states, self.keys.job(job_id), self.keys.doc(job_id), self.keys.jobs,
                  self.keys.owner_jobs(owner), idempotency, self.keys.owners],
            args=[job_id, now_ms, compress(raw_document),
                  self.settings.idempotency_ttl_s if idempotency_key else "", owner,
                  *(item for pair in fields.items() for item in pair)],
        ).decode()  # fmt: skip
        if created != job_id:
            record = self.get_job(created)
            if record is not None:
                return record
            raise RuntimeError(f"idempotency key points at job {created}, which no longer exists")
        if enqueue:
            try:
                rq_queues.enqueue_execution(self.redis, self.settings, job_id, rq_job_id, priority)
            except redis.RedisError:
                # The record says `queued`; the reaper re-enqueues a job that
                # sits in no RQ queue, so the submission is not lost.
                pass
        record = self.get_job(job_id)
        assert record is not None
        return record

    def enqueue_created(self, record: dict[str, Any]) -> None:
        """Put the first execution of a job made with ``create_job(..., enqueue=False)`` on its queue.

        A Redis error is swallowed as in ``create_job``: the reaper enqueues a
        ``queued`` job that sits in no RQ queue.
        """
        job_id = record["id"]
        try:
            rq_queues.enqueue_execution(
                self.redis, self.settings, job_id, rq_queues.execution_id(job_id, 1), record["priority"]
            )
        except redis.RedisError:
            pass

    def get_job(self, job_id: str) -> dict[str, Any] | None:
        """The job record, or None."""
        if not is_job_id(job_id):
            return None
        return self._record(self.redis.hgetall(self.keys.job(job_id)))

    def get_document(self, job_id: str) -> dict[str, Any] | None:
        """The document as submitted, or None."""
        if not is_job_id(job_id):
            return None
        return decompress(self.redis.get(self.keys.doc(job_id)))

    def get_result(self, job_id: str) -> dict[str, Any] | None:
        """The result document of a ``done`` job, or None (not done, or expired)."""
        if not is_job_id(job_id):
            return None
        return decompress(self.redis.get(self.keys.result(job_id)))

    def get_log(self, job_id: str, start: int = 0, limit: int = 1000) -> list[dict[str, Any]]:
        """Log entries ``start`` .. ``start + limit - 1`` (0-based), in order."""
        if not is_job_id(job_id) or limit <= 0 or start < 0:
            return []
        return [orjson.loads(e) for e in self.redis.lrange(self.keys.log(job_id), start, start + limit - 1)]

    def log_length(self, job_id: str) -> int:
        """Number of log entries stored for a job."""
        return int(self.redis.llen(self.keys.log(job_id))) if is_job_id(job_id) else 0

    def log_dropped(self, job_id: str) -> int:
        """Iterations the stored log no longer holds (``worker.convergence_log`` keeps it bounded)."""
        if not is_job_id(job_id):
            return 0
        return int(self.redis.hget(self.keys.job(job_id), "log_dropped") or 0)

    def forget_expired(self, now: float | None = None, *, scan_limit: int = FORGET_SCAN_LIMIT) -> list[str]:
        """Drop the jobs whose record expired from the listings and the state sets; their ids.

        A finished job's record lives ``job_ttl_s`` after its end, so only
        jobs submitted at least that long before ``now`` (seconds since the
        epoch; default the current time) can be gone: at most ``scan_limit``
        of them, oldest first, are examined in the listing of every job and
        in each owner's.  The reaper calls this on its passes.
        """
        horizon_ms = int(((time.time() if now is None else now) - self.settings.job_ttl_s) * 1000)
        owners = sorted(member.decode() for member in self.redis.smembers(self.keys.owners))
        gone = self._forget_in(self.keys.jobs, horizon_ms, scan_limit, states=True)
        for owner in owners:
            self._forget_in(self.keys.owner_jobs(owner), horizon_ms, scan_limit, states=False)
        return gone

    def _forget_in(self, index: str, horizon_ms: int, scan_limit: int, *, states: bool) -> list[str]:
        """The members of ``index`` scored up to ``horizon_ms`` whose record is gone, removed from it."""
        gone: list[bytes] = []
        offset = examined = 0
        while examined < scan_limit:
            batch = self.redis.zrangebyscore(
                index, "-inf", horizon_ms, start=offset, num=min(500, scan_limit - examined)
            )
            if not batch:
                break
            examined += len(batch)
            with self.redis.pipeline(transaction=False) as pipe:
                for member in batch:
                    pipe.exists(self.keys.job(member.decode()))
                exists = pipe.execute()
            missing = [member for member, present in zip(batch, exists) if not present]
            offset += len(batch) - len(missing)
            self._remove_members(index, missing, states=states)
            gone += missing
        return [member.decode() for member in gone]

    def _remove_members(self, index: str, members: list[bytes], *, states: bool) -> None:
        if not members:
            return
        with self.redis.pipeline(transaction=False) as pipe:
            pipe.zrem(index, *members)
            if states:
                for key in self.keys.states:
                    pipe.srem(key, *members)
            pipe.execute()

    def list_jobs(
        self,
        *,
        owner: str | None = None,
        state: str | Iterable[str] | None = None,
        tag: str | None = None,
        label: str | None = None,
        cursor: str | None = None,
        limit: int = 50,
    ) -> tuple[list[dict[str, Any]], str | None]:
        """A page of job records, newest first; see the module docstring."""
        states = {state} if isinstance(state, str) else (set(state) if state is not None else None)
        if states is not None and not states <= set(JOB_STATES):
            raise ValueError(f"unknown state {sorted(states - set(JOB_STATES))}; expected one of {JOB_STATES}")
        limit = max(1, min(int(limit), 1000))
        tag = tag and unicodedata.normalize("NFC", tag)  # tags are stored composed (worker/document/tags.py)
        index = self.keys.owner_jobs(owner) if owner is not None else self.keys.jobs
        expired: list[bytes] = []
        try:
            return self._list_page(index, decode_cursor(cursor), limit, states, tag, label, expired)
        finally:
            # A member whose record is gone has expired (a record and its
            # listing entries are made together): tidy the listing now rather
            # than at the reaper's next forget_expired.
            self._remove_members(index, expired, states=owner is None)

    def _list_page(
        self,
        index: str,
        cursor: tuple[float, bytes] | None,
        limit: int,
        states: set[str] | None,
        tag: str | None,
        label: str | None,
        expired: list[bytes],
    ) -> tuple[list[dict[str, Any]], str | None]:
        records: list[dict[str, Any]] = []
        last: tuple[bytes, float] | None = None
        for scanned, batch in self._walk_index(index, cursor):
            with self.redis.pipeline(transaction=False) as pipe:
                for member, _ in batch:
                    pipe.hgetall(self.keys.job(member.decode()))
                rows = pipe.execute()
            for (member, score), row in zip(batch, rows):
                last = (member, score)
                record = self._record(row)
                if record is None:
                    expired.append(member)
                    continue
                if states is not None and record["state"] not in states:
                    continue
                if tag is not None and tag not in record["tags"]:
                    continue
                if label is not None and record["label"] != label:
                    continue
                records.append(record)
                if len(records) == limit:
                    return records, encode_cursor(member, score)
            if scanned >= LIST_SCAN_LIMIT:
                return records, encode_cursor(*last) if last else None
        return records, None

    def _walk_index(
        self, index: str, cursor: tuple[float, bytes] | None
    ) -> Iterator[tuple[int, list[tuple[bytes, float]]]]:
        """Batches of (member, score) after ``cursor``, newest first, with a running count."""
        max_score: float | str = "+inf"
        offset = 0
        if cursor is not None:
            max_score, after = cursor
            # Equal scores come in reverse lexicographic order, so the members
            # already returned at the cursor's score are those >= its member.
            ties = self.redis.zrangebyscore(index, max_score, max_score)
            offset = sum(1 for member in ties if member >= after)
        scanned = 0
        batch_size = 200
        while scanned < LIST_SCAN_LIMIT:
            size = min(batch_size, LIST_SCAN_LIMIT - scanned)
            batch = self.redis.zrevrangebyscore(index, max_score, "-inf", start=offset, num=size, withscores=True)
            if not batch:
                return
            if max_score == "+inf":
                # Pin the window at the newest job seen so that jobs submitted
                # meanwhile (all newer) do not shift the offsets.
                max_score = batch[0][1]
            offset += len(batch)
            scanned += len(batch)
            yield scanned, batch

    def request_cancel(self, job_id: str) -> dict[str, Any] | None:
        """Cancel a queued job now or ask a running one to stop; see the module docstring."""
        if not is_job_id(job_id):
            return None
        rq_job, priority, owner = self.redis.hmget(self.keys.job(job_id), "rq_job", "priority", "owner")
        rq_job_id = rq_job.decode() if rq_job else ""
        outcome = self._cancel(
            keys=[*self.keys.states, self.keys.job(job_id), self.keys.cancel(job_id),
                  rq_queues.queue_key(priority.decode() if priority else DEFAULT_PRIORITY),
                  rq_queues.rq_job_key(rq_job_id or "none"), self.keys.log(job_id), self.keys.doc(job_id)],
            args=[job_id, rq_job_id, iso_utc(), self.settings.job_timeout_s + 3600, self.settings.job_ttl_s],
        ).decode()  # fmt: skip
        if outcome == "missing":
            return None
        if outcome == "canceled" and owner is not None:
            rq_queues.drop_pending(self.redis, self.settings, job_id, rq_job_id, owner.decode(),
                                   priority.decode() if priority else DEFAULT_PRIORITY)  # fmt: skip
        return {"outcome": outcome, "job": self.get_job(job_id)}

    def counts_by_state(self) -> dict[str, int]:
        """Number of jobs in each state."""
        with self.redis.pipeline(transaction=False) as pipe:
            for key in self.keys.states:
                pipe.scard(key)
            counts = pipe.execute()
        return dict(zip(JOB_STATES, (int(n) for n in counts)))

    def queue_depths(self) -> dict[str, int]:
        """Number of executions waiting in each priority's RQ queue."""
        with self.redis.pipeline(transaction=False) as pipe:
            for priority in rq_queues.PRIORITIES:
                pipe.llen(rq_queues.queue_key(priority))
            depths = pipe.execute()
        return dict(zip(rq_queues.PRIORITIES, (int(n) for n in depths)))

    def solve_histograms(self) -> dict[str, dict[str, Any]]:
        """Cumulative histograms of solve seconds and iterations of ``done`` jobs."""
        out = {}
        for name, key, bounds in (
            ("seconds", self.keys.solve_seconds, SOLVE_SECONDS_BUCKETS),
            ("iterations", self.keys.solve_iterations, SOLVE_ITERATION_BUCKETS),
        ):
            raw = {k.decode(): v.decode() for k, v in self.redis.hgetall(key).items()}
            running = 0
            buckets: list[tuple[float, int]] = []
            for bound in bounds:
                running += int(raw.get(repr(float(bound)), 0))
                buckets.append((float(bound), running))
            count = int(raw.get("count", 0))
            buckets.append((math.inf, count))
            out[name] = {"buckets": buckets, "sum": float(raw.get("sum", 0.0)), "count": count}
        return out

    def job_ids_in_state(self, state: str) -> list[str]:
        """Every job id currently in ``state``."""
        return sorted(m.decode() for m in self.redis.smembers(self.keys.state(state)))

    def _record(self, raw: dict[bytes, bytes]) -> dict[str, Any] | None:
        if not raw:
            return None
        fields = {k.decode(): v.decode() for k, v in raw.items()}

        def value(name: str) -> Any:
            text = fields.get(name)
            if text is None or text == "":
                return None
            return orjson.loads(text) if name in _JSON_FIELDS else text

        job_id = fields["id"]
        return {
            "id": job_id,
            "state": fields.get("state"),
            "label": value("label"),
            "tags": value("tags") or [],
            "owner": value("owner"),
            "priority": value("priority"),
            "submitted_at": value("submitted_at"),
            "started_at": value("started_at"),
            "finished_at": value("finished_at"),
            "attempts": value("attempts") or 0,
            "progress": value("progress"),
            "estimate": value("estimate"),
            "status": value("status"),
            "iterations": value("iterations"),
            "error_bound": value("error_bound"),
            "search": value("search"),
            "error": value("error"),
            "links": {
                "self": f"/v1/jobs/{job_id}",
                "result": f"/v1/jobs/{job_id}/result",
                "log": f"/v1/jobs/{job_id}/log",
            },
        }


