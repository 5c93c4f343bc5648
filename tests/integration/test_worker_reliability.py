"""Reliability of jobs: the RQ task, the lease, checkpoints, cancel and the reaper.

Real Redis (the private server of ``tests/conftest.py``) and, for most tests,
real ``rq`` worker processes started through ``service.task.run_worker``, each
in its own session so that a test can SIGKILL a worker and its work-horse (RQ
puts the horse in a process group of its own).  Leases and reaper passes are
shortened through ``FIXQ_*`` variables so that a dead node is noticed in a few
seconds.  The problems are invented: a three-state machine shop and a random
sparse replacement problem.
"""

from __future__ import annotations

import functools
import itertools
import os
import subprocess
import sys
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import redis
from rq.job import Job

from service import queue as rq_queues
from service.checkpoints import decode_checkpoint, encode_checkpoint
from service.reaper import reap
from service.settings import Settings, get_settings
from service.store import TERMINAL_STATES, JobStore
from service.task import run_job
from tests._documents import idle_busy_worn, random_replacement
from tests._processes import child_pids, kill_group
from worker.convergence_log import KEEP_FIRST
from worker.solve import solve

REPO = Path(__file__).resolve().parents[2]
SHORT_LEASES = {"FIXQ_LEASE_S": "3", "FIXQ_REAPER_INTERVAL_S": "1"}
WORKER_COMMAND = [sys.executable, "-c", "from service.task import run_worker; run_worker()"]


def worn_machine() -> dict[str, Any]:
    """Three machine states, run or service (invented numbers)."""
    return idle_busy_worn(
        reward=[[1.0, -0.5], [2.0, None], [0.5, -1.0]],
        transition=[
            [[0.8, 0.2, 0.0], [1.0, 0.0, 0.0]],
            [[0.1, 0.6, 0.3], [0.3, 0.3, 0.4]],
            [[0.0, 0.0, 1.0], [0.9, 0.1, 0.0]],
        ],
        tags=["reliability"],
        discount=0.9,
        solver={"method": "howard", "tolerance": 1e-10},
    )


def slow_replacement(iterations: int, *, checkpoint_s: float | None = None) -> dict[str, Any]:
    """A random sparse replacement problem that takes about 0.1 s per improvement step (invented data)."""
    # Howard stretches an evaluation phase to 20 × evaluation_steps once the policy is stable, and ends
    # it early only when the value stops changing, which a discount this close to 1 never lets happen
    # within the test (at 0.999, some processors reached the floating-point fixed point in 7 steps).
    return random_replacement(
        iterations,
        seed=7,
        label="random replacement problem (invented)",
        checkpoint_s=checkpoint_s,
        discount=SLOW_DISCOUNT,
        method="howard",
        evaluation_steps=_evaluation_steps_for(0.1),
    )


SLOW_DISCOUNT = 0.99999


@functools.cache
def _evaluation_steps_for(seconds: float) -> int:
    """Howard's evaluation_steps that make one stable-policy step take about ``seconds`` on this machine.

    Measured once in this process (machines differ eightfold), so the tests that kill or cancel a
    running job find it running whatever the machine.
    """
    probe = solve(random_replacement(12, seed=7, discount=SLOW_DISCOUNT, method="howard", evaluation_steps=100))
    times = [entry["seconds"] for entry in probe["log"]]
    per_step = max((times[-1] - times[5]) / (len(times) - 6), 1e-6)  # steps 7.. run stretched phases
    return int(min(max(100 * seconds / per_step, 100), 20_000))


def submit(store: JobStore, document: dict[str, Any], **kwargs: Any) -> str:
    record = store.create_job(document, owner="lab", estimate={}, document_hash="test", **kwargs)
    return record["id"]


def wait_for(
    store: JobStore, job_id: str, predicate: Callable[[dict[str, Any]], bool], timeout_s: float, what: str
) -> dict[str, Any]:
    deadline = time.monotonic() + timeout_s
    while True:
        job = store.get_job(job_id)
        if job is not None and predicate(job):
            return job
        if time.monotonic() > deadline:
            raise AssertionError(f"job {job_id} not {what} within {timeout_s} s; last record: {job}")
        time.sleep(0.05)


def finished(job: dict[str, Any]) -> bool:
    return job["state"] in TERMINAL_STATES


def iterations_of(log: list[dict[str, Any]]) -> list[int]:
    return [entry["iteration"] for entry in log]


class Workers:
    """Worker processes started by a test; all killed (with their horses) at the end."""

    def __init__(self, redis_url: str, log_dir: Path) -> None:
        self.env = {**os.environ, **SHORT_LEASES, "FIXQ_REDIS_URL": redis_url, "PYTHONPATH": str(REPO),
                    "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1"}  # fmt: skip
        self.log_dir = log_dir
        self.processes: list[subprocess.Popen[bytes]] = []
        self.horses: set[int] = set()

    def start(self) -> subprocess.Popen[bytes]:
        with open(self.log_dir / f"worker-{len(self.processes)}.log", "wb") as log:
            process = subprocess.Popen(
                WORKER_COMMAND, cwd=REPO, env=self.env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True
            )
        self.processes.append(process)
        return process

    def kill_node(self, process: subprocess.Popen[bytes]) -> None:
        """SIGKILL a worker and its work-horse: what a dead machine looks like."""
        horses = child_pids(process.pid)
        kill_group(process.pid)
        for horse in horses:
            kill_group(horse)
        process.wait()

    def kill_worker_only(self, process: subprocess.Popen[bytes]) -> list[int]:
        """SIGKILL a worker's process group; its work-horse lives on as an orphan."""
        horses = child_pids(process.pid)
        self.horses.update(horses)
        kill_group(process.pid)
        process.wait()
        return horses

    def logs(self) -> str:
        logs = sorted(self.log_dir.glob("*.log"))
        return "\n".join(f"--- {p.name}\n{p.read_text(errors='replace')[-4000:]}" for p in logs)

    def close(self) -> None:
        for process in self.processes:
            if process.poll() is None:
                self.horses.update(child_pids(process.pid))
                kill_group(process.pid)
                process.wait()
        for horse in self.horses:
            kill_group(horse)


@pytest.fixture
def short_leases(redis_url: str, monkeypatch: pytest.MonkeyPatch) -> Settings:
    for name, value in SHORT_LEASES.items():
        monkeypatch.setenv(name, value)
    get_settings.cache_clear()
    return get_settings()


@pytest.fixture
def fast_store(redis_client: redis.Redis, short_leases: Settings) -> JobStore:
    return JobStore(redis_client, short_leases)


@pytest.fixture
def workers(redis_url: str, tmp_path: Path) -> Iterator[Workers]:
    pool = Workers(redis_url, tmp_path)
    yield pool
    pool.close()
    # Captured output: pytest shows it when the test failed.
    print(pool.logs())


@pytest.fixture
def result_writes(redis_client: redis.Redis, redis_url: str, fast_store: JobStore) -> Iterator[Counter[str]]:
    """Counts SETs of each fixq:result:* key, from Redis keyspace notifications."""
    redis_client.config_set("notify-keyspace-events", "K$")
    writes: Counter[str] = Counter()
    listener = redis.Redis.from_url(redis_url).pubsub()
    prefix = f"__keyspace@0__:{fast_store.keys.result('')}"

    def on_event(message: dict[str, Any]) -> None:
        if message["data"] == b"set":
            writes[message["channel"].decode()[len(prefix) :]] += 1

    listener.psubscribe(**{prefix + "*": on_event})
    thread = listener.run_in_thread(sleep_time=0.01, daemon=True)
    yield writes
    time.sleep(0.1)
    thread.stop()
    thread.join(2)
    listener.close()
    redis_client.config_set("notify-keyspace-events", "")


def optimal_values_by_enumeration(document: dict[str, Any]) -> np.ndarray:
    """v* of a small tabular problem by evaluating every deterministic policy.

    Reference: an optimal deterministic stationary policy exists and v* is its
    value (Puterman, Markov Decision Processes, 1994, Thm. 6.2.10); each
    policy's value is solved directly, v = (I − βP_σ)⁻¹ r_σ, with numpy.linalg.
    """
    model = document["model"]
    beta = document["discount"]
    reward = np.array([[np.nan if r is None else r for r in row] for row in model["reward"]])
    transition = np.array(model["transition"], dtype=float)
    n = reward.shape[0]
    allowed = [[a for a in range(reward.shape[1]) if not np.isnan(reward[s, a])] for s in range(n)]
    best = np.full(n, -np.inf)
    for policy in itertools.product(*allowed):
        p = transition[np.arange(n), policy]
        r = reward[np.arange(n), policy]
        best = np.maximum(best, np.linalg.solve(np.eye(n) - beta * p, r))
    return best


def test_a_job_runs_to_done_on_a_worker(fast_store: JobStore, workers: Workers, result_writes: Counter[str]) -> None:
    document = worn_machine()
    job_id = submit(fast_store, document)
    workers.start()
    job = wait_for(fast_store, job_id, finished, 60, "finished")
    assert job["state"] == "done", job
    assert job["attempts"] == 1 and job["started_at"] <= job["finished_at"]
    result = fast_store.get_result(job_id)
    assert result is not None and result["status"] == "converged"
    assert (job["status"], job["iterations"], job["error_bound"]) == (
        result["status"], result["iterations"], result["error_bound"],
    )  # fmt: skip
    reference = optimal_values_by_enumeration(document)
    assert np.max(np.abs(np.array(result["value"]) - reference)) <= result["error_bound"] + 1e-12
    assert fast_store.get_log(job_id) == result["log"]
    assert iterations_of(result["log"]) == list(range(1, result["iterations"] + 1))
    assert job["progress"]["iteration"] == result["iterations"]
    assert fast_store.solve_histograms()["iterations"]["count"] == 1
    rq_job = Job.fetch(f"{job_id}-1", connection=fast_store.redis)
    rq_result = rq_job.latest_result(timeout=10)
    assert rq_result is not None and rq_result.return_value == {"job": job_id, "outcome": "done"}
    assert result_writes[job_id] == 1


def test_cancel_of_a_queued_job_is_immediate_and_final(fast_store: JobStore) -> None:
    job_id = submit(fast_store, worn_machine())
    reply = fast_store.request_cancel(job_id)
    assert reply is not None and reply["outcome"] == "canceled" and reply["job"]["state"] == "canceled"
    assert fast_store.queue_depths() == {"high": 0, "normal": 0, "low": 0}
    # An execution that had already popped the job before the cancel writes nothing.
    assert run_job(job_id) == {"job": job_id, "outcome": "terminal"}
    job = fast_store.get_job(job_id)
    assert job is not None and job["state"] == "canceled" and job["attempts"] == 0
    assert fast_store.get_result(job_id) is None


def test_cancel_of_a_running_job_stops_it_at_the_next_sweep(fast_store: JobStore, workers: Workers) -> None:
    job_id = submit(fast_store, slow_replacement(10_000))
    workers.start()
    wait_for(fast_store, job_id, lambda j: (j["progress"] or {}).get("iteration", 0) >= 2, 60, "iterating")
    asked = time.monotonic()
    reply = fast_store.request_cancel(job_id)
    assert reply is not None and reply["outcome"] == "cancel_requested"
    job = wait_for(fast_store, job_id, finished, 10, "finished")
    took = time.monotonic() - asked
    assert job["state"] == "canceled" and took < 2.0, (job, took)
    assert fast_store.get_result(job_id) is None
    assert not fast_store.redis.exists(fast_store.keys.checkpoint(job_id), fast_store.keys.cancel(job_id))
    # Every iteration up to the cancel is logged once, in order; a fast machine may pass KEEP_FIRST
    # iterations before the cancel lands, so read the whole log and allow for the sampled tail.
    log = fast_store.get_log(job_id, limit=fast_store.log_length(job_id))
    first = iterations_of(log)[:KEEP_FIRST]
    assert first == list(range(1, len(first) + 1))
    dropped = fast_store.log_dropped(job_id)
    assert iterations_of(log)[-1] == job["iterations"] and job["iterations"] == len(log) + dropped
    # The worker survives the cancel and runs the next job.
    next_id = submit(fast_store, worn_machine())
    assert wait_for(fast_store, next_id, finished, 30, "finished")["state"] == "done"


def test_a_killed_node_s_job_resumes_from_its_checkpoint(
    fast_store: JobStore, workers: Workers, result_writes: Counter[str]
) -> None:
    job_id = submit(fast_store, slow_replacement(40, checkpoint_s=0.2))
    first = workers.start()
    wait_for(fast_store, job_id, lambda j: j["state"] == "running", 60, "running")
    standby = workers.start()
    deadline = time.monotonic() + 60
    # Kill once checkpoints are past iteration 8 and the (throttled) live log has entries.
    while (fast_store.load_checkpoint(job_id) or (0, b""))[0] < 8 or fast_store.log_length(job_id) < 1:
        assert time.monotonic() < deadline, "no checkpoints"
        time.sleep(0.05)
    workers.kill_node(first)
    killed_at = time.monotonic()
    checkpoint_iteration = fast_store.load_checkpoint(job_id)[0]
    logged_before_kill = fast_store.log_length(job_id)

    job = wait_for(fast_store, job_id, finished, 120, "finished after the kill")
    assert job["state"] == "done", job
    assert time.monotonic() - killed_at < 120
    assert job["attempts"] == 2
    result = fast_store.get_result(job_id)
    assert result is not None and result["status"] == "max_iterations" and result["iterations"] == 40
    assert result["diagnostics"]["resumed_from_iteration"] == checkpoint_iteration
    assert logged_before_kill >= 1
    assert iterations_of(result["log"]) == list(range(1, 41))
    assert fast_store.get_log(job_id) == result["log"]
    assert result_writes[job_id] == 1
    assert standby.poll() is None


def test_an_orphaned_work_horse_keeps_its_lease_and_finishes(
    fast_store: JobStore, workers: Workers, result_writes: Counter[str]
) -> None:
    # Only a forking worker has a work-horse that can outlive it (RQ 3.0 puts it in its own process group).
    workers.env["FIXQ_WORKER_CLASS"] = "forking"
    job_id = submit(fast_store, slow_replacement(25))
    first = workers.start()
    wait_for(fast_store, job_id, lambda j: (j["progress"] or {}).get("iteration", 0) >= 2, 60, "iterating")
    workers.start()
    horses = workers.kill_worker_only(first)
    assert horses, "the worker had no work-horse"
    job = wait_for(fast_store, job_id, finished, 60, "finished")
    assert job["state"] == "done" and job["attempts"] == 1, job
    result = fast_store.get_result(job_id)
    assert result is not None and result["diagnostics"]["resumed_from_iteration"] is None
    assert iterations_of(result["log"]) == list(range(1, 26))
    assert result_writes[job_id] == 1


def test_two_concurrent_executions_write_one_result(
    fast_store: JobStore, workers: Workers, result_writes: Counter[str]
) -> None:
    job_id = submit(fast_store, slow_replacement(15), enqueue=False)
    # Both processes import first, then start run_job together on a signal.
    code = (
        "import os, redis; from service.task import run_job; "
        "r = redis.Redis.from_url(os.environ['FIXQ_REDIS_URL']); r.rpush('test:ready', 1); r.blpop('test:go', 60); "
        f"print(run_job({job_id!r})['outcome'])"
    )
    runs = [
        subprocess.Popen([sys.executable, "-c", code], cwd=REPO, env=workers.env, stdout=subprocess.PIPE)
        for _ in range(2)
    ]
    deadline = time.monotonic() + 60
    while fast_store.redis.llen("test:ready") < 2:
        assert time.monotonic() < deadline, "the executions did not start"
        time.sleep(0.02)
    fast_store.redis.rpush("test:go", 1, 1)
    outcomes = sorted(run.communicate(timeout=90)[0].decode().strip() for run in runs)
    assert outcomes == ["busy", "done"]
    job = fast_store.get_job(job_id)
    assert job is not None and job["state"] == "done" and job["attempts"] == 1
    assert result_writes[job_id] == 1
    assert iterations_of(fast_store.get_log(job_id)) == list(range(1, 16))


def test_an_execution_that_loses_its_lease_stops_without_writing(
    fast_store: JobStore, workers: Workers, result_writes: Counter[str]
) -> None:
    job_id = submit(fast_store, slow_replacement(10_000, checkpoint_s=0.2), enqueue=False)
    code = f"from service.task import run_job; print(run_job({job_id!r})['outcome'])"
    run = subprocess.Popen([sys.executable, "-c", code], cwd=REPO, env=workers.env, stdout=subprocess.PIPE)
    wait_for(fast_store, job_id, lambda j: (j["progress"] or {}).get("iteration", 0) >= 2, 60, "iterating")
    # Another execution takes over, as after a reaper requeue.
    fast_store.redis.set(fast_store.keys.lease(job_id), "the-new-owner", px=30_000)
    stolen = time.monotonic()
    log_length = fast_store.log_length(job_id)
    checkpoint = fast_store.load_checkpoint(job_id)
    assert run.communicate(timeout=30)[0].decode().strip() == "lease_lost"
    assert time.monotonic() - stolen < 5
    job = fast_store.get_job(job_id)
    assert job is not None and job["state"] == "running" and job["finished_at"] is None
    assert fast_store.log_length(job_id) == log_length
    assert fast_store.load_checkpoint(job_id) == checkpoint
    assert fast_store.get_result(job_id) is None and result_writes[job_id] == 0
    assert fast_store.redis.get(fast_store.keys.lease(job_id)) == b"the-new-owner"


def test_progress_reaches_redis_throttled_and_complete(fast_store: JobStore, monkeypatch) -> None:
    writes = []
    original = JobStore.write_log

    def counting_write_log(self, *args, **kwargs):
        writes.append(time.monotonic())
        return original(self, *args, **kwargs)

    monkeypatch.setattr(JobStore, "write_log", counting_write_log)
    job_id = submit(fast_store, slow_replacement(12), enqueue=False)
    started = time.monotonic()
    assert run_job(job_id)["outcome"] == "done"
    elapsed = time.monotonic() - started
    interval = fast_store.settings.progress_interval_s
    assert len(writes) <= elapsed / interval + 2
    assert all(b - a >= interval * 0.99 for a, b in zip(writes, writes[1:-1]))
    assert iterations_of(fast_store.get_log(job_id)) == list(range(1, 13))


def test_bad_documents_fail_with_their_field_errors(fast_store: JobStore) -> None:
    document = worn_machine()
    document["discount"] = 1.5
    job_id = submit(fast_store, document, enqueue=False)
    assert run_job(job_id)["outcome"] == "failed"
    job = fast_store.get_job(job_id)
    assert job is not None and job["state"] == "failed" and job["error"]["title"] == "invalid problem document"
    assert [e["path"] for e in job["error"]["errors"]] == ["discount"]


def test_warm_start_from_an_earlier_job(fast_store: JobStore) -> None:
    earlier = submit(fast_store, worn_machine(), enqueue=False)
    missing = worn_machine()
    missing["solver"]["initial"] = {"job": "0123456789abcdef"}
    missing_id = submit(fast_store, missing, enqueue=False)
    assert run_job(missing_id)["outcome"] == "failed"
    not_done = worn_machine()
    not_done["solver"]["initial"] = {"job": earlier}
    not_done_id = submit(fast_store, not_done, enqueue=False)
    assert run_job(not_done_id)["outcome"] == "failed"
    for failed_id, phrase in ((missing_id, "no job"), (not_done_id, "is queued")):
        error = fast_store.get_job(failed_id)["error"]
        assert error["errors"][0]["path"] == "solver.initial.job" and phrase in error["errors"][0]["message"]

    assert run_job(earlier)["outcome"] == "done"
    warm_id = submit(fast_store, not_done, enqueue=False)
    assert run_job(warm_id)["outcome"] == "done"
    cold, warm = fast_store.get_result(earlier), fast_store.get_result(warm_id)
    assert warm["iterations"] < cold["iterations"]
    assert np.allclose(warm["value"], cold["value"], atol=cold["error_bound"] + warm["error_bound"])


def test_run_job_writes_nothing_while_another_execution_holds_the_lease(fast_store: JobStore) -> None:
    job_id = submit(fast_store, worn_machine(), enqueue=False)
    assert fast_store.claim(job_id, "someone-else", worker="elsewhere:1") == "ok"
    assert run_job(job_id) == {"job": job_id, "outcome": "busy"}
    job = fast_store.get_job(job_id)
    assert job is not None and job["attempts"] == 1 and job["progress"] is None
    assert run_job("not-a-job-id")["outcome"] == "missing"


def test_checkpoint_state_round_trips() -> None:
    state = {
        "fingerprint": "abc", "method": "howard", "iteration": 7, "evaluation_steps": 350,
        "value": np.linspace(-1.0, 2.0, 11), "policy": np.arange(11, dtype=np.int64), "sweeps_done": None,
        "log": [{"iteration": i, "distance": 0.5**i, "error_bound": 2.0 * 0.5**i} for i in range(1, 8)],
    }  # fmt: skip
    back = decode_checkpoint(encode_checkpoint(state))
    assert back.keys() == state.keys()
    np.testing.assert_array_equal(back["value"], state["value"])
    assert back["policy"].dtype == np.int64 and back["log"] == state["log"] and back["iteration"] == 7
    assert decode_checkpoint(encode_checkpoint({**state, "policy": None}))["policy"] is None


def _abandon(store: JobStore, job_id: str, *, attempts: int = 1) -> None:
    """Make ``job_id`` look like its worker died mid-solve: running, lease lapsed."""
    store.redis.lrem(rq_queues.queue_key("normal"), 0, f"{job_id}-1")
    assert store.claim(job_id, "dead-execution", worker="gone:1") == "ok"
    store.redis.hset(store.keys.job(job_id), "attempts", attempts)
    store.redis.delete(store.keys.lease(job_id))


def test_reaper_requeues_a_job_whose_lease_lapsed(fast_store: JobStore) -> None:
    job_id = submit(fast_store, worn_machine())
    _abandon(fast_store, job_id)
    report = reap(fast_store, use_lock=False)
    assert report["requeued"] == [job_id]
    job = fast_store.get_job(job_id)
    assert job is not None and job["state"] == "queued" and job["attempts"] == 1
    assert fast_store.redis.lrange(rq_queues.queue_key("normal"), 0, -1) == [f"{job_id}-2".encode()]
    assert reap(fast_store, use_lock=False) == {"requeued": [], "rescued": [], "failed": [], "canceled": []}
    assert run_job(job_id)["outcome"] == "done"
    assert fast_store.get_job(job_id)["attempts"] == 2


def test_racing_reapers_enqueue_once(fast_store: JobStore) -> None:
    job_id = submit(fast_store, worn_machine())
    _abandon(fast_store, job_id)
    barrier = threading.Barrier(4)
    reports = []

    def one_pass() -> None:
        barrier.wait()
        reports.append(reap(JobStore(redis.Redis.from_url(fast_store.settings.redis_url), fast_store.settings),
                            use_lock=False))  # fmt: skip

    threads = [threading.Thread(target=one_pass) for _ in range(4)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert sum(len(r["requeued"]) for r in reports) == 1
    assert fast_store.queue_depths()["normal"] == 1
    other = submit(fast_store, worn_machine())
    _abandon(fast_store, other)
    # Another reaper's pass a moment ago holds the pass lock: this one does nothing.
    fast_store.redis.set(fast_store.keys.reaper_lock, "another-reaper", px=5000)
    assert reap(fast_store)["requeued"] == []
    fast_store.redis.delete(fast_store.keys.reaper_lock)
    assert reap(fast_store)["requeued"] == [other]


def test_reaper_gives_up_after_max_attempts(fast_store: JobStore) -> None:
    job_id = submit(fast_store, worn_machine())
    _abandon(fast_store, job_id, attempts=fast_store.settings.max_attempts)
    assert reap(fast_store, use_lock=False)["failed"] == [job_id]
    job = fast_store.get_job(job_id)
    assert job is not None and job["state"] == "failed" and job["error"]["title"] == "job abandoned"
    assert f"max_attempts is {fast_store.settings.max_attempts}" in job["error"]["detail"]
    assert fast_store.queue_depths()["normal"] == 0


def test_reaper_cancels_an_abandoned_job_with_a_cancel_request(fast_store: JobStore) -> None:
    job_id = submit(fast_store, worn_machine())
    _abandon(fast_store, job_id)
    assert fast_store.request_cancel(job_id)["outcome"] == "cancel_requested"
    assert reap(fast_store, use_lock=False)["canceled"] == [job_id]
    assert fast_store.get_job(job_id)["state"] == "canceled"


def test_reaper_rescues_a_lost_enqueue_after_the_grace_period(fast_store: JobStore) -> None:
    lost = submit(fast_store, worn_machine(), enqueue=False)
    fresh = submit(fast_store, worn_machine(), enqueue=False)
    waiting = submit(fast_store, worn_machine())
    long_ago_ms = (time.time() - 10 * fast_store.settings.lease_s) * 1000
    for job_id in (lost, waiting):
        fast_store.redis.hset(fast_store.keys.job(job_id), "enqueued_at", long_ago_ms)
    assert reap(fast_store, use_lock=False)["rescued"] == [lost]
    queued = fast_store.redis.lrange(rq_queues.queue_key("normal"), 0, -1)
    assert sorted(queued) == sorted([f"{waiting}-1".encode(), f"{lost}-2".encode()])
    assert fast_store.get_job(fresh)["state"] == "queued"
