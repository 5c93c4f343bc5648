"""Workers ride out a Redis outage, count as live only while alive, and recycle themselves.

Each test that starts ``fixq worker`` processes gives them a Redis server of
its own (``EmbeddedRedis``, append-only file in a directory the test keeps),
so that it can SIGKILL that server and start it again on the same data
directory without touching the session's.  Leases, reaper passes, restart
waits and liveness beacons are shortened through ``FIXQ_*`` variables.  The
problems are invented (see ``tests/_documents.py``).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import redis

from service.embedded_redis import EmbeddedRedis, free_port
from service.liveness import live_workers
from service.settings import Settings
from service.store import TERMINAL_STATES, JobStore
from tests._documents import LQ, grid_document, machine_shop, random_replacement
from tests._processes import child_pids, stop_process_groups
from worker import solve

REPO = Path(__file__).resolve().parents[2]
FAST = {
    "FIXQ_LEASE_S": "3",
    "FIXQ_REAPER_INTERVAL_S": "1",
    "FIXQ_WORKER_RESTART_MAX_S": "2",
    "FIXQ_WORKER_BEACON_S": "0.5",
    "FIXQ_AUTH": "off",
    "FIXQ_KEY_MAX_RUNNING_JOBS": "2",
}
OUTAGE_S = 6.0
"""Seconds the test's Redis server stays dead."""


def long_solve(seed: int) -> dict[str, Any]:
    """60,000 Bellman iterations: about 4 s of solving, through the outage."""
    return random_replacement(60_000, checkpoint_s=0.2, seed=seed)


class Fleet:
    """A private Redis server and ``fixq worker`` processes on it, all stopped at the end."""

    def __init__(self, data_dir: Path, log_dir: Path, **env: str) -> None:
        self.server = EmbeddedRedis(data_dir, port=free_port()).start()
        self.settings = Settings(redis_url=self.server.url, **{k[5:].lower(): v for k, v in FAST.items()})
        self.client = redis.Redis.from_url(self.server.url)
        self.store = JobStore(self.client, self.settings)
        self.env = {**os.environ, **FAST, **env, "FIXQ_REDIS_URL": self.server.url, "PYTHONPATH": str(REPO),
                    "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1"}  # fmt: skip
        self.log_dir = log_dir
        self.workers: list[subprocess.Popen[bytes]] = []

    def start_worker(self) -> subprocess.Popen[bytes]:
        with open(self.log_dir / f"worker-{len(self.workers)}.log", "wb") as log:
            process = subprocess.Popen(
                [sys.executable, "-m", "service.cli", "worker"],
                cwd=REPO, env=self.env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True,
            )  # fmt: skip
        self.workers.append(process)
        return process

    def submit(self, document: dict[str, Any]) -> str:
        return self.store.create_job(document, owner="lab", estimate={}, document_hash="outage")["id"]

    def crash_redis(self) -> None:
        """SIGKILL the server: no shutdown save, only what the append-only file already holds."""
        self.server.kill()

    def restart_redis(self) -> None:
        self.server.start()

    def logs(self) -> str:
        return "\n".join(
            f"--- {p.name}\n{p.read_text(errors='replace')[-6000:]}" for p in sorted(self.log_dir.glob("*.log"))
        )

    def close(self) -> None:
        try:
            stop_process_groups(self.workers)
        finally:
            self.client.close()
            self.server.stop()


@pytest.fixture
def fleet(tmp_path: Path) -> Iterator[Fleet]:
    logs = tmp_path / "logs"
    logs.mkdir()
    pool = Fleet(tmp_path / "redis", logs)
    yield pool
    try:
        pool.close()
    finally:
        print(pool.logs())


def wait_until(predicate: Callable[[], bool], timeout_s: float, what: str) -> None:
    deadline = time.monotonic() + timeout_s
    while True:
        try:
            if predicate():
                return
        except redis.ConnectionError:
            pass
        if time.monotonic() > deadline:
            raise AssertionError(f"not {what} within {timeout_s} s")
        time.sleep(0.05)


def test_workers_ride_out_a_redis_crash_and_every_job_finishes_as_if_uninterrupted(fleet: Fleet) -> None:
    documents = [
        long_solve(seed=11),
        long_solve(seed=12),
        machine_shop(),
        random_replacement(3_000, checkpoint_s=0.2, seed=13),
        machine_shop(discount=0.8),
    ]
    supervisors = [fleet.start_worker(), fleet.start_worker()]
    jobs = [fleet.submit(document) for document in documents]
    store = fleet.store

    def mid_solve() -> bool:
        progress = [(store.get_job(job_id) or {}).get("progress") or {} for job_id in jobs[:2]]
        return all(p.get("iteration", 0) >= 3 for p in progress)

    wait_until(mid_solve, 60, "both workers mid-solve")
    crashed_at = time.monotonic()
    fleet.crash_redis()
    time.sleep(OUTAGE_S)
    fleet.restart_redis()
    back_at = time.monotonic()

    def all_finished() -> bool:
        return all((store.get_job(job_id) or {}).get("state") in TERMINAL_STATES for job_id in jobs)

    wait_until(all_finished, 60, "every job finished after Redis came back")
    finished_at = time.monotonic()
    print(f"outage {back_at - crashed_at:.1f} s; every job finished {finished_at - back_at:.1f} s after Redis returned")
    assert [s.poll() for s in supervisors] == [None, None], "a worker supervisor died"
    records = [store.get_job(job_id) for job_id in jobs]
    assert [record["state"] for record in records] == ["done"] * len(jobs), records
    for job_id, document in zip(jobs, documents):
        stored = store.get_result(job_id)
        assert stored is not None
        reference = solve(document)
        assert stored["status"] == reference["status"] and stored["iterations"] == reference["iterations"]
        assert np.array_equal(np.asarray(stored["value"]), np.asarray(reference["value"])), job_id
    # Both supervisors restarted their RQ worker after the crash and are serving again.
    wait_until(lambda: live_workers(store) == 2, 15, "two live workers")
    again = fleet.submit(machine_shop(discount=0.7))
    wait_until(lambda: (store.get_job(again) or {}).get("state") == "done", 30, "a job after the outage done")


def test_healthz_counts_only_live_workers(fleet: Fleet) -> None:
    from service.app import create_app
    from tests.service._http import make_client

    first, second = fleet.start_worker(), fleet.start_worker()
    with make_client(create_app(fleet.settings)) as http:
        wait_until(lambda: http.get("/healthz").json()["workers"] == 2, 60, "two workers counted")
        children = child_pids(second.pid)
        os.killpg(second.pid, signal.SIGKILL)
        for child in children:
            os.killpg(child, signal.SIGKILL)
        second.wait()
        killed_at = time.monotonic()
        wait_until(lambda: http.get("/healthz").json()["workers"] == 1, 5, "the killed worker dropped")
        print(f"/healthz counted 1 worker {time.monotonic() - killed_at:.1f} s after the SIGKILL")
        # RQ still lists the dead worker's registration; /healthz does not count it.
        assert first.poll() is None


def test_a_worker_recycles_once_its_kernel_budget_is_spent(tmp_path: Path) -> None:
    logs = tmp_path / "logs"
    logs.mkdir()
    fleet = Fleet(tmp_path / "redis", logs, FIXQ_MAX_LOADED_STRUCTURES="1")
    try:
        supervisor = fleet.start_worker()
        linear = grid_document(LQ)
        absolute = grid_document({**LQ, "reward": "-(q * x**2 + r * abs(u))"})
        first, second = fleet.submit(linear), fleet.submit(absolute)
        store = fleet.store
        wait_until(
            lambda: all((store.get_job(j) or {}).get("state") in TERMINAL_STATES for j in (first, second)),
            120, "both jobs finished",
        )  # fmt: skip
        records = [store.get_job(first), store.get_job(second)]
        assert [record["state"] for record in records] == ["done", "done"], records
        ran_on = {store.redis.hget(store.keys.job(job_id), "worker").decode() for job_id in (first, second)}
        assert len(ran_on) == 2, ran_on
        assert supervisor.pid not in {int(worker.rsplit(":", 1)[1]) for worker in ran_on}
        assert supervisor.poll() is None
    finally:
        try:
            fleet.close()
        finally:
            print(fleet.logs())


def test_a_worker_started_while_redis_is_down_waits_for_it(fleet: Fleet) -> None:
    fleet.crash_redis()
    supervisor = fleet.start_worker()
    # Its RQ worker process cannot start without Redis: it exits, and is started again with backoff.
    time.sleep(4)
    assert supervisor.poll() is None
    fleet.restart_redis()
    job_id = fleet.submit(machine_shop())
    wait_until(lambda: (fleet.store.get_job(job_id) or {}).get("state") == "done", 30, "the job done")
    assert live_workers(fleet.store) == 1
    assert "exited unexpectedly" in fleet.logs()


def test_sigterm_stops_a_busy_worker_and_its_process_within_seconds(fleet: Fleet) -> None:
    supervisor = fleet.start_worker()
    job_id = fleet.submit(random_replacement(2_000_000, checkpoint_s=0.2))
    wait_until(lambda: (fleet.store.get_job(job_id) or {}).get("state") == "running", 60, "solving")
    time.sleep(0.5)
    children = child_pids(supervisor.pid)
    asked = time.monotonic()
    stop_process_groups([supervisor])
    took = time.monotonic() - asked
    assert supervisor.returncode == 0 and took < 6.0, took
    assert children and not [pid for pid in children if Path(f"/proc/{pid}").exists()]
    # The dropped job's lease was released: another worker may take it over at once.
    assert not fleet.client.exists(fleet.store.keys.lease(job_id))
