"""One execution (``service.task.run_job``, in process) through Redis failures and memory trouble.

Faults are injected into the store's calls: a ``ConnectionError`` is what
redis-py raises while the server is down.  The problems are invented (see
``tests/_documents.py``).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
import redis

from service import execution, task
from service.settings import get_settings
from service.store import JobStore
from tests._documents import machine_shop, random_replacement
from worker import solve


def submit(store: JobStore, document: dict[str, Any]) -> str:
    return store.create_job(document, owner="lab", estimate={}, document_hash="outage", enqueue=False)["id"]


def failing(times: int, call: Callable[..., Any], before: Callable[[], None] = lambda: None) -> Callable[..., Any]:
    """``call``, raising ``ConnectionError`` on its first ``times`` calls (after running ``before``)."""
    calls = {"n": 0}

    def wrapper(*args: Any, **kwargs: Any) -> Any:
        calls["n"] += 1
        if calls["n"] <= times:
            before()
            raise redis.ConnectionError("Connection refused (injected)")
        return call(*args, **kwargs)

    return wrapper


@pytest.fixture
def short_waits(redis_url: str, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("FIXQ_LEASE_S", "3")
    monkeypatch.setattr(execution, "FIRST_RETRY_S", 0.01)
    get_settings.cache_clear()


def test_the_result_write_is_retried_until_redis_answers(
    store: JobStore, short_waits: None, monkeypatch: pytest.MonkeyPatch
) -> None:
    document = machine_shop()
    job_id = submit(store, document)
    monkeypatch.setattr(JobStore, "finish", failing(3, JobStore.finish))
    monkeypatch.setattr(JobStore, "write_log", failing(2, JobStore.write_log))
    assert task.run_job(job_id) == {"job": job_id, "outcome": "done"}
    job = store.get_job(job_id)
    assert job is not None and job["state"] == "done"
    result = store.get_result(job_id)
    assert result is not None
    assert np.array_equal(np.asarray(result["value"]), np.asarray(solve(document)["value"]))
    assert store.get_log(job_id) == result["log"]


def test_a_result_write_whose_reply_was_lost_counts_as_written(
    store: JobStore, short_waits: None, monkeypatch: pytest.MonkeyPatch
) -> None:
    job_id = submit(store, machine_shop())
    finish = JobStore.finish

    def written_then_lost(self: JobStore, *args: Any, **kwargs: Any) -> bool:
        if not written_then_lost.done:  # type: ignore[attr-defined]
            written_then_lost.done = True  # type: ignore[attr-defined]
            finish(self, *args, **kwargs)
            raise redis.ConnectionError("Connection reset by peer (injected, after the write)")
        return finish(self, *args, **kwargs)

    written_then_lost.done = False  # type: ignore[attr-defined]
    monkeypatch.setattr(JobStore, "finish", written_then_lost)
    assert task.run_job(job_id)["outcome"] == "done"


def test_a_lease_taken_over_during_the_outage_writes_nothing(
    store: JobStore, short_waits: None, monkeypatch: pytest.MonkeyPatch
) -> None:
    job_id = submit(store, machine_shop())

    def another_execution_takes_over() -> None:
        store.redis.set(store.keys.lease(job_id), "another-execution", px=60_000)

    monkeypatch.setattr(JobStore, "finish", failing(2, JobStore.finish, another_execution_takes_over))
    assert task.run_job(job_id) == {"job": job_id, "outcome": "lease_lost"}
    job = store.get_job(job_id)
    assert job is not None and job["state"] == "running"
    assert store.get_result(job_id) is None


def test_a_solve_goes_on_when_checkpoint_saves_and_stop_checks_fail(
    store: JobStore, short_waits: None, monkeypatch: pytest.MonkeyPatch
) -> None:
    document = random_replacement(3_000, checkpoint_s=0.05)
    job_id = submit(store, document)
    saves = failing(10**6, JobStore.save_checkpoint)
    monkeypatch.setattr(JobStore, "save_checkpoint", saves)
    monkeypatch.setattr(JobStore, "stop_signals", failing(10**6, JobStore.stop_signals))
    assert task.run_job(job_id)["outcome"] == "done"
    result = store.get_result(job_id)
    assert result is not None and result["iterations"] == 3_000
    assert np.array_equal(np.asarray(result["value"]), np.asarray(solve(document)["value"]))


def test_the_lease_heartbeat_survives_a_memory_error(
    store: JobStore, redis_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("FIXQ_LEASE_S", "0.3")
    get_settings.cache_clear()
    job_id = submit(store, random_replacement(20_000))
    original_init = execution.Execution.__init__
    raised = []

    def init(self: Any, *args: Any, **kwargs: Any) -> None:
        original_init(self, *args, **kwargs)
        renew = self._renew

        def renew_once_out_of_memory(*a: Any, **k: Any) -> Any:
            if not raised:
                raised.append(True)
                raise MemoryError
            return renew(*a, **k)

        self._renew = renew_once_out_of_memory

    monkeypatch.setattr(execution.Execution, "__init__", init)
    # A heartbeat that died would let the 0.3 s lease lapse within the solve (over a second).
    assert task.run_job(job_id)["outcome"] == "done"
    assert raised


def test_a_job_too_large_for_the_worker_fails_with_its_message_and_the_next_one_runs(
    store: JobStore, redis_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("FIXQ_MAX_PROBLEM_MB", "0.05")
    get_settings.cache_clear()
    large, small = submit(store, random_replacement(3)), submit(store, machine_shop())
    assert task.run_job(large)["outcome"] == "failed"
    error = store.get_job(large)["error"]
    assert error["title"] == "problem too large" and "MiB" in error["detail"], error
    assert task.run_job(small)["outcome"] == "done"
