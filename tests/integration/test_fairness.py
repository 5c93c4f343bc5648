"""Fair shares of the workers: owners served in turn within each priority, each under its running cap.

The first tests drive ``service.dispatch.pick`` in process on the private
Redis server (tickets taken off the queues by hand, as a worker would); the
last one runs two real ``fixq worker`` processes behind one owner's backlog.
"""

from __future__ import annotations

import os
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from datetime import datetime
from pathlib import Path
from typing import Any

import pytest
import redis

from service import dispatch, liveness
from service import queue as rq_queues
from service.keys import ANONYMOUS, KeyStore
from service.reaper import reap
from service.settings import Settings
from service.store import JobStore
from tests._documents import machine_shop
from tests._processes import stop_process_groups

REPO = Path(__file__).resolve().parents[2]


def submit(store: JobStore, owner: str, n: int = 1, **overrides: Any) -> list[str]:
    """``n`` jobs of ``owner`` created as the API creates them (pending, one ticket each); their ids."""
    return [
        store.create_job(machine_shop(label=f"{owner} {i} (invented)", **overrides), owner=owner, estimate={},
                         document_hash=f"{owner}-{i}")["id"]
        for i in range(n)
    ]  # fmt: skip


def four_live_workers(store: JobStore) -> None:
    """Four workers heard from just now, as their beacons would record them."""
    now = time.time()
    store.redis.zadd(liveness.seen_key(store), {name: now for name in ("one", "two", "three", "four")})


def take_ticket(store: JobStore) -> str:
    """The next ticket a worker would take: the oldest of the most urgent non-empty queue."""
    for priority in rq_queues.PRIORITIES:
        ticket = store.redis.lpop(rq_queues.queue_key(priority))
        if ticket is not None:
            return ticket.decode()
    raise AssertionError("no ticket left on any queue")


def start(store: JobStore, job_id: str) -> str:
    """Claim a picked job as an execution does; its lease token."""
    token = f"token-{job_id}"
    assert store.claim(job_id, token, worker="test") == "ok"
    return token


@pytest.fixture
def keys(redis_client: redis.Redis, settings: Settings) -> KeyStore:
    return KeyStore(redis_client, settings.redis_prefix)


@pytest.fixture
def roomy(redis_client: redis.Redis, settings: Settings) -> JobStore:
    """A store whose owners may each run 100 jobs at once: the turn order alone decides."""
    return JobStore(redis_client, settings.model_copy(update={"key_max_running_jobs": 100}))


def test_free_workers_serve_the_owners_with_queued_jobs_in_turn(roomy: JobStore) -> None:
    alice, bob, carol = submit(roomy, "alice", 3), submit(roomy, "bob", 1), submit(roomy, "carol", 2)
    picked = [dispatch.pick(roomy, take_ticket(roomy)) for _ in range(6)]
    assert picked == [("job", job) for job in (alice[0], bob[0], carol[0], alice[1], carol[1], alice[2])]
    assert dispatch.pick(roomy, "spare-1") == ("empty", None)


def test_a_high_priority_job_of_another_owner_is_taken_first(roomy: JobStore) -> None:
    submit(roomy, "alice", 5)
    urgent = submit(roomy, "bob", 1, priority="high")
    assert dispatch.pick(roomy, take_ticket(roomy)) == ("job", urgent[0])


def test_an_owner_at_its_running_cap_waits_while_the_others_are_served(store: JobStore, keys: KeyStore) -> None:
    keys.add("alice", limits={"max_running_jobs": 1})
    alice, bob = submit(store, "alice", 2), submit(store, "bob", 1)
    _, first = dispatch.pick(store, take_ticket(store))
    token = start(store, first)
    assert first == alice[0]
    assert dispatch.pick(store, take_ticket(store)) == ("job", bob[0])
    ticket = take_ticket(store)
    assert dispatch.pick(store, ticket) == ("capped", None)
    assert store.finish(first, token, "failed", error={"title": "t", "detail": "d", "errors": []})
    assert dispatch.pick(store, ticket) == ("job", alice[1])


def test_without_a_cap_of_its_own_an_owner_runs_on_half_the_workers(store: JobStore) -> None:
    assert store.settings.key_max_running_jobs == 0
    alice, bob = submit(store, "alice", 3), submit(store, "bob", 1)
    four_live_workers(store)
    assert dispatch.running_cap(store) == (2, 2)
    picked = [dispatch.pick(store, take_ticket(store))[1] for _ in range(3)]
    for job in picked:
        start(store, job)
    assert picked == [alice[0], bob[0], alice[1]]
    assert dispatch.pick(store, take_ticket(store)) == ("capped", None)
    assert store.get_job(alice[2])["state"] == "queued"


def test_with_auth_off_the_one_anonymous_owner_is_not_capped(store: JobStore) -> None:
    anonymous = submit(store, ANONYMOUS, 4)
    four_live_workers(store)
    picked = [dispatch.pick(store, take_ticket(store))[1] for _ in range(4)]
    for job in picked:
        start(store, job)
    assert picked == anonymous


def test_a_worker_waits_a_little_while_every_owner_is_at_its_cap_then_puts_its_ticket_back(
    redis_client: redis.Redis, settings: Settings, keys: KeyStore
) -> None:
    store = JobStore(redis_client, settings.model_copy(update={"dispatch_wait_s": 0.3}))
    keys.add("alice", limits={"max_running_jobs": 1})
    alice = submit(store, "alice", 2)
    start(store, dispatch.pick(store, take_ticket(store))[1])
    ticket = take_ticket(store)
    began = time.monotonic()
    assert dispatch.next_job(store, ticket) is None
    assert 0.3 <= time.monotonic() - began < 2.0
    again = f"{alice[1]}-2"
    assert store.redis.lrange(rq_queues.queue_key("normal"), 0, -1) == [again.encode()]
    assert store.redis.hget(store.keys.job(alice[1]), "rq_job") == again.encode()
    # A job of another owner wakes a waiting worker at once.
    waited: list[str | None] = []
    patient = JobStore(redis_client, settings.model_copy(update={"dispatch_wait_s": 5.0}))
    waiter = threading.Thread(target=lambda: waited.append(dispatch.next_job(patient, take_ticket(patient))))
    waiter.start()
    time.sleep(0.1)
    [bob] = submit(store, "bob", 1)
    waiter.join(5)
    assert waited == [bob]


def test_a_job_canceled_in_its_queue_is_never_picked(roomy: JobStore) -> None:
    alice = submit(roomy, "alice", 2)
    assert roomy.request_cancel(alice[0])["outcome"] == "canceled"
    assert roomy.queue_depths()["normal"] == 1
    pending = rq_queues.DispatchKeys(roomy.keys.prefix).pending("normal", "alice")
    assert roomy.redis.lrange(pending, 0, -1) == [alice[1].encode()]
    assert dispatch.pick(roomy, take_ticket(roomy)) == ("job", alice[1])


def test_a_ticket_that_runs_another_job_hands_its_job_that_jobs_ticket(store: JobStore, keys: KeyStore) -> None:
    # alice's second job keeps a ticket in the queue, so the reaper never takes it for lost.
    keys.add("alice", limits={"max_running_jobs": 1})
    alice = submit(store, "alice", 2)
    bob = submit(store, "bob", 1)
    start(store, dispatch.pick(store, take_ticket(store))[1])
    assert dispatch.pick(store, take_ticket(store)) == ("job", bob[0])  # alice's second ticket
    waiting_on = store.redis.hget(store.keys.job(alice[1]), "rq_job")
    assert waiting_on == f"{bob[0]}-1".encode()
    assert store.redis.lrange(rq_queues.queue_key("normal"), 0, -1) == [waiting_on]
    store.redis.hset(store.keys.job(alice[1]), "enqueued_at", "0")
    assert reap(store, use_lock=False)["rescued"] == []


def test_a_job_picked_by_a_worker_that_died_before_claiming_it_is_rescued(roomy: JobStore) -> None:
    alice = submit(roomy, "alice", 1)
    ticket = take_ticket(roomy)
    assert dispatch.pick(roomy, ticket) == ("job", alice[0])
    # The worker died here: the job is queued, in no pending list, and its ticket ran out long ago.
    roomy.redis.hset(roomy.keys.job(alice[0]), "enqueued_at", "0")
    assert reap(roomy, use_lock=False)["rescued"] == alice
    assert roomy.get_job(alice[0])["state"] == "queued"
    assert dispatch.pick(roomy, take_ticket(roomy)) == ("job", alice[0])


def _seconds(iso: str) -> float:
    return datetime.fromisoformat(iso.replace("Z", "+00:00")).timestamp()


@pytest.fixture
def workers(redis_url: str, redis_client: redis.Redis, tmp_path: Path) -> Iterator[list[subprocess.Popen]]:
    """Two real ``fixq worker`` processes on the private Redis server, registered with RQ."""
    python_path = os.pathsep.join(filter(None, [str(REPO), os.environ.get("PYTHONPATH")]))
    env = {**os.environ, "FIXQ_REDIS_URL": redis_url, "PYTHONPATH": python_path, "FIXQ_WORKER_LOG_LEVEL": "WARNING"}
    processes: list[subprocess.Popen] = []
    try:
        for n in range(2):
            with open(tmp_path / f"worker-{n}.log", "wb") as log:
                processes.append(subprocess.Popen(
                    [sys.executable, "-m", "service.cli", "worker"], cwd=REPO, env=env, stdout=log,
                    stderr=subprocess.STDOUT, start_new_session=True,
                ))  # fmt: skip
        deadline = time.monotonic() + 60
        while redis_client.scard("rq:workers") < 2 and time.monotonic() < deadline:
            time.sleep(0.1)
        assert redis_client.scard("rq:workers") == 2
        yield processes
    finally:
        stop_process_groups(processes)


def test_one_owners_backlog_does_not_hold_every_worker(store: JobStore, workers: list[subprocess.Popen]) -> None:
    # An invented slow shop: value iteration to a tight tolerance, a second or so per job.
    slow = {"discount": 0.999, "solver": {"method": "value_iteration", "tolerance": 1e-12}}
    backlog = submit(store, "alice", 40, **slow)
    deadline = time.monotonic() + 30
    while store.counts_by_state()["running"] == 0 and time.monotonic() < deadline:
        time.sleep(0.05)
    [bob] = submit(store, "bob", 1, **slow)
    time.sleep(0.2)
    [carol] = submit(store, "carol", 1, priority="high", **slow)
    while not all(store.get_job(job)["started_at"] for job in (bob, carol)) and time.monotonic() < deadline:
        time.sleep(0.05)
    bob_record, carol_record = store.get_job(bob), store.get_job(carol)
    assert bob_record["started_at"] and carol_record["started_at"], (bob_record, carol_record)
    # alice runs on at most half the workers, so bob's job starts at once, not behind her backlog.
    assert _seconds(bob_record["started_at"]) - _seconds(bob_record["submitted_at"]) < 2.0
    alice_starts = [_seconds(r["started_at"]) for r in map(store.get_job, backlog) if r["started_at"]]
    assert sum(start < _seconds(bob_record["started_at"]) for start in alice_starts) < 5
    # carol's high-priority job takes the first worker that comes free: no job of alice's starts before it.
    submitted, started = _seconds(carol_record["submitted_at"]), _seconds(carol_record["started_at"])
    assert not [start for start in alice_starts if submitted < start < started]
    assert store.get_job(backlog[-1])["state"] == "queued"
