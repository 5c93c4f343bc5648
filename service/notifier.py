"""The notifier: a worker's thread that delivers due webhooks, several targets at once.

Each claimed delivery (``service.webhooks.claim_due``) runs in a thread of a
:class:`KeyedPool`: at most ``notify_workers`` at once, at most
``notify_per_target`` per target (host and port).  A delivery whose target
is at its cap is put back, due again :data:`DEFER_S` later, so a slow or dead
receiver holds a few threads, each for at most one attempt's timeouts
(``notify_timeout_s``), and delays only its own deliveries.  The threads are
daemons made per delivery (deliveries are few and short), so a stopping
worker never waits for a receiver that does not answer.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import redis

from service import webhooks
from service._periodic import PeriodicThread

if TYPE_CHECKING:
    from service.store import JobStore

__all__ = ["DEFER_S", "KeyedPool", "Notifier"]

DEFER_S = 0.5
"""Seconds a claimed delivery whose target has ``notify_per_target`` deliveries in flight waits to be due again."""

logger = logging.getLogger("fixq.webhooks")


class Notifier(PeriodicThread):
    """A daemon thread that starts due webhook deliveries (``service.webhooks.deliver``) until stopped.

    Every worker process runs one beside its reaper; they share the work
    through the claim script, so any number may run.
    """

    name = "fixq-notifier"

    def __init__(self, store: JobStore, *, poll_s: float | None = None) -> None:
        super().__init__(poll_s if poll_s is not None else store.settings.notify_poll_s)
        self.store = store
        self.pool = KeyedPool(store.settings.notify_workers, store.settings.notify_per_target, name=self.name)

    def run_once(self) -> bool:
        try:
            self.dispatch_due()
        except redis.ConnectionError as exc:
            # Redis is away (a restart, an outage): one line per pass, not a traceback every notify_poll_s.
            logger.warning("notifier: Redis unavailable (%s); trying again", exc)
        except redis.RedisError:
            logger.warning("notifier: Redis failed; trying again", exc_info=True)
        return False

    def dispatch_due(self) -> int:
        """Claim due deliveries while the pool has room and start each; how many were started."""
        started = 0
        while self.pool.has_room():
            job_id = webhooks.claim_due(self.store)
            if job_id is None:
                break
            if self.pool.submit(webhooks.target_of(self.store, job_id), webhooks.deliver, self.store, job_id):
                started += 1
            else:
                webhooks.defer(self.store, job_id, DEFER_S)
        return started


class KeyedPool:
    """Runs tasks in daemon threads: at most ``workers`` at once, at most ``per_key`` per key."""

    def __init__(self, workers: int, per_key: int, *, name: str = "fixq-pool") -> None:
        self.workers = workers
        self.per_key = per_key
        self.name = name
        self._running: dict[str, int] = {}
        self._total = 0
        self._changed = threading.Condition()

    def has_room(self) -> bool:
        """True while fewer than ``workers`` tasks run."""
        with self._changed:
            return self._total < self.workers

    def submit(self, key: str, task: Callable[..., Any], *args: Any) -> bool:
        """Start ``task(*args)`` in a thread; False (nothing started) when the pool or ``key`` is full."""
        with self._changed:
            if self._total >= self.workers or self._running.get(key, 0) >= self.per_key:
                return False
            self._running[key] = self._running.get(key, 0) + 1
            self._total += 1
        threading.Thread(target=self._run, args=(key, task, args), name=self.name, daemon=True).start()
        return True

    def wait_idle(self, timeout_s: float) -> bool:
        """Wait up to ``timeout_s`` seconds for every running task to end; True if they did."""
        deadline = time.monotonic() + timeout_s
        with self._changed:
            return self._changed.wait_for(lambda: self._total == 0, max(0.0, deadline - time.monotonic()))

    def _run(self, key: str, task: Callable[..., Any], args: tuple[Any, ...]) -> None:
        try:
            task(*args)
        except Exception:
            logger.exception("%s: a task for %s failed", self.name, key)
        finally:
            with self._changed:
                self._running[key] -= 1
                if not self._running[key]:
                    del self._running[key]
                self._total -= 1
                self._changed.notify_all()
