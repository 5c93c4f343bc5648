"""Per-key limits: active jobs, high-priority jobs, memory per job, request bodies; counted without races."""

from __future__ import annotations

import threading
import time
from typing import Any

import pytest
import redis
from fastapi import FastAPI
from rq import Queue

from service import queue as rq_queues
from service.app import create_app
from service.keys import ApiKey, KeyStore
from service.limits import ActiveJobs, Quota, check_problem_size, quota_for
from service.problems import Problem
from service.settings import Settings
from service.store import JobStore
from tests._documents import print_shop
from tests.service._http import assert_problem, client_for, make_client, run_inline


def quota(owner: str = "alice", active: int = 3, high: int = 1, mb: float = 100.0) -> Quota:
    return Quota(owner=owner, max_active_jobs=active, max_active_high_jobs=high, key_max_problem_mb=mb)


@pytest.fixture
def active(redis_client: redis.Redis, settings: Settings) -> ActiveJobs:
    return ActiveJobs(redis_client, settings.redis_prefix)


def new_job(store: JobStore, owner: str = "alice", priority: str = "normal") -> str:
    record = store.create_job(print_shop(priority=priority), owner=owner, estimate={}, document_hash="h", enqueue=False)
    return record["id"]


def test_reservations_count_up_to_the_cap_and_refuse_beyond(active: ActiveJobs, store: JobStore) -> None:
    taken = [active.reserve(quota(), high=False) for _ in range(3)]
    with pytest.raises(Problem) as refused:
        active.reserve(quota(), high=False)
    assert refused.value.status == 429
    assert refused.value.extensions == {"limit": "max_active_jobs", "limit_value": 3, "usage": 3}
    assert refused.value.headers["Retry-After"].isdigit()
    assert active.usage("bob") == (0, 0)
    active.release(taken[0])
    job_id = new_job(store)
    active.bind(taken[1], [job_id])
    assert active.usage("alice") == (2, 0)
    active.reserve(quota(), high=False)
    assert active.usage("alice") == (3, 0)


def test_finished_jobs_and_lapsed_reservations_free_their_slots(
    active: ActiveJobs, store: JobStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    job_ids = [new_job(store) for _ in range(2)]
    for job_id in job_ids:
        active.bind(active.reserve(quota(), high=False), [job_id])
    monkeypatch.setattr("service.limits.RESERVATION_S", 0.05)
    active.reserve(quota(), high=False)  # a submission whose API died before its job existed
    assert active.usage("alice") == (3, 0)
    store.request_cancel(job_ids[0])
    assert active.usage("alice") == (2, 0)
    time.sleep(0.1)
    assert active.usage("alice") == (1, 0)


def test_high_priority_jobs_have_a_cap_of_their_own(active: ActiveJobs, store: JobStore) -> None:
    active.bind(active.reserve(quota(), high=True), [new_job(store, priority="high")])
    with pytest.raises(Problem) as refused:
        active.reserve(quota(), high=True)
    assert refused.value.extensions["limit"] == "max_active_high_jobs"
    assert "priority normal" in refused.value.detail
    active.reserve(quota(), high=False)
    assert active.usage("alice") == (2, 1)


def test_a_cap_of_zero_counts_nothing(active: ActiveJobs) -> None:
    unlimited = quota(active=0, high=0)
    assert all(active.reserve(unlimited, high=True).member is None for _ in range(50))
    assert active.usage("alice") == (0, 0)


def test_twenty_concurrent_reservations_take_exactly_the_cap(redis_url: str, settings: Settings) -> None:
    barrier = threading.Barrier(20)
    outcomes: list[str] = []

    def attempt() -> None:
        client = redis.Redis.from_url(redis_url)
        slots = ActiveJobs(client, settings.redis_prefix)
        barrier.wait()
        try:
            slots.reserve(quota(owner="racer", active=5), high=False)
            outcomes.append("ok")
        except Problem:
            outcomes.append("refused")
        finally:
            client.close()

    threads = [threading.Thread(target=attempt) for _ in range(20)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert sorted(outcomes).count("ok") == 5 and outcomes.count("refused") == 15


def test_quota_takes_a_keys_own_limits_over_the_settings(settings: Settings) -> None:
    plain = quota_for(settings, "alice")
    assert (plain.max_active_jobs, plain.max_active_high_jobs, plain.key_max_problem_mb) == (
        settings.max_active_jobs, settings.max_active_high_jobs, settings.key_max_problem_mb,
    )  # fmt: skip
    own = quota_for(settings, "student", ApiKey("student", limits={"max_active_jobs": 2, "max_problem_mb": 8.0}))
    assert own.max_active_jobs == 2 and own.key_max_problem_mb == 8.0
    assert own.max_active_high_jobs == settings.max_active_high_jobs
    with pytest.raises(Problem) as refused:
        check_problem_size(own, {"bytes": 9 * 2**20, "states": 10, "choices": 3})
    assert refused.value.status == 413 and "this key's own cap" in refused.value.detail


@pytest.fixture
def limited_app(settings: Settings, redis_client: redis.Redis) -> FastAPI:
    return create_app(
        settings.model_copy(update={"auth": True, "max_active_jobs": 4, "max_active_high_jobs": 2,
                                    "key_max_problem_mb": 0.0005})  # fmt: skip
    )


def varied(i: int, **overrides: Any) -> dict[str, Any]:
    return print_shop(discount=0.5 + i / 1000, **overrides)


def test_active_job_cap_is_429_naming_the_limit_and_usage(limited_app: FastAPI, keys: KeyStore) -> None:
    with client_for(limited_app, keys, "alice", limits={"max_problem_mb": 10}) as alice, client_for(
        limited_app, keys, "bob", limits={"max_problem_mb": 10}
    ) as bob:
        ids = [alice.post("/v1/jobs", json=varied(i)).json()["id"] for i in range(4)]
        response = alice.post("/v1/jobs", json=varied(9))
        body = assert_problem(response, 429)
        assert body["limit"] == "max_active_jobs" and body["limit_value"] == 4 and body["usage"] == 4
        assert "max_active_jobs" in body["detail"] and "4" in body["detail"] and "'alice'" in body["detail"]
        assert int(response.headers["retry-after"]) > 0
        assert bob.post("/v1/jobs", json=varied(9)).status_code == 202
        assert alice.delete(f"/v1/jobs/{ids[0]}").json()["state"] == "canceled"
        assert alice.post("/v1/jobs", json=varied(9)).status_code == 202
        assert run_inline(ids[1])["outcome"] == "done"
        assert alice.post("/v1/jobs", json=varied(10)).status_code == 202


def test_high_priority_cap_is_429_and_normal_jobs_still_pass(limited_app: FastAPI, keys: KeyStore) -> None:
    with client_for(limited_app, keys, "alice", limits={"max_problem_mb": 10}) as alice:
        for i in range(2):
            assert alice.post("/v1/jobs", json=varied(i, priority="high")).status_code == 202
        body = assert_problem(alice.post("/v1/jobs", json=varied(5, priority="high")), 429)
        assert body["limit"] == "max_active_high_jobs" and body["usage"] == 2 and body["limit_value"] == 2
        assert alice.post("/v1/jobs", json=varied(5, priority="normal")).status_code == 202


def test_memory_cap_per_key_is_413_naming_the_limit_and_the_estimate(
    limited_app: FastAPI, keys: KeyStore, store: JobStore
) -> None:
    with client_for(limited_app, keys, "alice") as alice:
        body = assert_problem(alice.post("/v1/jobs", json=print_shop()), 413)
    assert body["limit"] == "key_max_problem_mb" and body["limit_value"] == 0.0005
    assert body["usage"] > 0.0005 and body["estimate"]["bytes"] > 0.0005 * 2**20
    assert "key_max_problem_mb" in body["detail"] and "MiB" in body["detail"]
    assert body["errors"][0]["path"] == "model"
    assert store.counts_by_state()["queued"] == 0
    with client_for(limited_app, keys, "bigger", limits={"max_problem_mb": 10}) as bigger:
        assert bigger.post("/v1/jobs", json=print_shop()).status_code == 202


def test_request_body_cap_is_413_problem_json_with_auth_on(
    settings: Settings, redis_client: redis.Redis, keys: KeyStore
) -> None:
    app = create_app(settings.model_copy(update={"auth": True, "max_body_mb": 0.01}))
    with client_for(app, keys, "alice") as alice:
        body = assert_problem(alice.post("/v1/jobs", content=b" " * 20_000), 413)
        assert "max_body_mb" in body["detail"] and body["max_body_bytes"] == int(0.01 * 2**20)


def test_twenty_concurrent_submissions_cannot_exceed_the_cap(
    limited_app: FastAPI, keys: KeyStore, store: JobStore
) -> None:
    key = keys.add("racer", limits={"max_problem_mb": 10})
    barrier = threading.Barrier(20)
    statuses: list[int] = []

    def submit(i: int) -> None:
        with make_client(limited_app, Authorization=f"Bearer {key}") as client:
            barrier.wait()
            statuses.append(client.post("/v1/jobs", json=varied(i)).status_code)

    threads = [threading.Thread(target=submit, args=(i,)) for i in range(20)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert statuses.count(202) == 4 and statuses.count(429) == 16
    assert store.counts_by_state()["queued"] == 4
    assert store.queue_depths()["normal"] == 4


def test_workers_drain_high_then_normal_then_low(redis_client: redis.Redis) -> None:
    names = rq_queues.ordered_queue_names()
    assert names == ["fixq-high", "fixq-normal", "fixq-low"]
    queues = {p: Queue(rq_queues.queue_name(p), connection=redis_client) for p in ("low", "normal", "high")}
    for priority, queue in queues.items():
        queue.enqueue("service.task.run_job", f"{priority}job", job_id=f"{priority}-1")
    # Queue.dequeue_any is how an RQ worker picks its next job from its queues, in their order.
    ordered = [queues[p] for p in ("high", "normal", "low")]
    taken = []
    for _ in range(3):
        job, _ = Queue.dequeue_any(ordered, None, connection=redis_client)
        taken.append(job.id)
    assert taken == ["high-1", "normal-1", "low-1"]


def test_run_worker_listens_on_the_priorities_in_order(monkeypatch: pytest.MonkeyPatch, redis_url: str) -> None:
    import service.task as task

    seen: dict[str, Any] = {}

    class RecordingWorker:
        def __init__(self, queues: list[Queue], **kwargs: Any) -> None:
            seen["queues"] = [queue.name for queue in queues]

        def work(self, **kwargs: Any) -> bool:
            return False

    monkeypatch.setattr(task, "Worker", RecordingWorker)
    monkeypatch.setattr(task, "SimpleWorker", RecordingWorker)
    started = time.monotonic()
    task.run_worker(burst=True)
    assert seen["queues"] == ["fixq-high", "fixq-normal", "fixq-low"]
    assert time.monotonic() - started < 30
