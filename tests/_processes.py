"""Starting and stopping the processes that tests start (services, workers, a fleet)."""

from __future__ import annotations

import os
import signal
import subprocess
from collections.abc import Iterable

STOP_TIMEOUT_S = 10.0
"""Seconds a process group has after SIGTERM before it gets SIGKILL."""
WORKER_LAUNCH = (
    "from service.store import JobStore\n"
    "from service.notifier import Notifier\n"
    "from service.task import run_worker\n"
    "Notifier(JobStore.from_settings()).start()\n"
    "run_worker()\n"
)
"""``python -c`` source of a worker process with a notifier thread beside it, as ``run_worker`` is to start one."""


def stop_process_groups(processes: Iterable[subprocess.Popen], timeout_s: float = STOP_TIMEOUT_S) -> None:
    """SIGTERM every group still running (all first, so they shut down together), then wait for
    each, with SIGKILL for a group that outlives ``timeout_s``. Each process must lead its group
    (``start_new_session=True``).

    A process that needed the SIGKILL ignored SIGTERM, and every teardown would wait out the
    timeout for it: after killing, this raises ``AssertionError`` naming those processes.
    """
    processes = list(processes)
    for process in processes:
        if process.poll() is None:
            os.killpg(process.pid, signal.SIGTERM)
    killed = []
    for process in processes:
        try:
            process.wait(timeout_s)
        except subprocess.TimeoutExpired:
            os.killpg(process.pid, signal.SIGKILL)
            process.wait()
            killed.append(f"pid {process.pid}: {process.args}")
    assert not killed, f"still running {timeout_s:g} s after SIGTERM, killed:\n" + "\n".join(killed)
