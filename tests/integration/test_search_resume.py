"""A search job whose worker dies between trials resumes on another worker from its checkpoint.

Real Redis (the private server of ``tests/conftest.py``), real ``rq`` worker processes started through
``service.task.run_worker`` in sessions of their own, and real HTTP (the API in process) to read the job
back as a client does.  Leases and reaper passes are shortened through ``FIXQ_*`` variables so that the
dead node is noticed in a few seconds.  The reference is the same document solved in this process without
interruption.  The model is an invented economy of households saving against a two-state income, the
interest rate the unknown that clears its capital market (as in ``tests/service/test_search_jobs.py``).
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import redis

from service.app import create_app
from service.checkpoints import decode_checkpoint, encode_checkpoint
from service.settings import Settings, get_settings
from service.store import TERMINAL_STATES, JobStore
from tests._documents import savings_market
from tests._processes import kill_node, worker_nodes
from tests.service._http import make_client
from worker import solve

SHORT_LEASES = {"FIXQ_LEASE_S": "3", "FIXQ_REAPER_INTERVAL_S": "1", "FIXQ_AUTH": "off"}


def market(points: int) -> dict[str, Any]:
    """Invented: the capital market of households saving in `a` (continuous choice) against an income of two
    states; wage and capital demand of a Cobb-Douglas firm as params given as expressions of the unknown r.
    About 0.2-0.5 s a trial at 2,000 points on one core, with a checkpoint after every trial."""
    return {
        "version": 1, "label": "a savings market (invented)", "discount": 0.95,
        "solver": {"method": "howard", "tolerance": 1e-10, "checkpoint_s": 0.01},
        "search": {"unknowns": {"r": {"min": 0.0, "max": 0.05}}, "conditions": ["mean(a) - capital_demand"],
                   "tolerance": 1e-6},
        "model": savings_market(points),
    }


@pytest.fixture
def fast_settings(redis_client: redis.Redis, redis_url: str, monkeypatch: pytest.MonkeyPatch) -> Settings:
    for name, value in SHORT_LEASES.items():
        monkeypatch.setenv(name, value)
    get_settings.cache_clear()
    return get_settings()


@pytest.fixture
def start_worker(redis_url: str, tmp_path: Path) -> Iterator[Any]:
    with worker_nodes(redis_url, tmp_path, SHORT_LEASES) as start:
        yield start


def test_a_search_whose_worker_died_in_a_trial_resumes_it_and_says_so(
    fast_settings: Settings, start_worker: Any
) -> None:
    document = market(2000)
    store = JobStore(redis.Redis.from_url(fast_settings.redis_url), fast_settings)
    with make_client(create_app(fast_settings)) as http:
        response = http.post("/v1/jobs?fresh=true", json=document)
        assert response.status_code == 202, response.text
        job_id = response.json()["id"]
        first = start_worker()
        deadline = time.monotonic() + 120
        # Kill in the middle of a trial once the checkpoint holds three trials and that trial's solver state
        # (the first search in a process may compile its kernels).  Before, a search saved only between trials.
        while not _in_a_trial_after(store.load_checkpoint(job_id), 3):
            job = store.get_job(job_id)
            assert time.monotonic() < deadline and job["state"] not in TERMINAL_STATES, (
                f"no checkpoint within a trial; record: {job}")
            time.sleep(0.01)
        kill_node(first)
        checkpoint_trials, payload = store.load_checkpoint(job_id)
        killed_in = decode_checkpoint(payload)
        assert http.get(f"/v1/jobs/{job_id}").json()["state"] == "running", "the search ended before the kill"
        start_worker()
        deadline = time.monotonic() + 120
        while (record := http.get(f"/v1/jobs/{job_id}").json())["state"] not in TERMINAL_STATES:
            assert time.monotonic() < deadline, f"not finished after the kill; record: {record}"
            time.sleep(0.05)
        result = http.get(f"/v1/jobs/{job_id}/result").json()
        log = http.get(f"/v1/jobs/{job_id}/log").json()["data"]
    assert record["state"] == "done" and record["attempts"] == 2, record
    # Before the fix the result of a resumed search said null here, as if no worker had been lost.
    assert result["diagnostics"]["resumed_from_iteration"] == checkpoint_trials
    uninterrupted = solve(document)["search"]
    search = result["search"]
    # The root finder asks for the same trials (those in the checkpoint answered from it, not solved again).
    assert [row["unknowns"]["r"] for row in search["trials"]] == pytest.approx(
        [row["unknowns"]["r"] for row in uninterrupted["trials"]], rel=1e-9)
    assert search["status"] == uninterrupted["status"] == "converged"
    assert abs(search["residuals"][0]) <= document["search"]["tolerance"]
    # The record's summary is the result's, and the log holds each trial once, in order, across both workers.
    assert record["search"] == {"status": "converged", "unknowns": search["unknowns"],
                                "residuals": search["residuals"], "trials": len(search["trials"])}
    assert [entry["iteration"] for entry in log] == list(range(1, len(search["trials"]) + 1))
    # The trial under way went on from its solver's saved iteration: its count of iterations is the
    # uninterrupted trial's (counted across the resume), not more.
    assert killed_in["trial:key"].startswith(f"{checkpoint_trials + 1}:") and killed_in["trial:iteration"] >= 1
    assert [row["iterations"] for row in search["trials"]] == [row["iterations"] for row in uninterrupted["trials"]]


def _in_a_trial_after(stored: tuple[int, bytes] | None, trials: int) -> bool:
    """Whether the stored checkpoint holds ``trials`` trials or more and the solver state of the next one."""
    if stored is None or stored[0] < trials:
        return False
    state = decode_checkpoint(stored[1])
    return "trial:key" in state and state["trial:iteration"] >= 1


class _Memory:
    """An in-memory checkpoint (load/save), as the service keeps one in Redis."""

    def __init__(self) -> None:
        self.state: dict[str, Any] | None = None

    def load(self) -> dict[str, Any] | None:
        return self.state

    def save(self, state: dict[str, Any]) -> None:
        self.state = dict(state)


def test_a_search_resumed_after_its_last_trial_ends_as_the_uninterrupted_one(
    fast_settings: Settings, start_worker: Any
) -> None:
    """The worker died after the checkpoint of the search's last (certifying) trial, before it wrote the result
    (a SIGKILL then, or a Redis outage longer than redis_retry_s): the checkpoint is that of an uninterrupted
    solve in this process, stored in Redis as an execution stores it.  Before the fix the resumed search took a
    replayed certifying row for a guiding one and solved the point again as a new trial (9 rows for 8 here; a
    search of two unknowns went on past its answer and ended at another point)."""
    document = market(40)
    document["solver"]["checkpoint_s"] = 1e-9  # saved after every trial, the last included
    memory = _Memory()
    uninterrupted = solve(document, checkpoint=memory)
    assert memory.state is not None and memory.state["iteration"] == len(uninterrupted["search"]["trials"])
    store = JobStore(redis.Redis.from_url(fast_settings.redis_url), fast_settings)
    record = store.create_job(document, owner="lab", estimate={}, document_hash="resume", enqueue=False)
    job_id = record["id"]
    blob = b"fixq-ckpt:%d\n" % memory.state["iteration"] + encode_checkpoint(memory.state)
    store.redis.set(store.keys.checkpoint(job_id), blob)
    store.enqueue_created(record)
    start_worker()
    with make_client(create_app(fast_settings)) as http:
        deadline = time.monotonic() + 120
        while (record := http.get(f"/v1/jobs/{job_id}").json())["state"] not in TERMINAL_STATES:
            assert time.monotonic() < deadline, f"not finished; record: {record}"
            time.sleep(0.05)
        result = http.get(f"/v1/jobs/{job_id}/result").json()
    assert record["state"] == "done", record
    search, expected = result["search"], uninterrupted["search"]
    assert result["diagnostics"]["resumed_from_iteration"] == len(expected["trials"])
    assert search["trials"] == expected["trials"] and search["unknowns"] == expected["unknowns"]
    assert record["search"]["trials"] == len(expected["trials"])
    # The point's solution is made again from the checkpoint's value: within the solver's bounds of the first.
    gap = np.max(np.abs(np.array(result["value"]) - np.array(uninterrupted["value"])))
    assert gap <= result["error_bound"] + uninterrupted["error_bound"]
