"""``fixq worker``: a small supervisor that keeps one RQ worker process running.

The RQ worker (``service.task.run_worker``) quits on errors it does not
handle, among them a Redis connection lost at the wrong moment ("found an
unhandled exception, quitting").  The process ``fixq worker`` starts is
therefore a supervisor that runs the RQ worker in a child process and

* restarts it whenever it exits unexpectedly, after a wait that doubles from
  :data:`FIRST_RESTART_WAIT_S` up to ``worker_restart_max_s`` (back to the
  first wait once a child has run :data:`STEADY_S`), so a Redis outage of a
  few minutes costs restarts, never the worker;
* restarts it at once when it exits with :data:`RECYCLE_EXIT` (it has loaded
  ``FIXQ_MAX_LOADED_STRUCTURES`` compiled kernels and asks to be replaced
  after its job; see ``worker._codegen.recycle_due``);
* on SIGTERM or SIGINT passes the signal on to the child (the first one a
  warm stop: finish the current job), and a second SIGTERM if the child is
  still running :data:`~service.children.WARM_STOP_S` later (it drops its
  job, whose lease it releases, and the job resumes from its checkpoint on
  another execution); then exits 0.

With ``--burst`` a child that exits 0 (the queues are empty) ends the
supervisor too.  The child runs in a session of its own, so a signal to the
supervisor's process group reaches it once, through the supervisor; it gets
SIGTERM if the supervisor itself dies.
"""

from __future__ import annotations

import logging
import os
import signal
import subprocess
import sys
import threading
import time

from service.children import WARM_STOP_S, spawn
from service.settings import get_settings

__all__ = ["FIRST_RESTART_WAIT_S", "RECYCLE_EXIT", "STEADY_S", "supervise"]

RECYCLE_EXIT = 75
"""Exit code of an RQ worker process that asks to be replaced by a fresh one (it is not a failure)."""
FIRST_RESTART_WAIT_S = 0.5
"""Seconds before the first restart of a worker process that exited unexpectedly."""
STEADY_S = 60.0
"""Seconds a worker process must run for its exit to count as a fresh failure (the wait starts over)."""

logger = logging.getLogger("fixq.supervisor")


def child_command(burst: bool) -> list[str]:
    """The command of one RQ worker process."""
    source = f"import sys\nfrom service.task import worker_main\nsys.exit(worker_main(burst={burst!r}))\n"
    return [sys.executable, "-c", source]


class _Supervisor:
    def __init__(self, burst: bool) -> None:
        self.burst = burst
        self.stopping = threading.Event()
        self.child: subprocess.Popen[bytes] | None = None
        self.stop_asked = 0.0
        self.told = 0

    def on_signal(self, signum: int, frame: object) -> None:
        if not self.stopping.is_set():
            self.stop_asked = time.monotonic()
        self.stopping.set()
        # RQ ignores a second SIGTERM that comes within a second of the first.
        if self.told == 0 or time.monotonic() - self.stop_asked >= 1.0:
            self._tell_child()

    def _tell_child(self) -> None:
        """SIGTERM to the child: a warm stop the first time, a cold one the second, nothing after."""
        child = self.child
        if child is not None and child.poll() is None and self.told < 2:
            child.send_signal(signal.SIGTERM)
            self.told += 1

    def run(self) -> int:
        max_wait_s = get_settings().worker_restart_max_s
        wait_s = FIRST_RESTART_WAIT_S
        while not self.stopping.is_set():
            started = time.monotonic()
            self.child, self.told = spawn(child_command(self.burst), dict(os.environ)), 0
            if self.stopping.is_set():
                # A signal that came while the child was being started did not reach it.
                self._tell_child()
            code = self._wait(self.child)
            if self.stopping.is_set():
                break
            if code == RECYCLE_EXIT:
                logger.info("worker process %d recycled; starting a fresh one", self.child.pid)
                wait_s = FIRST_RESTART_WAIT_S
                continue
            if self.burst and code == 0:
                return 0
            if time.monotonic() - started >= STEADY_S:
                wait_s = FIRST_RESTART_WAIT_S
            logger.warning(
                "worker process %d exited unexpectedly (code %s); restarting it in %.1f s",
                self.child.pid, code, wait_s,
            )  # fmt: skip
            if self._sleep(wait_s):
                break
            wait_s = min(wait_s * 2, max_wait_s)
        return 0

    def _wait(self, child: subprocess.Popen[bytes]) -> int:
        """The child's exit code; once a stop was asked, a second SIGTERM after ``WARM_STOP_S``."""
        while True:
            try:
                return child.wait(0.2)
            except subprocess.TimeoutExpired:
                if self.stopping.is_set() and time.monotonic() - self.stop_asked >= WARM_STOP_S:
                    self._tell_child()

    def _sleep(self, seconds: float) -> bool:
        """Sleep up to ``seconds``; True if a stop signal came meanwhile."""
        # Short sleeps rather than Event.wait: the handler that sets the event runs in this same thread.
        deadline = time.monotonic() + seconds
        while not self.stopping.is_set() and time.monotonic() < deadline:
            time.sleep(min(0.1, max(0.0, deadline - time.monotonic())))
        return self.stopping.is_set()


def supervise(burst: bool = False) -> int:
    """Run RQ worker processes one after another until SIGTERM or SIGINT; the exit code (0)."""
    settings = get_settings()
    logging.basicConfig(level=settings.worker_log_level.upper(), format="%(asctime)s %(name)s %(message)s")
    supervisor = _Supervisor(burst)
    previous = {signum: signal.signal(signum, supervisor.on_signal) for signum in (signal.SIGTERM, signal.SIGINT)}
    try:
        return supervisor.run()
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)
