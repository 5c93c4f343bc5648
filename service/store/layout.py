"""The job store's vocabulary: job states, key names, histogram buckets and the stored encodings."""

from __future__ import annotations

import bisect
import hashlib
import zlib
from collections.abc import Sequence
from typing import Any

import orjson
import redis
from redis.commands.core import Script

from service._formats import is_resource_id
from service.settings import Settings, get_settings

__all__ = [
    "JOB_STATES",
    "LIST_SCAN_LIMIT",
    "SOLVE_ITERATION_BUCKETS",
    "SOLVE_SECONDS_BUCKETS",
    "TERMINAL_STATES",
    "ZLIB_LEVEL",
    "Keys",
    "bucket_field",
    "compress",
    "connect",
    "decompress",
    "dumps",
    "is_job_id",
    "register_script",
]

JOB_STATES: tuple[str, ...] = ("queued", "running", "done", "failed", "canceled")
"""Every job state, in lifecycle order (also the order of the state sets in the Lua scripts' KEYS)."""
TERMINAL_STATES = frozenset({"done", "failed", "canceled"})
"""The states a job never leaves."""
SOLVE_SECONDS_BUCKETS: tuple[float, ...] = (
    0.01, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60, 300, 900, 3600, 14400, 86400,
)  # fmt: skip
"""Upper bounds, in seconds, of the solve-time histogram."""

SOLVE_ITERATION_BUCKETS: tuple[float, ...] = (
    1, 5, 10, 25, 50, 100, 250, 500, 1000, 2500, 5000, 10000, 50000, 100000, 1000000,
)  # fmt: skip
"""Upper bounds, in iterations, of the iteration histogram."""

LIST_SCAN_LIMIT = 2000
"""Most jobs one ``list_jobs`` call examines before it returns a cursor (count)."""

ZLIB_LEVEL = 1
"""Compression level of documents, results and checkpoints: speed over size,
since float arrays barely compress anyway."""


def is_job_id(value: object) -> bool:
    """True for a well-formed job id (16 lowercase hex characters)."""
    return is_resource_id(value)


def connect(settings: Settings | None = None) -> redis.Redis:
    """A Redis client for ``settings.redis_url`` in the mode the store needs."""
    settings = settings or get_settings()
    if not settings.redis_url:
        raise RuntimeError("FIXQ_REDIS_URL is not set (`fixq run` starts an embedded Redis server)")
    return redis.Redis.from_url(settings.redis_url, decode_responses=False, health_check_interval=30)


_OOM_REPLY = "OOM command not allowed"


class _Script:
    """A registered Lua script whose refusal for want of memory raises ``OutOfMemoryError``.

    Redis answers a write refused at ``maxmemory`` inside a script with a
    generic script error; raising the same error as a plain command gets
    lets every caller tell "Redis is full" from a bug.
    """

    def __init__(self, script: Script) -> None:
        self._script = script

    def __call__(self, keys: Sequence[Any] = (), args: Sequence[Any] = ()) -> Any:
        try:
            return self._script(keys=keys, args=args)
        except redis.exceptions.ResponseError as exc:
            if _OOM_REPLY in str(exc):
                raise redis.exceptions.OutOfMemoryError(str(exc)) from exc
            raise


def register_script(client: redis.Redis, source: str) -> _Script:
    """``client.register_script(source)``, with Redis's out-of-memory refusal raised as ``OutOfMemoryError``."""
    return _Script(client.register_script(source))


def dumps(value: Any) -> bytes:
    """JSON bytes of ``value``, numpy arrays included."""
    return orjson.dumps(value, option=orjson.OPT_SERIALIZE_NUMPY)


def compress(value: Any) -> bytes:
    """``value`` as zlib-compressed JSON (documents, results)."""
    return zlib.compress(dumps(value), ZLIB_LEVEL)


def decompress(blob: bytes | None) -> Any:
    """The value of a :func:`compress` blob; None for None."""
    return None if blob is None else orjson.loads(zlib.decompress(blob))


def bucket_field(value: float, bounds: Sequence[float]) -> str:
    """The histogram field counting ``value``: its bucket's upper bound, or ``+Inf``."""
    index = bisect.bisect_left(bounds, value)
    return "+Inf" if index == len(bounds) else repr(float(bounds[index]))


class Keys:
    """Names of fixq's Redis keys under one prefix."""

    def __init__(self, prefix: str) -> None:
        self.prefix = prefix
        self.jobs = f"{prefix}:jobs"
        self.owners = f"{prefix}:owners"
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

