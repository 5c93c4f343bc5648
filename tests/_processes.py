"""Starting and stopping the processes that tests start (services, workers, a fleet)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx

from service.embedded_redis import free_port

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
REPO = Path(__file__).resolve().parents[1]
WORKER_COMMAND = [sys.executable, "-c", "from service.task import run_worker; run_worker()"]
"""A plain worker process (no notifier)."""


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


@contextmanager
def worker_nodes(redis_url: str, logs: Path, env: dict[str, str]) -> Iterator[Callable[[], subprocess.Popen]]:
    """``start()`` starts a worker process on ``redis_url`` (``env`` added to this process's; one thread for
    BLAS), logging to ``logs/worker-K.log``, each leading its own group; on exit every one still running is
    killed as a dead machine would be (:func:`kill_node`) and the logs are printed (pytest shows them when the
    test failed)."""
    env = {**os.environ, **env, "FIXQ_REDIS_URL": redis_url, "PYTHONPATH": str(REPO), "OPENBLAS_NUM_THREADS": "1",
           "OMP_NUM_THREADS": "1"}
    processes: list[subprocess.Popen] = []

    def start() -> subprocess.Popen:
        with open(logs / f"worker-{len(processes)}.log", "wb") as log:
            process = subprocess.Popen(WORKER_COMMAND, cwd=REPO, env=env, stdout=log, stderr=subprocess.STDOUT,
                                       start_new_session=True)
        processes.append(process)
        return process

    try:
        yield start
    finally:
        for process in processes:
            if process.poll() is None:
                kill_node(process)
        for log in sorted(logs.glob("worker-*.log")):
            print(f"--- {log.name}\n{log.read_text(errors='replace')[-4000:]}")


API_STARTUP_S = 60.0
"""Seconds ``fixq api`` has to answer ``/healthz``."""


@contextmanager
def api_process(env: dict[str, str], log: Path) -> Iterator[httpx.Client]:
    """``fixq api`` as a child process (its own process group) on a free loopback port with ``env``, its output in
    ``log``; a client of it once it answers ``/healthz``.  Stopped on the way out."""
    port = free_port()
    with open(log, "wb") as out:
        process = subprocess.Popen([sys.executable, "-m", "service.cli", "api", "--port", str(port)], cwd=REPO,
                                   env=env, stdout=out, stderr=subprocess.STDOUT, start_new_session=True)  # fmt: skip
    client = httpx.Client(base_url=f"http://127.0.0.1:{port}", timeout=30.0)
    try:
        deadline = time.monotonic() + API_STARTUP_S
        while True:
            assert process.poll() is None, log.read_text()
            try:
                if client.get("/healthz").status_code == 200:
                    break
            except httpx.TransportError:
                pass
            assert time.monotonic() < deadline, "fixq api did not become healthy"
            time.sleep(0.1)
        yield client
    finally:
        client.close()
        stop_process_groups([process])
