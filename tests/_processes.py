"""Stopping the process groups that tests start (services, workers, a fleet)."""

from __future__ import annotations

import os
import signal
import subprocess
from collections.abc import Iterable

STOP_TIMEOUT_S = 10.0
"""Seconds a process group has after SIGTERM before it gets SIGKILL."""


def stop_process_groups(processes: Iterable[subprocess.Popen], timeout_s: float = STOP_TIMEOUT_S) -> None:
    """SIGTERM every group still running (all first, so they shut down together), then wait for
    each, with SIGKILL for a group that outlives ``timeout_s``. Each process must lead its group
    (``start_new_session=True``)."""
    processes = list(processes)
    for process in processes:
        if process.poll() is None:
            os.killpg(process.pid, signal.SIGTERM)
    for process in processes:
        try:
            process.wait(timeout_s)
        except subprocess.TimeoutExpired:
            os.killpg(process.pid, signal.SIGKILL)
            process.wait()
