"""A daemon thread that runs one pass of some work every few seconds (reaper, notifier)."""

from __future__ import annotations

import logging
import threading

import redis

logger = logging.getLogger(__name__)


class PeriodicThread:
    """Runs :meth:`run_once` until stopped, waiting ``interval_s`` between passes.

    A pass that raises is logged and does not end the thread (a Redis outage
    or a bad record must not stop the work); a pass that returns True is
    followed at once by another (there is more to do).
    """

    name = "fixq-periodic"

    def __init__(self, interval_s: float) -> None:
        self.interval_s = interval_s
        self._stopped = threading.Event()
        self._thread = threading.Thread(target=self._run, name=self.name, daemon=True)

    def run_once(self) -> bool:
        """One pass of the work; True when another should follow without waiting."""
        raise NotImplementedError

    def start(self) -> PeriodicThread:
        """Start the thread; its first pass runs at once."""
        self._thread.start()
        return self

    def stop(self, timeout_s: float = 5.0) -> None:
        """Ask the thread to end and wait up to ``timeout_s`` seconds for it."""
        self._stopped.set()
        if self._thread.is_alive():
            self._thread.join(timeout_s)

    def _run(self) -> None:
        while not self._stopped.is_set():
            again = False
            try:
                again = self.run_once()
            except redis.ConnectionError as exc:
                # Redis is away (a restart, an outage): one line per pass, not a traceback.
                logger.warning("%s pass failed: %s", self.name, exc)
            except Exception:
                logger.exception("%s pass failed", self.name)
            if not again:
                self._stopped.wait(self.interval_s)
