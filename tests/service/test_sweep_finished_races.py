"""``sweep.finished`` under races, in process on the private Redis server.

The executions are the real ``service.execution.Execution`` (which writes a
job's end) and the finish hook is the real ``service.lifecycle.job_finished``,
called here as a worker calls it; deliveries go over HTTP to a loopback
receiver through ``service.webhooks.deliver_due``.  Documents are the shared
invented machine shop.
"""

from __future__ import annotations

import json
import threading

import pytest

from service import lifecycle, sweeps, webhooks
from service.deps import Caller
from service.execution import Execution
from service.reaper import reap
from service.settings import Settings
from service.store import JobStore
from tests._documents import machine_shop
from tests._receiver import Receiver


@pytest.fixture
def hook_store(store: JobStore, settings: Settings) -> JobStore:
    update = {"auth": False, "notify_allow_hosts": "127.0.0.1", "notify_allow_private": True}
    return JobStore(store.redis, settings.model_copy(update=update))


def new_sweep(store: JobStore, url: str, discounts: list[float]) -> tuple[str, list[str]]:
    body = {"base": machine_shop(notify={"url": url}), "vary": {"discount": discounts}}
    sweep = sweeps.create_sweep(body, Caller("anonymous", admin=True), store, store.settings)
    jobs = {int(k): v.decode() for k, v in store.redis.hgetall(sweep.keys.jobs).items()}
    return sweep.id, [jobs[i] for i in sorted(jobs)]


def sweep_events(receiver: Receiver) -> list[dict]:
    return [json.loads(r["body"]) for r in receiver.requests if r["headers"]["Fixq-Event"] == "sweep.finished"]


def test_two_rows_ending_at_the_same_moment_notify_their_sweep_once(hook_store: JobStore) -> None:
    store = hook_store
    with Receiver([204]) as receiver:
        made = [new_sweep(store, receiver.url, [0.8, 0.9]) for _ in range(6)]
        for sweep_id, jobs in made:
            assert [Execution(store, job_id).run() for job_id in jobs] == ["done", "done"]
            # Both jobs' ends are written; their workers now run the finish hook at the same moment.
            barrier = threading.Barrier(len(jobs))

            def hook(job_id: str) -> None:
                barrier.wait()
                lifecycle.job_finished(store, job_id, "done")

            threads = [threading.Thread(target=hook, args=(job_id,)) for job_id in jobs]
            for thread in threads:
                thread.start()
            for thread in threads:
                thread.join()
        while webhooks.deliver_due(store):
            pass
    events = sweep_events(receiver)
    assert sorted(e["sweep"]["id"] for e in events) == sorted(sweep_id for sweep_id, _ in made)
    for event in events:
        assert event["sweep"]["counts"]["done"] == 2 and event["sweep"]["state"] == "done"


def test_a_worker_dead_before_its_finish_hook_leaves_the_notification_to_the_reaper(hook_store: JobStore) -> None:
    store = hook_store
    with Receiver([204]) as receiver:
        sweep_id, jobs = new_sweep(store, receiver.url, [0.7, 0.8, 0.9])
        for job_id in jobs[:2]:
            assert Execution(store, job_id).run() == "done"
            lifecycle.job_finished(store, job_id, "done")
        assert Execution(store, jobs[2]).run() == "done"  # ... and its worker dies before the hook
        assert webhooks.delivery_status(store, f"sweep:{sweep_id}") is None
        reap(store, use_lock=False)
        reap(store, use_lock=False)
        lifecycle.job_finished(store, jobs[2], "done")  # a late hook (an orphaned execution) adds nothing
        while webhooks.deliver_due(store):
            pass
    events = sweep_events(receiver)
    assert len(events) == 1, events
    view = events[0]["sweep"]
    assert view["id"] == sweep_id and view["counts"]["done"] == 3
    assert [row["job"] for row in view["rows"]["data"]] == jobs
    assert webhooks.delivery_status(store, f"sweep:{sweep_id}")["state"] == "delivered"


def test_the_reapers_read_a_running_sweeps_rows_at_most_once_a_minute(hook_store: JobStore,
                                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    # Every reaper runs a pass every 5 s; before, each pass read every row of every sweep still to be notified
    # (10,000 job states a pass for a nightly sweep of 10,000 rows), though a lost count is rare.
    from service.sweeps import notify

    reads: list[str] = []
    real = notify.row_states
    monkeypatch.setattr(notify, "row_states", lambda sweep: reads.append(sweep.id) or real(sweep))
    store = hook_store
    with Receiver([204]) as receiver:
        sweep_id, jobs = new_sweep(store, receiver.url, [0.7, 0.8, 0.9])
        assert Execution(store, jobs[0]).run() == "done"
        lifecycle.job_finished(store, jobs[0], "done")
        for _ in range(5):
            reap(store, use_lock=False)
        assert reads == [sweep_id]  # the first pass read the rows; the next four did not
        for job_id in jobs[1:]:
            assert Execution(store, job_id).run() == "done"  # ... and their workers die before the hook
        reap(store, use_lock=False)
        assert webhooks.delivery_status(store, f"sweep:{sweep_id}") is None  # within the minute: not yet
        store.redis.delete(store.key("sweep", sweep_id) + ":rescan")  # the minute has passed
        reap(store, use_lock=False)
        assert reads == [sweep_id, sweep_id]
        while webhooks.deliver_due(store):
            pass
        # Counted rows need no read: a sweep whose ended set covers every row is queued at the next pass.
        other_id, others = new_sweep(store, receiver.url, [0.75, 0.85])
        for job_id in others:
            assert Execution(store, job_id).run() == "done"
        store.redis.sadd(store.key("sweep", other_id) + ":ended", 0, 1)  # counted, but the hook died before queuing
        reap(store, use_lock=False)
        assert reads == [sweep_id, sweep_id]
        while webhooks.deliver_due(store):
            pass
    events = sweep_events(receiver)
    assert sorted(e["sweep"]["id"] for e in events) == sorted([sweep_id, other_id])
    assert all(e["sweep"]["state"] == "done" for e in events)
