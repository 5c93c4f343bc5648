"""A finite-horizon job whose worker dies in the middle resumes from its per-period checkpoint on another.

Real Redis (the private server of ``tests/conftest.py``) and real ``rq`` worker processes started through
``service.task.run_worker``, each in its own session so that the test can SIGKILL a worker with its
work-horse (what a dead machine looks like).  Leases and reaper passes are shortened through ``FIXQ_*``
variables so that the dead node is noticed in a few seconds.  The reference is the same document solved
in this process without interruption: backward induction is deterministic, and a checkpoint holds the
values of the periods done exactly, so the resumed answer is the same to the bit.  The model is an
invented household over a working life: savings chosen continuously, income rising by age, shocks to it.
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import redis

from service.settings import Settings, get_settings
from service.store import TERMINAL_STATES, JobStore
from tests._processes import child_pids, kill_group, worker_nodes
from worker import solve

SHORT_LEASES = {"FIXQ_LEASE_S": "3", "FIXQ_REAPER_INTERVAL_S": "1"}
PERIODS = 24


def working_life() -> dict[str, Any]:
    """About 0.1 s a period on one core (700 asset points × 7 income points, each choice found by a scan of
    the grid and Brent's method): long enough to be killed in the middle, with a checkpoint every 0.2 s.  CRRA
    utility with gamma = 2."""
    return {
        "version": 1,
        "label": "a household's working life (invented)",
        "discount": 0.96,
        "model": {
            "kind": "grid",
            "params": {"r": 0.03, "gamma": 2.0, "income": [1.0 + 0.02 * t for t in range(PERIODS)]},
            "states": {"a": {"min": 0.0, "max": 20.0, "points": 700}},
            "shocks": {"y": {"ar1": {"rho": 0.9, "sigma": 0.1, "points": 7}}},
            "choices": {"an": {"next_of": "a", "continuous": True}},
            "define": {"c": "(1 + r) * a + income * exp(y) - an"},
            "feasible": ["c > 0"],
            # The reward and params of tests/worker/test_horizon_egm.py's saver: the same kernels, compiled once.
            "reward": "c**(1 - gamma) / (1 - gamma)",
            "horizon": {"periods": PERIODS, "terminal_value": "0.5 * log(1 + a)"},
        },
        "solver": {"checkpoint_s": 0.2},
    }


@pytest.fixture
def fast_store(redis_client: redis.Redis, redis_url: str, monkeypatch: pytest.MonkeyPatch) -> JobStore:
    for name, value in SHORT_LEASES.items():
        monkeypatch.setenv(name, value)
    get_settings.cache_clear()
    settings: Settings = get_settings()
    return JobStore(redis_client, settings)


@pytest.fixture
def start_worker(redis_url: str, tmp_path: Path) -> Iterator[Any]:
    with worker_nodes(redis_url, tmp_path, SHORT_LEASES) as start:
        yield start


def wait_for(store: JobStore, job_id: str, predicate: Any, timeout_s: float, what: str) -> dict[str, Any]:
    deadline = time.monotonic() + timeout_s
    while True:
        job = store.get_job(job_id)
        if job is not None and predicate(job):
            return job
        assert time.monotonic() < deadline, f"job {job_id} not {what} within {timeout_s} s; last record: {job}"
        time.sleep(0.05)


def test_a_horizon_job_killed_in_the_middle_resumes_from_its_period_checkpoint(
    fast_store: JobStore, start_worker: Any
) -> None:
    document = working_life()
    job_id = fast_store.create_job(document, owner="lab", estimate={}, document_hash="test")["id"]
    first = start_worker()
    wait_for(fast_store, job_id, lambda j: j["state"] == "running", 60, "running")
    standby = start_worker()
    deadline = time.monotonic() + 120
    # Kill once a checkpoint holds a few periods (the first solve in a process may compile its kernels).
    while (fast_store.load_checkpoint(job_id) or (0, b""))[0] < 4:
        assert time.monotonic() < deadline, "no checkpoint by period"
        time.sleep(0.02)
    horses = child_pids(first.pid)
    kill_group(first.pid)
    for horse in horses:
        kill_group(horse)
    first.wait()
    checkpoint_periods = fast_store.load_checkpoint(job_id)[0]
    assert checkpoint_periods < PERIODS, "the job finished before the kill: make the model slower"

    job = wait_for(fast_store, job_id, lambda j: j["state"] in TERMINAL_STATES, 180, "finished after the kill")
    assert job["state"] == "done", job
    assert job["attempts"] == 2
    result = fast_store.get_result(job_id)
    assert result is not None and result["status"] == "converged" and result["method"] == "backward_induction"
    assert result["diagnostics"]["resumed_from_iteration"] == checkpoint_periods
    # The log runs through every period once, from the last to the first, across both workers.
    assert [entry["period"] for entry in result["log"]] == list(range(PERIODS - 1, -1, -1))
    assert standby.poll() is None
    # The same answer as a solve that was never interrupted, to the bit.
    uninterrupted = solve(document)
    np.testing.assert_array_equal(np.array(result["value"]), np.array(uninterrupted["value"]))
    np.testing.assert_array_equal(np.array(result["policy"]["an"]), np.array(uninterrupted["policy"]["an"]))
    assert result["error_bound"] == uninterrupted["error_bound"]
