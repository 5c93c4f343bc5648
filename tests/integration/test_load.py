"""Load: 1,000 tiny jobs from 20 concurrent clients through a real ``fixq api`` and two ``fixq worker``s.

Everything is real and separate: the API and the workers are ``fixq``
subprocesses on the private Redis server, the 20 clients are threads with
their own ``httpx`` client and their own API key.  Every job must finish
``done`` exactly once: none lost (every submitted id is done and listed to its
owner), none duplicated (exactly 1,000 job records; each claimed by one
execution, one RQ execution per job returned ``done`` and any extra one —
the reaper may enqueue a waiting job again — wrote nothing; and the workers'
count of results written is exactly 1,000).  The RQ queues carry tickets
(``service.dispatch``): each runs the next job in turn, and says which.
"""

from __future__ import annotations

import os
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
import redis
from rq.job import Job

from service import queue as rq_queues
from service.embedded_redis import EmbeddedRedis, free_port
from service.keys import KeyStore
from service.settings import Settings
from service.store import JobStore
from tests._documents import tiny_tabular
from tests._processes import stop_process_groups

REPO = Path(__file__).resolve().parents[2]
CLIENTS = 20
JOBS = int(os.environ.get("FIXQ_LOAD_JOBS", "1000"))
"""Jobs in the run (count); FIXQ_LOAD_JOBS overrides it for a quicker local look."""
WORKERS = 2
FINISH_TIMEOUT_S = 240.0
"""Seconds all jobs get to finish after the last submission."""
STARTUP_TIMEOUT_S = 60.0


def tiny_document(i: int) -> dict[str, Any]:
    """An invented two-state machine, made distinct per job (no two are the same problem, so none is reused)."""
    return tiny_tabular(
        reward=[[1.0, 0.2], [0.0, 0.5]],
        transition=[[[0.9, 0.1], [0.2, 0.8]], [[0.3, 0.7], [0.6, 0.4]]],
        label=f"load {i} (invented)",
        tags=["load"],
        discount=0.5 + i * 1e-5,
        solver={"method": "howard", "tolerance": 1e-6},
    )


class Fleet:
    """``fixq api`` and ``fixq worker`` subprocesses, each in its own session, stopped by their own ids."""

    def __init__(self, redis_url: str, log_dir: Path) -> None:
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.log_dir = log_dir
        python_path = os.pathsep.join(filter(None, [str(REPO), os.environ.get("PYTHONPATH")]))
        self.env = {**os.environ, "FIXQ_REDIS_URL": redis_url, "FIXQ_AUTH": "on", "PYTHONPATH": python_path,
                    "FIXQ_WORKER_LOG_LEVEL": "WARNING"}  # fmt: skip
        self.processes: list[subprocess.Popen[bytes]] = []

    def spawn(self, name: str, *args: str) -> subprocess.Popen[bytes]:
        with open(self.log_dir / f"{name}-{len(self.processes)}.log", "wb") as log:
            process = subprocess.Popen(
                [sys.executable, "-m", "service.cli", *args], cwd=REPO, env=self.env,
                stdout=log, stderr=subprocess.STDOUT, start_new_session=True,
            )  # fmt: skip
        self.processes.append(process)
        return process

    def start(self) -> Fleet:
        api = self.spawn("api", "api", "--host", "127.0.0.1", "--port", str(self.port))
        for _ in range(WORKERS):
            self.spawn("worker", "worker")
        deadline = time.monotonic() + STARTUP_TIMEOUT_S
        while time.monotonic() < deadline:
            if api.poll() is not None:
                raise RuntimeError(f"fixq api exited with {api.returncode}:\n{self.logs()}")
            try:
                health = httpx.get(f"{self.url}/healthz", timeout=1.0)
                if health.status_code == 200 and health.json().get("workers") == WORKERS:
                    return self
            except httpx.HTTPError:
                pass
            time.sleep(0.1)
        raise RuntimeError(f"the fleet did not come up within {STARTUP_TIMEOUT_S:.0f} s:\n{self.logs()}")

    def logs(self) -> str:
        files = sorted(self.log_dir.glob("*.log"))
        return "\n".join(f"--- {p.name}\n{p.read_text(errors='replace')[-3000:]}" for p in files)

    def stop(self) -> None:
        stop_process_groups(self.processes)


@pytest.fixture
def load_redis(tmp_path: Path) -> Iterator[EmbeddedRedis]:
    """A Redis server of this test's own, so the fleet's workers see no other test's queues."""
    server = EmbeddedRedis(tmp_path / "redis").start()
    assert server.port != 6379
    try:
        yield server
    finally:
        server.stop()


@pytest.fixture
def fleet(load_redis: EmbeddedRedis, tmp_path: Path) -> Iterator[Fleet]:
    logs = tmp_path / "logs"
    logs.mkdir()
    running = Fleet(load_redis.url, logs).start()
    try:
        yield running
    finally:
        running.stop()


def submit_share(url: str, key: str, numbers: range, submitted: list[str], errors: list[str]) -> None:
    with httpx.Client(base_url=url, headers={"Authorization": f"Bearer {key}"}, timeout=30.0) as client:
        for i in numbers:
            response = client.post("/v1/jobs", json=tiny_document(i))
            if response.status_code != 202:
                errors.append(f"job {i}: {response.status_code} {response.text[:200]}")
                continue
            submitted.append(response.json()["id"])


def listed_ids(url: str, key: str) -> list[str]:
    ids: list[str] = []
    cursor = None
    with httpx.Client(base_url=url, headers={"Authorization": f"Bearer {key}"}, timeout=30.0) as client:
        while True:
            page = client.get("/v1/jobs", params={"limit": 200, **({"cursor": cursor} if cursor else {})}).json()
            ids += [job["id"] for job in page["data"]]
            cursor = page["next"]
            if cursor is None:
                return ids


def test_a_thousand_tiny_jobs_from_twenty_clients_finish_exactly_once(
    fleet: Fleet, load_redis: EmbeddedRedis
) -> None:
    connection = redis.Redis.from_url(load_redis.url)
    settings = Settings(redis_url=load_redis.url)
    store = JobStore(connection, settings)
    keys = KeyStore(connection, settings.redis_prefix)
    client_keys = [keys.add(f"client-{n:02d}") for n in range(CLIENTS)]
    shares = [range(n, JOBS, CLIENTS) for n in range(CLIENTS)]
    submitted: list[list[str]] = [[] for _ in range(CLIENTS)]
    errors: list[str] = []
    started = time.monotonic()
    threads = [
        threading.Thread(target=submit_share, args=(fleet.url, client_keys[n], shares[n], submitted[n], errors))
        for n in range(CLIENTS)
    ]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    submit_s = time.monotonic() - started
    assert errors == []
    all_ids = [job_id for share in submitted for job_id in share]
    assert len(all_ids) == JOBS and len(set(all_ids)) == JOBS

    deadline = time.monotonic() + FINISH_TIMEOUT_S
    while store.counts_by_state()["done"] < JOBS and time.monotonic() < deadline:
        time.sleep(0.25)
    finish_s = time.monotonic() - started
    counts = store.counts_by_state()
    assert counts == {"queued": 0, "running": 0, "done": JOBS, "failed": 0, "canceled": 0}, (counts, fleet.logs())

    # None lost: each owner's list holds exactly its own jobs.
    for n in range(CLIENTS):
        assert sorted(listed_ids(fleet.url, client_keys[n])) == sorted(submitted[n])
    # None duplicated: exactly JOBS records, each claimed by one execution (one attempt) whose RQ
    # execution returned "done". The reaper may have enqueued a job a second time (it rescues queued
    # jobs it finds in no RQ queue); such an extra execution must have found the job taken and
    # written nothing.
    assert connection.zcard(store.keys.jobs) == JOBS
    with connection.pipeline(transaction=False) as pipe:
        for job_id in all_ids:
            pipe.hmget(store.keys.job(job_id), "state", "attempts", "enqueues", "status")
            pipe.exists(store.keys.result(job_id))
        replies = pipe.execute()
    # Each ticket ({job}-{n}, one per enqueue) ran the job in turn, not necessarily its own: its
    # return value names the job it ran, or none ("idle": the job it stood for was taken already).
    outcomes: dict[str, list[str]] = {job_id: [] for job_id in all_ids}
    idle_tickets = 0
    for job_id, (state, attempts, enqueues, status), has_result in zip(all_ids, replies[::2], replies[1::2]):
        assert (state, attempts, status, has_result) == (b"done", b"1", b"converged", 1), (job_id, state, attempts)
        for n in range(1, int(enqueues) + 1):
            ran = Job.fetch(rq_queues.execution_id(job_id, n), connection=connection).return_value() or {}
            if ran.get("outcome") == "idle":
                idle_tickets += 1
            else:
                outcomes[ran["job"]].append(ran["outcome"])
    extra_executions = 0
    for job_id, ran in outcomes.items():
        assert ran.count("done") == 1 and set(ran) <= {"done", "terminal", "busy"}, (job_id, ran)
        extra_executions += len(ran) - 1
    # The finish script counts every result it writes into the solve histograms: exactly one per job.
    histograms = store.solve_histograms()
    assert histograms["seconds"]["count"] == histograms["iterations"]["count"] == JOBS
    assert store.queue_depths() == {priority: 0 for priority in rq_queues.PRIORITIES}
    print(f"\n{JOBS} jobs: submitted in {submit_s:.1f} s, all done after {finish_s:.1f} s; "
          f"{extra_executions} extra executions wrote nothing, {idle_tickets} tickets found nothing")  # fmt: skip
    connection.close()
