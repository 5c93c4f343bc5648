"""Jobs in Redis: the records, documents, results, logs and checkpoints of fixq.

Public API (for the HTTP layer, the CLI and the dashboard)
----------------------------------------------------------
``JobStore(redis, settings)`` — ``redis`` a ``redis.Redis`` with
``decode_responses=False`` (``connect(settings)`` makes one;
``JobStore.from_settings()`` both).  Every method taking a job id answers
``None`` (or an empty list) for an id that is not 16 lowercase hex characters
without touching Redis.

* ``create_job(raw_document, *, owner, estimate, document_hash, priority=None,
  idempotency_key=None, enqueue=True) -> record`` stores the record and the
  document and enqueues the first execution (``service.queue``).  ``label``,
  ``tags`` and ``priority`` are read from the document (``priority`` argument
  wins; default ``normal``).  With an ``idempotency_key`` already used by the
  same owner within ``idempotency_ttl_s``, nothing is created and that earlier
  job's record is returned.
* ``get_job(id) -> record | None``; ``get_document(id) -> dict | None``;
  ``get_result(id) -> dict | None`` (``None`` until ``done``, and after
  ``result_ttl_s``); ``get_log(id, start=0, limit=1000) -> list[dict]`` and
  ``log_length(id) -> int``.
* ``list_jobs(*, owner=None, state=None, tag=None, label=None, cursor=None,
  limit=50) -> (records, next_cursor)``: newest first.  ``owner=None`` lists
  every owner's jobs; ``state`` is one state or a list of them; ``tag`` must
  be among the job's tags; ``label`` must equal the job's label.  ``cursor``
  is the opaque ``next_cursor`` of the previous page (``ValueError`` if
  malformed); ``next_cursor`` is ``None`` after the last page.  A page may hold
  fewer than ``limit`` records while ``next_cursor`` is not ``None`` (at most
  ``LIST_SCAN_LIMIT`` jobs are examined per call).
* ``request_cancel(id) -> {"outcome", "job"} | None``: ``outcome`` is
  ``"canceled"`` (the job was queued: it left its RQ queue and is ``canceled``
  now), ``"cancel_requested"`` (it is running: the solver stops at its next
  sweep, then the job is ``canceled``), or ``"unchanged"`` (it was already
  ``done``, ``failed`` or ``canceled``); ``job`` is the record after the call.
* ``counts_by_state() -> {state: n}``, ``queue_depths() -> {priority: n}``,
  ``solve_histograms() -> {"seconds"|"iterations": {"buckets": [(upper_bound,
  cumulative_count), ..., (inf, count)], "sum", "count"}}`` (Prometheus
  shape; recorded once per ``done`` job by the worker), ``ping() -> bool``.
* ``key(*parts) -> str``: a key under the fixq prefix, for other resources.

The job record (JSON)::

    {"id", "state", "label", "tags", "owner", "priority",
     "submitted_at", "started_at", "finished_at",      # ISO-8601 UTC or null
     "attempts", "progress": {"iteration", "distance", "error_bound", "seconds"} | null,
     "estimate", "status", "iterations", "error_bound",
     "error": {"title", "detail", "errors"} | null,
     "links": {"self", "result", "log"}}

States: ``queued → running → done | failed | canceled``; ``running → queued``
when the reaper requeues a job whose execution died; ``queued → canceled``.

Keys (prefix ``fixq``, setting ``FIXQ_REDIS_PREFIX``)
---------------------------------------------------
==========================  ======  ==================================================
``fixq:job:{id}``           hash    the record; JSON-encoded where not a string, plus
                                    ``worker`` (host:pid of the last execution),
                                    ``rq_job`` (current RQ job id), ``enqueues``,
                                    ``enqueued_at`` (ms), ``document_hash``
``fixq:doc:{id}``           string  the submitted document, zlib-compressed JSON
``fixq:result:{id}``        string  the result, zlib-compressed JSON, ``SET NX`` once,
                                    TTL ``result_ttl_s``
``fixq:log:{id}``           list    log entries (JSON), one per iteration, in order;
                                    TTL ``result_ttl_s`` once the job is finished
``fixq:ckpt:{id}``          string  ``fixq-ckpt:{iteration}\\n`` + the checkpoint
                                    payload; TTL ``checkpoint_ttl_s``
``fixq:lease:{id}``         string  token of the execution owning the job, TTL ``lease_s``
``fixq:cancel:{id}``        string  present when a cancel was requested
``fixq:jobs``               zset    every job id scored by submission time (ms)
``fixq:jobs:owner:{owner}`` zset    the same per owner
``fixq:state:{state}``      set     the job ids in each state
``fixq:idem:{owner}:{h}``   string  job id of an Idempotency-Key (``h`` its SHA-256)
``fixq:metrics:solve_*``    hash    histogram buckets (``seconds``, ``iterations``)
``fixq:reaper:lock``        string  the reaper's pass lock
==========================  ======  ==================================================

Execution API (for ``service.task`` and ``service.queue`` only)
--------------------------------------------------------------
Writes made on behalf of an execution take its lease ``token`` and are Lua
scripts that do nothing unless the lease still holds that token: ``claim``,
``renew_lease``, ``release_lease``, ``stop_signals``, ``write_log``,
``save_checkpoint``, ``load_checkpoint``, ``finish``.  The reaper's
transitions, ``requeue_abandoned`` and ``rescue_lost``, are compare-and-set
scripts that act only on a job whose lease has lapsed.
"""

from __future__ import annotations

import base64
import bisect
import hashlib
import math
import re
import secrets
import time
import zlib
from collections.abc import Iterable, Iterator, Sequence
from datetime import datetime, timezone
from typing import Any

import orjson
import redis

from service import queue as rq_queues
from service.settings import Settings, get_settings

__all__ = [
    "JOB_STATES",
    "LIST_SCAN_LIMIT",
    "SOLVE_ITERATION_BUCKETS",
    "SOLVE_SECONDS_BUCKETS",
    "TERMINAL_STATES",
    "JobStore",
    "Keys",
    "connect",
    "is_job_id",
]

JOB_STATES: tuple[str, ...] = ("queued", "running", "done", "failed", "canceled")
TERMINAL_STATES = frozenset({"done", "failed", "canceled"})

SOLVE_SECONDS_BUCKETS: tuple[float, ...] = (
    0.01, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60, 300, 900, 3600, 14400, 86400,
)  # fmt: skip
"""Upper bounds, in seconds, of the solve-time histogram."""

SOLVE_ITERATION_BUCKETS: tuple[float, ...] = (
    1, 5, 10, 25, 50, 100, 250, 500, 1000, 2500, 5000, 10000, 50000, 100000, 1000000,
)  # fmt: skip
"""Upper bounds, in Bellman improvement steps, of the iteration histogram."""

LIST_SCAN_LIMIT = 2000
"""Most jobs one ``list_jobs`` call examines before it returns a cursor."""

ZLIB_LEVEL = 1
"""Compression level of documents, results and checkpoints: speed over size,
since float arrays barely compress anyway."""

_JOB_ID = re.compile(r"[0-9a-f]{16}")
_JSON_FIELDS = frozenset({"tags", "progress", "estimate", "error", "attempts", "iterations", "error_bound"})
_CKPT_HEADER = re.compile(rb"fixq-ckpt:(\d+)\n")


def is_job_id(value: object) -> bool:
    """True for a well-formed job id (16 lowercase hex characters)."""
    return isinstance(value, str) and _JOB_ID.fullmatch(value) is not None


def connect(settings: Settings | None = None) -> redis.Redis:
    """A Redis client for ``settings.redis_url`` in the mode the store needs."""
    settings = settings or get_settings()
    if not settings.redis_url:
        raise RuntimeError("FIXQ_REDIS_URL is not set (`fixq run` starts an embedded Redis server)")
    return redis.Redis.from_url(settings.redis_url, decode_responses=False, health_check_interval=30)


def _now_iso() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def _dumps(value: Any) -> bytes:
    return orjson.dumps(value, option=orjson.OPT_SERIALIZE_NUMPY)


def _compress(value: Any) -> bytes:
    return zlib.compress(_dumps(value), ZLIB_LEVEL)


def _decompress(blob: bytes | None) -> Any:
    return None if blob is None else orjson.loads(zlib.decompress(blob))


class Keys:
    """Names of fixq's Redis keys under one prefix."""

    def __init__(self, prefix: str) -> None:
        self.prefix = prefix
        self.jobs = f"{prefix}:jobs"
        self.reaper_lock = f"{prefix}:reaper:lock"
        self.solve_seconds = f"{prefix}:metrics:solve_seconds"
        self.solve_iterations = f"{prefix}:metrics:solve_iterations"
        self.states = [f"{prefix}:state:{state}" for state in JOB_STATES]

    def job(self, job_id: str) -> str:
        return f"{self.prefix}:job:{job_id}"

    def doc(self, job_id: str) -> str:
        return f"{self.prefix}:doc:{job_id}"

    def result(self, job_id: str) -> str:
        return f"{self.prefix}:result:{job_id}"

    def log(self, job_id: str) -> str:
        return f"{self.prefix}:log:{job_id}"

    def checkpoint(self, job_id: str) -> str:
        return f"{self.prefix}:ckpt:{job_id}"

    def lease(self, job_id: str) -> str:
        return f"{self.prefix}:lease:{job_id}"

    def cancel(self, job_id: str) -> str:
        return f"{self.prefix}:cancel:{job_id}"

    def owner_jobs(self, owner: str) -> str:
        return f"{self.prefix}:jobs:owner:{owner}"

    def state(self, state: str) -> str:
        return f"{self.prefix}:state:{state}"

    def idempotency(self, owner: str, key: str) -> str:
        return f"{self.prefix}:idem:{owner}:{hashlib.sha256(key.encode()).hexdigest()}"


# Every transition script gets the five state sets as KEYS[1..5] (in
# JOB_STATES order) and the job hash as KEYS[6], so that the sets and the
# record's `state` field change together.
_LUA_PRELUDE = """
local STATE_SET = {queued = 1, running = 2, done = 3, failed = 4, canceled = 5}
local function move(id, from, to)
  if from and STATE_SET[from] then redis.call('SREM', KEYS[STATE_SET[from]], id) end
  redis.call('SADD', KEYS[STATE_SET[to]], id)
  redis.call('HSET', KEYS[6], 'state', to)
end
local function is_terminal(state)
  return state == 'done' or state == 'failed' or state == 'canceled'
end
"""

# KEYS 7 doc, 8 jobs, 9 owner jobs, 10 idempotency key.
# ARGV 1 id, 2 score ms, 3 doc blob, 4 idempotency ttl s ('' = none), 5.. field/value pairs.
_CREATE = """
if ARGV[4] ~= '' then
  local existing = redis.call('GET', KEYS[10])
  if existing then return existing end
end
if redis.call('EXISTS', KEYS[6]) == 1 then return redis.error_reply('job id collision') end
redis.call('HSET', KEYS[6], unpack(ARGV, 5))
redis.call('SET', KEYS[7], ARGV[3])
redis.call('ZADD', KEYS[8], ARGV[2], ARGV[1])
redis.call('ZADD', KEYS[9], ARGV[2], ARGV[1])
redis.call('SADD', KEYS[1], ARGV[1])
if ARGV[4] ~= '' then redis.call('SET', KEYS[10], ARGV[1], 'EX', ARGV[4]) end
return ARGV[1]
"""

# KEYS 7 lease, 8 cancel, 9 checkpoint, 10 log.
# ARGV 1 id, 2 token, 3 lease ms, 4 now iso, 5 worker, 6 result ttl s.
_CLAIM = """
local state = redis.call('HGET', KEYS[6], 'state')
if not state then return 'missing' end
if is_terminal(state) then return 'terminal' end
if not redis.call('SET', KEYS[7], ARGV[2], 'NX', 'PX', ARGV[3]) then return 'busy' end
if redis.call('EXISTS', KEYS[8]) == 1 then
  redis.call('HSET', KEYS[6], 'finished_at', ARGV[4])
  move(ARGV[1], state, 'canceled')
  redis.call('DEL', KEYS[7], KEYS[8], KEYS[9])
  redis.call('EXPIRE', KEYS[10], ARGV[6])
  return 'canceled'
end
redis.call('HINCRBY', KEYS[6], 'attempts', 1)
redis.call('HSETNX', KEYS[6], 'started_at', ARGV[4])
redis.call('HSET', KEYS[6], 'worker', ARGV[5])
if state ~= 'running' then move(ARGV[1], state, 'running') end
return 'ok'
"""

_RENEW = """
if redis.call('GET', KEYS[1]) ~= ARGV[1] then return 0 end
redis.call('PEXPIRE', KEYS[1], ARGV[2])
return 1
"""

_RELEASE = """
if redis.call('GET', KEYS[1]) ~= ARGV[1] then return 0 end
return redis.call('DEL', KEYS[1])
"""

# KEYS 1 lease, 2 log, 3 job.  ARGV 1 token, 2 progress json ('' = keep),
# 3 trim: 0 none, -1 drop the whole log, n > 0 drop tail entries whose
# iteration >= n; 4.. entries to append.
_WRITE_LOG = """
if redis.call('GET', KEYS[1]) ~= ARGV[1] then return 0 end
local trim = tonumber(ARGV[3])
if trim < 0 then
  redis.call('DEL', KEYS[2])
elseif trim > 0 then
  while true do
    local tail = redis.call('LINDEX', KEYS[2], -1)
    if not tail then break end
    local ok, entry = pcall(cjson.decode, tail)
    local iteration = ok and type(entry) == 'table' and tonumber(entry['iteration'])
    if iteration and iteration >= trim then redis.call('RPOP', KEYS[2]) else break end
  end
end
for i = 4, #ARGV, 500 do
  redis.call('RPUSH', KEYS[2], unpack(ARGV, i, math.min(i + 499, #ARGV)))
end
if ARGV[2] ~= '' then redis.call('HSET', KEYS[3], 'progress', ARGV[2]) end
return 1
"""

# KEYS 1 lease, 2 checkpoint.  ARGV 1 token, 2 iteration, 3 blob, 4 ttl ms.
_SAVE_CHECKPOINT = """
if redis.call('GET', KEYS[1]) ~= ARGV[1] then return 'lease_lost' end
local head = redis.call('GETRANGE', KEYS[2], 0, 40)
local stored = tonumber(string.match(head, '^fixq%-ckpt:(%d+)\\n'))
if stored and stored > tonumber(ARGV[2]) then return 'stale' end
redis.call('SET', KEYS[2], ARGV[3], 'PX', ARGV[4])
return 'saved'
"""

# KEYS 7 lease, 8 result, 9 checkpoint, 10 cancel, 11 log, 12 seconds histogram,
# 13 iterations histogram.  ARGV 1 id, 2 token, 3 new state, 4 now iso,
# 5 result blob ('' = none), 6 result ttl s, 7 seconds bucket ('' = record
# nothing), 8 seconds, 9 iterations bucket, 10 iterations, 11.. field/value pairs.
_FINISH = """
if redis.call('GET', KEYS[7]) ~= ARGV[2] then return 0 end
local state = redis.call('HGET', KEYS[6], 'state')
if ARGV[5] ~= '' then redis.call('SET', KEYS[8], ARGV[5], 'NX', 'EX', ARGV[6]) end
if #ARGV >= 11 then redis.call('HSET', KEYS[6], unpack(ARGV, 11)) end
redis.call('HSET', KEYS[6], 'finished_at', ARGV[4])
move(ARGV[1], state, ARGV[3])
redis.call('DEL', KEYS[7], KEYS[9], KEYS[10])
redis.call('EXPIRE', KEYS[11], ARGV[6])
if ARGV[7] ~= '' then
  redis.call('HINCRBY', KEYS[12], ARGV[7], 1)
  redis.call('HINCRBY', KEYS[12], 'count', 1)
  redis.call('HINCRBYFLOAT', KEYS[12], 'sum', ARGV[8])
  redis.call('HINCRBY', KEYS[13], ARGV[9], 1)
  redis.call('HINCRBY', KEYS[13], 'count', 1)
  redis.call('HINCRBYFLOAT', KEYS[13], 'sum', ARGV[10])
end
return 1
"""

# KEYS 7 cancel, 8 RQ queue list, 9 RQ job hash, 10 log.
# ARGV 1 id, 2 RQ job id, 3 now iso, 4 flag ttl s, 5 result ttl s.
_CANCEL = """
local state = redis.call('HGET', KEYS[6], 'state')
if not state then return 'missing' end
if state == 'queued' then
  redis.call('LREM', KEYS[8], 0, ARGV[2])
  redis.call('DEL', KEYS[9], KEYS[7])
  redis.call('HSET', KEYS[6], 'finished_at', ARGV[3])
  move(ARGV[1], state, 'canceled')
  redis.call('EXPIRE', KEYS[10], ARGV[5])
  return 'canceled'
end
if state == 'running' then
  redis.call('SET', KEYS[7], '1', 'EX', ARGV[4])
  return 'cancel_requested'
end
return 'unchanged'
"""

# KEYS 7 lease, 8 cancel, 9 checkpoint, 10 log.
# ARGV 1 id, 2 max attempts, 3 now iso, 4 now ms, 5 result ttl s, 6 error json.
_REQUEUE_ABANDONED = """
local state = redis.call('HGET', KEYS[6], 'state')
if state ~= 'running' then return {'skip'} end
if redis.call('EXISTS', KEYS[7]) == 1 then return {'alive'} end
local priority = redis.call('HGET', KEYS[6], 'priority') or 'normal'
if redis.call('EXISTS', KEYS[8]) == 1 then
  redis.call('HSET', KEYS[6], 'finished_at', ARGV[3])
  move(ARGV[1], state, 'canceled')
  redis.call('DEL', KEYS[8], KEYS[9])
  redis.call('EXPIRE', KEYS[10], ARGV[5])
  return {'canceled'}
end
local attempts = tonumber(redis.call('HGET', KEYS[6], 'attempts')) or 0
if attempts >= tonumber(ARGV[2]) then
  redis.call('HSET', KEYS[6], 'finished_at', ARGV[3], 'error', ARGV[6])
  move(ARGV[1], state, 'failed')
  redis.call('DEL', KEYS[9])
  redis.call('EXPIRE', KEYS[10], ARGV[5])
  return {'failed'}
end
local n = redis.call('HINCRBY', KEYS[6], 'enqueues', 1)
local rq_job = ARGV[1] .. '-' .. n
redis.call('HSET', KEYS[6], 'rq_job', rq_job, 'enqueued_at', ARGV[4])
move(ARGV[1], state, 'queued')
return {'requeued', rq_job, priority}
"""

# KEYS 7 lease.  ARGV 1 id, 2 expected RQ job id, 3 now ms.
_RESCUE_LOST = """
if redis.call('HGET', KEYS[6], 'state') ~= 'queued' then return false end
if redis.call('HGET', KEYS[6], 'rq_job') ~= ARGV[2] then return false end
if redis.call('EXISTS', KEYS[7]) == 1 then return false end
local n = redis.call('HINCRBY', KEYS[6], 'enqueues', 1)
local rq_job = ARGV[1] .. '-' .. n
redis.call('HSET', KEYS[6], 'rq_job', rq_job, 'enqueued_at', ARGV[3])
return {rq_job, redis.call('HGET', KEYS[6], 'priority') or 'normal'}
"""


def _bucket_field(value: float, bounds: Sequence[float]) -> str:
    index = bisect.bisect_left(bounds, value)
    return "+Inf" if index == len(bounds) else repr(float(bounds[index]))


class JobStore:
    """fixq's job data model in Redis; see the module docstring."""

    def __init__(self, redis_client: redis.Redis, settings: Settings | None = None) -> None:
        if redis_client.connection_pool.connection_kwargs.get("decode_responses"):
            raise ValueError("JobStore needs a Redis client with decode_responses=False")
        self.redis = redis_client
        self.settings = settings or get_settings()
        self.keys = Keys(self.settings.redis_prefix)
        register = redis_client.register_script
        self._create = register(_CREATE)
        self._claim = register(_LUA_PRELUDE + _CLAIM)
        self._renew = register(_RENEW)
        self._release = register(_RELEASE)
        self._write_log = register(_WRITE_LOG)
        self._save_checkpoint = register(_SAVE_CHECKPOINT)
        self._finish = register(_LUA_PRELUDE + _FINISH)
        self._cancel = register(_LUA_PRELUDE + _CANCEL)
        self._requeue_abandoned = register(_LUA_PRELUDE + _REQUEUE_ABANDONED)
        self._rescue_lost = register(_LUA_PRELUDE + _RESCUE_LOST)

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
    ) -> dict[str, Any]:
        """Store a validated document as a new ``queued`` job and enqueue it."""
        priority = priority or raw_document.get("priority") or "normal"
        rq_queues.queue_name(priority)
        job_id = secrets.token_hex(8)
        now_ms = int(time.time() * 1000)
        rq_job_id = rq_queues.execution_id(job_id, 1)
        fields: dict[str, str] = {
            "id": job_id,
            "owner": owner,
            "state": "queued",
            "priority": priority,
            "submitted_at": _now_iso(),
            "attempts": "0",
            "tags": _dumps(list(raw_document.get("tags") or [])).decode(),
            "estimate": _dumps(estimate).decode(),
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
                  self.keys.owner_jobs(owner), idempotency],
            args=[job_id, now_ms, _compress(raw_document),
                  self.settings.idempotency_ttl_s if idempotency_key else "",
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

    def get_job(self, job_id: str) -> dict[str, Any] | None:
        """The job record, or None."""
        if not is_job_id(job_id):
            return None
        return self._record(self.redis.hgetall(self.keys.job(job_id)))

    def get_document(self, job_id: str) -> dict[str, Any] | None:
        """The document as submitted, or None."""
        if not is_job_id(job_id):
            return None
        return _decompress(self.redis.get(self.keys.doc(job_id)))

    def get_result(self, job_id: str) -> dict[str, Any] | None:
        """The result document of a ``done`` job, or None (not done, or expired)."""
        if not is_job_id(job_id):
            return None
        return _decompress(self.redis.get(self.keys.result(job_id)))

    def get_log(self, job_id: str, start: int = 0, limit: int = 1000) -> list[dict[str, Any]]:
        """Log entries ``start`` .. ``start + limit - 1`` (0-based), in order."""
        if not is_job_id(job_id) or limit <= 0 or start < 0:
            return []
        return [orjson.loads(e) for e in self.redis.lrange(self.keys.log(job_id), start, start + limit - 1)]

    def log_length(self, job_id: str) -> int:
        """Number of log entries stored for a job."""
        return int(self.redis.llen(self.keys.log(job_id))) if is_job_id(job_id) else 0

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
        index = self.keys.owner_jobs(owner) if owner is not None else self.keys.jobs
        records: list[dict[str, Any]] = []
        last: tuple[bytes, float] | None = None
        for scanned, batch in self._walk_index(index, _decode_cursor(cursor)):
            with self.redis.pipeline(transaction=False) as pipe:
                for member, _ in batch:
                    pipe.hgetall(self.keys.job(member.decode()))
                rows = pipe.execute()
            for (member, score), row in zip(batch, rows):
                last = (member, score)
                record = self._record(row)
                if record is None:
                    continue
                if states is not None and record["state"] not in states:
                    continue
                if tag is not None and tag not in record["tags"]:
                    continue
                if label is not None and record["label"] != label:
                    continue
                records.append(record)
                if len(records) == limit:
                    return records, _encode_cursor(member, score)
            if scanned >= LIST_SCAN_LIMIT:
                return records, _encode_cursor(*last) if last else None
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
        rq_job, priority = self.redis.hmget(self.keys.job(job_id), "rq_job", "priority")
        rq_job_id = rq_job.decode() if rq_job else ""
        outcome = self._cancel(
            keys=[*self.keys.states, self.keys.job(job_id), self.keys.cancel(job_id),
                  rq_queues.queue_key(priority.decode() if priority else "normal"),
                  rq_queues.rq_job_key(rq_job_id or "none"), self.keys.log(job_id)],
            args=[job_id, rq_job_id, _now_iso(), self.settings.job_timeout_s + 3600, self.settings.result_ttl_s],
        ).decode()  # fmt: skip
        if outcome == "missing":
            return None
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

    def claim(self, job_id: str, token: str, *, worker: str) -> str:
        """Take the lease and mark the job ``running``.

        Returns ``"ok"``; or, having written nothing, ``"missing"``,
        ``"terminal"`` (already finished) or ``"busy"`` (another execution
        holds the lease); or ``"canceled"`` when a cancel was pending.
        """
        return self._claim(
            keys=[*self.keys.states, self.keys.job(job_id), self.keys.lease(job_id), self.keys.cancel(job_id),
                  self.keys.checkpoint(job_id), self.keys.log(job_id)],
            args=[job_id, token, int(self.settings.lease_s * 1000), _now_iso(), worker, self.settings.result_ttl_s],
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
        whose iteration is ``>= n``, ``-1`` all of them.  False (nothing
        written) when the lease is not ``token``'s.
        """
        return bool(
            self._write_log(
                keys=[self.keys.lease(job_id), self.keys.log(job_id), self.keys.job(job_id)],
                args=[token, _dumps(progress) if progress is not None else "", trim_from,
                      *(_dumps(entry) for entry in entries)],
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

    def finish(
        self,
        job_id: str,
        token: str,
        state: str,
        *,
        result: dict[str, Any] | None = None,
        error: dict[str, Any] | None = None,
        iterations: int | None = None,
    ) -> bool:
        """Write the final state (and for ``done`` the result) under the lease.

        One script stores the result (``SET NX``, TTL ``result_ttl_s``), sets
        ``status``, ``iterations``, ``error_bound``, ``error`` and
        ``finished_at``, moves the state, drops lease, checkpoint and cancel
        flag and, for ``done``, records the histograms.  False (nothing
        written) when the lease is not ``token``'s.
        """
        if state not in TERMINAL_STATES:
            raise ValueError(f"{state!r} is not a terminal state")
        fields: dict[str, str] = {}
        histogram = ["", 0, "", 0]
        blob: bytes | str = ""
        if result is not None:
            blob = _compress(result)
            iterations = int(result.get("iterations") or 0)
            seconds = float(result.get("seconds") or 0.0)
            fields["status"] = str(result.get("status"))
            fields["error_bound"] = _dumps(result.get("error_bound")).decode()
            histogram = [
                _bucket_field(seconds, SOLVE_SECONDS_BUCKETS), seconds,
                _bucket_field(iterations, SOLVE_ITERATION_BUCKETS), iterations,
            ]  # fmt: skip
        if iterations is not None:
            fields["iterations"] = str(int(iterations))
        if error is not None:
            fields["error"] = _dumps(error).decode()
        return bool(
            self._finish(
                keys=[*self.keys.states, self.keys.job(job_id), self.keys.lease(job_id), self.keys.result(job_id),
                      self.keys.checkpoint(job_id), self.keys.cancel(job_id), self.keys.log(job_id),
                      self.keys.solve_seconds, self.keys.solve_iterations],
                args=[job_id, token, state, _now_iso(), blob, self.settings.result_ttl_s, *histogram,
                      *(item for pair in fields.items() for item in pair)],
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
                  self.keys.checkpoint(job_id), self.keys.log(job_id)],
            args=[job_id, self.settings.max_attempts, _now_iso(), int(time.time() * 1000),
                  self.settings.result_ttl_s, _dumps(error)],
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
            "error": value("error"),
            "links": {
                "self": f"/v1/jobs/{job_id}",
                "result": f"/v1/jobs/{job_id}/result",
                "log": f"/v1/jobs/{job_id}/log",
            },
        }


def _encode_cursor(member: bytes, score: float) -> str:
    return base64.urlsafe_b64encode(b"%d:%s" % (int(score), member)).decode().rstrip("=")


def _decode_cursor(cursor: str | None) -> tuple[float, bytes] | None:
    if cursor is None or cursor == "":
        return None
    try:
        raw = base64.urlsafe_b64decode(cursor + "=" * (-len(cursor) % 4))
        score, member = raw.split(b":", 1)
        if not _JOB_ID.fullmatch(member.decode()):
            raise ValueError
        return float(int(score)), member
    except (ValueError, UnicodeDecodeError):
        raise ValueError(f"malformed cursor {cursor!r}") from None
