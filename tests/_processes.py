"""Starting and stopping the processes that tests start (services, workers, a fleet)."""

from __future__ import annotations

import os
import signal
import subprocess
from collections.abc import Iterable
from pathlib import Path

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


def child_pids(pid: int) -> list[int]:
    """Children of ``pid`` (Linux /proc): a forking RQ worker's work-horse, which leads a group of its own."""
    children = []
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                stat = Path(f"/proc/{entry}/stat").read_text()
            except OSError:
                continue
            if int(stat.rsplit(")", 1)[1].split()[1]) == pid:
                children.append(int(entry))
    return children


def kill_group(pgid: int) -> None:
    """SIGKILL the process group ``pgid``, gone already or not."""
    try:
        os.killpg(pgid, signal.SIGKILL)
    except ProcessLookupError:
        pass


def kill_node(process: subprocess.Popen) -> None:
    """SIGKILL a worker process's group and its work-horses' groups (what a dead machine looks like)."""
    for pgid in [*child_pids(process.pid), process.pid][::-1]:
        kill_group(pgid)
    process.wait()
