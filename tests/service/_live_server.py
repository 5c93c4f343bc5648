"""A real fixq API (uvicorn) and worker as subprocesses, for tests that need a live server.

Used by the dashboard's browser tests and by the client-script tests, which
talk HTTP from outside the test process (a browser, curl, a Python script).
The processes run in their own sessions and are stopped by their own ids.

The API is started as ``fixq api`` starts it (``python -m service.cli api``), not
by a bare ``uvicorn`` command: a bare uvicorn has no graceful-shutdown limit, so
after SIGTERM it waited for every open live-log stream (SSE) to end, which a
browser tab never does, and each stop ran into the SIGKILL after
``STOP_TIMEOUT_S``.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

import httpx

from service.embedded_redis import free_port
from tests._processes import stop_process_groups

REPO = Path(__file__).resolve().parents[2]
STARTUP_TIMEOUT_S = 60.0
"""Seconds to wait for the API to answer /healthz."""


class LiveServer:
    """``fixq api`` on a free loopback port, plus ``fixq worker`` processes on demand."""

    def __init__(self, redis_url: str, log_dir: Path, **settings: str) -> None:
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.log_dir = log_dir
        python_path = os.pathsep.join(filter(None, [str(REPO), os.environ.get("PYTHONPATH")]))
        self.env = {**os.environ, "FIXQ_REDIS_URL": redis_url, "PYTHONPATH": python_path, **settings}
        self.processes: list[tuple[str, subprocess.Popen[bytes]]] = []

    def _spawn(self, name: str, command: list[str]) -> subprocess.Popen[bytes]:
        with open(self.log_dir / f"{name}-{len(self.processes)}.log", "wb") as log:
            process = subprocess.Popen(
                command, cwd=REPO, env=self.env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True
            )
        self.processes.append((name, process))
        return process

    def start(self) -> LiveServer:
        command = [sys.executable, "-m", "service.cli", "api", "--host", "127.0.0.1", "--port", str(self.port)]
        api = self._spawn("api", command)
        deadline = time.monotonic() + STARTUP_TIMEOUT_S
        while time.monotonic() < deadline:
            if api.poll() is not None:
                raise RuntimeError(f"the API exited with {api.returncode}:\n{self.logs()}")
            try:
                if httpx.get(f"{self.url}/healthz", timeout=1.0).status_code < 500:
                    return self
            except httpx.HTTPError:
                pass
            time.sleep(0.1)
        raise RuntimeError(f"the API did not answer within {STARTUP_TIMEOUT_S:.0f} s:\n{self.logs()}")

    def start_worker(self) -> subprocess.Popen[bytes]:
        return self._spawn("worker", [sys.executable, "-m", "service.cli", "worker"])

    def ensure_worker(self) -> None:
        """Start a worker unless one is running."""
        if not any(name == "worker" and process.poll() is None for name, process in self.processes):
            self.start_worker()

    def logs(self) -> str:
        return "\n".join(
            f"--- {p.name}\n{p.read_text(errors='replace')[-4000:]}" for p in sorted(self.log_dir.glob("*.log"))
        )

    def stop(self) -> None:
        stop_process_groups(process for _, process in reversed(self.processes))
        self.processes.clear()


def wait_until_finished(client: httpx.Client, job_id: str, timeout_s: float = 120.0) -> dict:
    """Poll a job until it is no longer queued or running; its final record."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        record = client.get(f"/v1/jobs/{job_id}").json()
        if record["state"] not in ("queued", "running"):
            return record
        time.sleep(0.2)
    raise TimeoutError(f"job {job_id} still unfinished after {timeout_s:.0f} s")
