"""Which workers are alive: a beacon each worker process sends, and the count ``/healthz`` reports.

RQ keeps a worker's registration for up to a day after the process died,
and a ``SimpleWorker`` sends RQ no heartbeat while a job runs, so neither
RQ's list nor its heartbeats tell a live worker from a dead one.  Each
worker process runs a :class:`Beacon` thread instead: every
``worker_beacon_s`` it stamps its name with the current time in the sorted
set ``fixq:workers:seen``.  The thread runs beside the solve (whose kernels
release the interpreter between iterations, as the lease heartbeat relies
on too), so a busy worker keeps counting.  :func:`live_workers` counts the
names stamped within the last :data:`LIVE_INTERVALS` intervals and drops
older ones; a worker that stops cleanly removes its own name at once.
"""

from __future__ import annotations

import time

import redis

from service._periodic import PeriodicThread
from service.store import JobStore

__all__ = ["LIVE_INTERVALS", "Beacon", "live_workers", "seen_key"]

LIVE_INTERVALS = 3
"""A worker not heard from for this many beacon intervals (count) is taken for dead."""


def seen_key(store: JobStore) -> str:
    """The sorted set of worker names scored by when each was last heard from (unix seconds)."""
    return store.key("workers", "seen")


class Beacon(PeriodicThread):
    """Stamps one worker's name every ``worker_beacon_s`` seconds; Redis errors are logged and retried."""

    name = "fixq-beacon"

    def __init__(self, store: JobStore, worker_name: str) -> None:
        super().__init__(store.settings.worker_beacon_s)
        self.store = store
        self.worker_name = worker_name

    def run_once(self) -> bool:
        self.store.redis.zadd(seen_key(self.store), {self.worker_name: time.time()})
        return False

    def stop(self, timeout_s: float = 5.0) -> None:
        """Stop stamping and remove the name (best effort: a name left behind ages out)."""
        super().stop(timeout_s)
        try:
            self.store.redis.zrem(seen_key(self.store), self.worker_name)
        except redis.RedisError:
            pass


def live_workers(store: JobStore, now: float | None = None) -> int:
    """Workers heard from within the last ``LIVE_INTERVALS * worker_beacon_s`` seconds (count)."""
    now = time.time() if now is None else now
    horizon = now - LIVE_INTERVALS * store.settings.worker_beacon_s
    key = seen_key(store)
    with store.redis.pipeline(transaction=False) as pipe:
        pipe.zremrangebyscore(key, "-inf", f"({horizon}")
        pipe.zcount(key, horizon, "+inf")
        _, count = pipe.execute()
    return int(count)
