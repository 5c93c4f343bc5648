"""Redis holds a bounded amount per job: finished jobs and sweeps expire, logs stay bounded, a full Redis is a 503."""

from __future__ import annotations

import threading
import time
from collections.abc import Iterator

import httpx
import pytest
import redis

from service import sweeps
from service.app import create_app
from service.embedded_redis import EmbeddedRedis
from service.execution import Execution
from service.reaper import reap
from service.resubmission import SolvedJobs
from service.settings import Settings, get_settings
from service.store import JobStore
from service.task import run_job
from tests._documents import print_shop
from tests.service._http import assert_problem, make_client, run_inline
from worker.convergence_log import KEEP_FIRST, KEEP_LATEST, KEEP_SAMPLED, kept

JOB_TTL_S = 1000


@pytest.fixture
def short_store(redis_client: redis.Redis, settings: Settings) -> JobStore:
    return JobStore(redis_client, settings.model_copy(update={"job_ttl_s": JOB_TTL_S, "result_ttl_s": 500}))


def new_job(store: JobStore, owner: str = "lab") -> str:
    return store.create_job(print_shop(), owner=owner, estimate={}, document_hash="h", enqueue=False)["id"]


def lifetimes(store: JobStore, job_id: str) -> dict[str, int]:
    keys = {"job": store.keys.job(job_id), "doc": store.keys.doc(job_id), "log": store.keys.log(job_id)}
    return {name: store.redis.ttl(key) for name, key in keys.items()}


def assert_expiring(store: JobStore, job_id: str) -> None:
    """Record and document expire within job_ttl_s; so does the log, where there is one."""
    for name, ttl in lifetimes(store, job_id).items():
        if name == "log" and ttl == -2:
            continue
        assert JOB_TTL_S - 5 < ttl <= JOB_TTL_S, (name, ttl)


def test_active_jobs_never_expire(short_store: JobStore) -> None:
    job_id = new_job(short_store)
    assert short_store.redis.ttl(short_store.keys.job(job_id)) == -1
    assert short_store.redis.ttl(short_store.keys.doc(job_id)) == -1
    assert short_store.claim(job_id, "t", worker="w") == "ok"
    assert short_store.write_log(job_id, "t", [{"iteration": 1, "distance": 1.0}], progress=None)
    assert lifetimes(short_store, job_id) == {"job": -1, "doc": -1, "log": -1}


def test_done_jobs_expire_and_their_result_keeps_result_ttl(short_store: JobStore) -> None:
    job_id = new_job(short_store)
    short_store.claim(job_id, "t", worker="w")
    short_store.write_log(job_id, "t", [{"iteration": 1, "distance": 1.0}], progress=None)
    assert short_store.finish(job_id, "t", "done", result={"status": "converged", "iterations": 1})
    assert_expiring(short_store, job_id)
    assert 495 < short_store.redis.ttl(short_store.keys.result(job_id)) <= 500


def test_failed_jobs_expire(short_store: JobStore) -> None:
    job_id = new_job(short_store)
    short_store.claim(job_id, "t", worker="w")
    assert short_store.finish(job_id, "t", "failed", error={"title": "x", "detail": "y", "errors": []})
    assert_expiring(short_store, job_id)


def test_jobs_abandoned_too_often_expire(short_store: JobStore) -> None:
    store = JobStore(short_store.redis, short_store.settings.model_copy(update={"max_attempts": 1}))
    job_id = new_job(store)
    store.claim(job_id, "t", worker="w")
    store.redis.delete(store.keys.lease(job_id))
    assert store.requeue_abandoned(job_id)[0] == "failed"
    assert_expiring(store, job_id)


def test_canceled_jobs_expire_queued_running_and_at_claim(short_store: JobStore) -> None:
    queued = new_job(short_store)
    assert short_store.request_cancel(queued)["outcome"] == "canceled"
    assert_expiring(short_store, queued)

    running = new_job(short_store)
    short_store.claim(running, "t", worker="w")
    assert short_store.request_cancel(running)["outcome"] == "cancel_requested"
    assert short_store.finish(running, "t", "canceled")
    assert_expiring(short_store, running)

    flagged = new_job(short_store)
    short_store.claim(flagged, "t", worker="w")
    short_store.request_cancel(flagged)
    short_store.redis.delete(short_store.keys.lease(flagged))
    assert short_store.claim(flagged, "u", worker="w") == "canceled"
    assert_expiring(short_store, flagged)

    abandoned = new_job(short_store)
    short_store.claim(abandoned, "t", worker="w")
    short_store.request_cancel(abandoned)
    short_store.redis.delete(short_store.keys.lease(abandoned))
    assert short_store.requeue_abandoned(abandoned)[0] == "canceled"
    assert_expiring(short_store, abandoned)


def test_a_reused_job_expires_and_keeps_the_count_of_dropped_log_entries(short_store: JobStore) -> None:
    store = short_store
    earlier = new_job(store)
    store.claim(earlier, "t", worker="w")
    last = KEEP_FIRST + 2 * KEEP_SAMPLED
    store.write_log(earlier, "t", [{"iteration": i, "distance": 1.0} for i in range(1, last + 1)], progress=None)
    store.finish(earlier, "t", "done", result={"status": "max_iterations", "iterations": last})
    reused, made = SolvedJobs(store).create_reused(print_shop(), earlier, owner="lab", estimate={}, document_hash="h")
    assert made and reused["state"] == "done"
    assert store.log_dropped(reused["id"]) == store.log_dropped(earlier) > 0
    assert store.get_log(reused["id"], limit=10_000) == store.get_log(earlier, limit=10_000)
    assert_expiring(store, reused["id"])


def expire_now(store: JobStore, job_id: str) -> None:
    """Let a finished job's record, document and log lapse as their TTL would."""
    for key in (store.keys.job(job_id), store.keys.doc(job_id), store.keys.log(job_id)):
        store.redis.pexpire(key, 1)
    time.sleep(0.01)


def test_forget_expired_drops_expired_jobs_from_listings_and_state_sets(short_store: JobStore) -> None:
    store = short_store
    gone, kept_done, running = new_job(store, "ann"), new_job(store, "ann"), new_job(store, "bo")
    for job_id in (gone, kept_done):
        store.claim(job_id, "t", worker="w")
        store.finish(job_id, "t", "done", result={"status": "converged", "iterations": 1})
    store.claim(running, "t", worker="w")
    expire_now(store, gone)

    assert store.forget_expired() == []  # submitted less than job_ttl_s ago: not examined
    assert store.forget_expired(now=time.time() + JOB_TTL_S + 1) == [gone]
    assert store.redis.zscore(store.keys.jobs, gone) is None
    assert store.redis.zscore(store.keys.owner_jobs("ann"), gone) is None
    assert store.job_ids_in_state("done") == [kept_done]
    assert store.counts_by_state()["done"] == 1
    assert store.job_ids_in_state("running") == [running]
    assert {r["id"] for r in store.list_jobs()[0]} == {kept_done, running}


def test_the_reaper_pass_forgets_expired_jobs(redis_client: redis.Redis, settings: Settings) -> None:
    store = JobStore(redis_client, settings.model_copy(update={"job_ttl_s": 1}))
    job_id = new_job(store)
    store.claim(job_id, "t", worker="w")
    store.finish(job_id, "t", "canceled")
    time.sleep(1.1)  # submitted job_ttl_s ago, and its record has lapsed by itself
    assert not store.redis.exists(store.keys.job(job_id), store.keys.doc(job_id))
    assert store.counts_by_state()["canceled"] == 1
    reap(store, use_lock=False)
    assert store.counts_by_state()["canceled"] == 0
    assert store.redis.zcard(store.keys.jobs) == store.redis.zcard(store.keys.owner_jobs("lab")) == 0


def test_listing_tidies_members_whose_record_expired(short_store: JobStore) -> None:
    store = short_store
    gone, other = new_job(store, "cy"), new_job(store, "cy")
    store.claim(gone, "t", worker="w")
    store.finish(gone, "t", "failed", error={"title": "x", "detail": "y", "errors": []})
    expire_now(store, gone)
    assert [r["id"] for r in store.list_jobs(owner="cy")[0]] == [other]
    assert store.redis.zrange(store.keys.owner_jobs("cy"), 0, -1) == [other.encode()]
    assert [r["id"] for r in store.list_jobs()[0]] == [other]
    assert store.redis.zrange(store.keys.jobs, 0, -1) == [other.encode()]
    assert store.job_ids_in_state("failed") == []


def test_a_sweep_and_its_keys_go_with_its_last_job(app_settings: Settings, redis_client: redis.Redis) -> None:
    settings = app_settings.model_copy(update={"job_ttl_s": JOB_TTL_S})
    store = JobStore(redis_client, settings)
    with make_client(create_app(settings)) as http:
        response = http.post("/v1/sweeps", json={"base": print_shop(), "vary": {"discount": [0.8, 0.9]}})
        assert response.status_code == 202, response.text
        sweep_id = response.json()["id"]
        rows = http.get(f"/v1/sweeps/{sweep_id}").json()["rows"]["data"]
        job_ids = [row["job"] for row in rows]
        for job_id in job_ids:
            assert run_inline(job_id)["outcome"] == "done"
        sweeps.rescue_pending(store)
        later = time.time() + JOB_TTL_S + 1
        assert sweeps.forget_expired_sweeps(store, now=later) == []  # its jobs are still there
        expire_now(store, job_ids[0])
        assert sweeps.forget_expired_sweeps(store, now=later) == []  # one job is left
        expire_now(store, job_ids[1])
        assert sweeps.forget_expired_sweeps(store, now=later) == [sweep_id]
        assert http.get(f"/v1/sweeps/{sweep_id}").status_code == 404
        assert http.get("/v1/sweeps").json()["data"] == []
    left = [key for key in redis_client.scan_iter(match=f"{settings.redis_prefix}:sweep*")]
    assert left == []


def test_the_stored_log_is_bounded_sampled_and_counts_what_it_dropped(store: JobStore) -> None:
    job_id = new_job(store)
    store.claim(job_id, "t", worker="w")
    last = KEEP_FIRST + 6 * KEEP_SAMPLED + 7
    for start in range(1, last + 1, 777):  # uneven batches, as the throttled writes make them
        batch = [{"iteration": i, "distance": 0.5**i} for i in range(start, min(start + 777, last + 1))]
        assert store.write_log(job_id, "t", batch, progress=None)
    iterations = [entry["iteration"] for entry in store.get_log(job_id, limit=10_000)]
    assert iterations == [i for i in range(1, last + 1) if kept(i, last)]
    assert len(iterations) <= KEEP_FIRST + KEEP_SAMPLED + KEEP_LATEST
    assert iterations[:KEEP_FIRST] == list(range(1, KEEP_FIRST + 1))
    assert iterations[-KEEP_LATEST:] == list(range(last - KEEP_LATEST + 1, last + 1))
    assert store.log_dropped(job_id) == last - len(iterations) > 0


def test_a_trimmed_bounded_log_regrows_with_each_iteration_once_in_order(store: JobStore) -> None:
    job_id = new_job(store)
    store.claim(job_id, "t", worker="w")
    entries = [{"iteration": i, "distance": 1.0 / i} for i in range(1, 4001)]
    store.write_log(job_id, "t", entries, progress=None)
    # The solver went back to iteration 3000 (resumed from an older checkpoint) and goes on.
    store.write_log(job_id, "t", entries[2999:3500], progress=None, trim_from=3000)
    more = [{"iteration": i, "distance": 1.0 / i} for i in range(3501, 9001)]
    store.write_log(job_id, "t", more, progress=None)
    iterations = [entry["iteration"] for entry in store.get_log(job_id, limit=10_000)]
    assert iterations == sorted(set(iterations))
    assert iterations == [i for i in range(1, 9001) if kept(i, 9000)]
    assert store.log_dropped(job_id) == 9000 - len(iterations)
    # A checkpoint's log replaces the stored one whole.
    store.write_log(job_id, "t", entries[:50], progress=None, trim_from=-1)
    assert [e["iteration"] for e in store.get_log(job_id)] == list(range(1, 51))
    assert store.log_dropped(job_id) == 0


@pytest.fixture
def small_redis(tmp_path) -> Iterator[redis.Redis]:
    """A Redis of our own that is full: maxmemory a little above what it uses, noeviction."""
    with EmbeddedRedis(tmp_path / "small") as server:
        client = redis.Redis.from_url(server.url)
        try:
            client.config_set("maxmemory-policy", "noeviction")
            client.config_set("maxmemory", client.info("memory")["used_memory"] + 100_000)
            with pytest.raises(redis.exceptions.OutOfMemoryError):
                for i in range(1000):
                    client.set(f"filler:{i}", b"x" * 1000)
            yield client
        finally:
            client.close()


def test_a_submission_to_a_full_redis_is_503_saying_so(small_redis: redis.Redis) -> None:
    url = "redis://{host}:{port}/0".format(**small_redis.connection_pool.connection_kwargs)
    settings = Settings(redis_url=url, auth=False)
    with make_client(create_app(settings)) as http:
        response = http.post("/v1/jobs", json=print_shop())
        body = assert_problem(response, 503)
        assert body["type"] == "urn:fixq:problem:redis-full"
        assert "full" in body["detail"] and "maxmemory" in body["detail"]
        assert response.headers["retry-after"]
        assert list(small_redis.scan_iter(match="fixq:job:*")) == []
        sweep = http.post("/v1/sweeps", json={"base": print_shop(), "vary": {"discount": [0.8, 0.9]}})
        assert assert_problem(sweep, 503)["type"] == "urn:fixq:problem:redis-full"
        assert http.get("/healthz").status_code == 200
        assert http.get("/metrics").status_code == 200
        assert http.get("/v1/jobs").status_code == 200


def test_a_script_refused_by_a_full_redis_raises_out_of_memory(small_redis: redis.Redis) -> None:
    store = JobStore(small_redis, Settings(redis_url="redis://unused"))
    with pytest.raises(redis.exceptions.OutOfMemoryError):
        store.create_job(print_shop(), owner="lab", estimate={}, document_hash="h", enqueue=False)


def test_a_worker_rides_through_a_full_redis_and_writes_its_result_once_there_is_room(
    tmp_path, monkeypatch: pytest.MonkeyPatch
) -> None:
    refused = threading.Event()
    retrying = Execution._retrying

    def watched_retrying(self: Execution, write):
        # The final writes (the last log entries, then the result) go through _retrying: note a refusal of either.
        def watched():
            try:
                return write()
            except redis.exceptions.ResponseError as exc:
                if "OOM" in str(exc):
                    refused.set()
                raise

        return retrying(self, watched)

    monkeypatch.setattr(Execution, "_retrying", watched_retrying)
    with EmbeddedRedis(tmp_path / "full") as server:
        monkeypatch.setenv("FIXQ_REDIS_URL", server.url)
        get_settings.cache_clear()
        client = redis.Redis.from_url(server.url)
        stop = threading.Event()
        outcome: dict = {}
        try:
            store = JobStore(client, get_settings())
            document = print_shop()
            document["solver"] = {"method": "value_iteration", "tolerance": 1e-300, "max_iterations": 40_000}
            job_id = store.create_job(document, owner="lab", estimate={}, document_hash="h", enqueue=False)["id"]
            client.config_set("maxmemory-policy", "noeviction")

            def keep_full() -> None:
                while store.get_job(job_id)["state"] == "queued":
                    time.sleep(0.001)
                client.config_set("maxmemory", client.info("memory")["used_memory"] + 20_000)
                n = 0
                while not stop.is_set():
                    try:
                        client.set(f"filler:{n}", b"x" * 200)
                        n += 1
                    except redis.exceptions.OutOfMemoryError:
                        time.sleep(0.002)

            filler = threading.Thread(target=keep_full)
            execution = threading.Thread(target=lambda: outcome.update(run_job(job_id)))
            filler.start()
            execution.start()
            # The solve ends while Redis is full: its final writes are refused, and retried.
            assert refused.wait(60)
            time.sleep(0.5)
            assert execution.is_alive() and store.get_job(job_id)["state"] == "running"
        finally:
            stop.set()
            client.config_set("maxmemory", 0)
            for thread in (filler, execution):
                thread.join(60)
            client.close()
            get_settings.cache_clear()
    assert outcome["outcome"] == "done"


def test_log_entries_held_back_while_redis_refuses_them_stay_bounded(
    store: JobStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    # A write tried with every iteration, under a lease that outlasts the test.
    store = JobStore(store.redis, store.settings.model_copy(update={"progress_interval_s": 0.0, "lease_s": 600.0}))
    job_id = new_job(store)
    execution = Execution(store, job_id)
    assert store.claim(job_id, execution.token, worker="w") == "ok"
    write_log = JobStore.write_log

    def full(*args, **kwargs):
        raise redis.exceptions.OutOfMemoryError("OOM command not allowed when used memory > 'maxmemory'.")

    monkeypatch.setattr(JobStore, "write_log", full)
    last = KEEP_FIRST + 3 * KEEP_SAMPLED
    for i in range(1, last + 1):
        execution.on_progress({"iteration": i, "distance": 1.0})
    assert len(execution._buffer) <= KEEP_FIRST + KEEP_SAMPLED + KEEP_LATEST
    monkeypatch.setattr(JobStore, "write_log", write_log)
    execution.flush()
    assert [e["iteration"] for e in store.get_log(job_id, limit=10_000)] == [
        i for i in range(1, last + 1) if kept(i, last)
    ]


def test_the_log_endpoint_reports_dropped_entries(client: httpx.Client, store: JobStore) -> None:
    job_id = new_job(store, owner="anonymous")
    store.claim(job_id, "t", worker="w")
    last = KEEP_FIRST + 3 * KEEP_SAMPLED
    store.write_log(job_id, "t", [{"iteration": i, "distance": 1.0} for i in range(1, last + 1)], progress=None)
    store.finish(job_id, "t", "canceled")
    page = client.get(f"/v1/jobs/{job_id}/log", params={"limit": 10})
    assert page.status_code == 200, page.text
    assert page.json()["dropped"] == last - store.log_length(job_id) > 0
    stream = client.get(f"/v1/jobs/{job_id}/log", headers={"Accept": "text/event-stream"})
    ids = [int(line[4:]) for line in stream.text.splitlines() if line.startswith("id: ")]
    assert ids == [e["iteration"] for e in store.get_log(job_id, limit=10_000)]


def test_a_live_log_misses_nothing_while_the_stored_log_is_thinned(app_settings: Settings, store: JobStore) -> None:
    job_id = new_job(store, owner="anonymous")
    store.claim(job_id, "t", worker="w")
    last = KEEP_FIRST + 4 * KEEP_SAMPLED + 333

    def solver() -> None:
        for start in range(1, last + 1, 97):
            batch = [{"iteration": i, "distance": 1.0} for i in range(start, min(start + 97, last + 1))]
            store.write_log(job_id, "t", batch, progress=None)
            time.sleep(0.002)
        store.finish(job_id, "t", "canceled")

    writer = threading.Thread(target=solver)
    with make_client(create_app(app_settings.model_copy(update={"sse_poll_s": 0.001}))) as http:
        writer.start()
        try:
            stream = http.get(f"/v1/jobs/{job_id}/log", headers={"Accept": "text/event-stream"})
        finally:
            writer.join()
    ids = [int(line[4:]) for line in stream.text.splitlines() if line.startswith("id: ")]
    assert ids == sorted(set(ids))
    assert set(ids) >= {e["iteration"] for e in store.get_log(job_id, limit=10_000)}
    assert ids[-1] == last


def test_a_stream_resumed_past_the_end_of_a_thinned_log_still_sends_its_tail(client: httpx.Client,
                                                                             store: JobStore) -> None:
    # A client that followed a long solve reconnects (the API restarted) with the last iteration it saw as
    # Last-Event-ID; the job ended meanwhile, and its bounded log holds far fewer entries than that iteration.
    job_id = new_job(store, owner="anonymous")
    store.claim(job_id, "t", worker="w")
    last = KEEP_FIRST + 4 * KEEP_SAMPLED + 333
    store.write_log(job_id, "t", [{"iteration": i, "distance": 1.0} for i in range(1, last + 1)], progress=None)
    store.finish(job_id, "t", "canceled")
    kept = [e["iteration"] for e in store.get_log(job_id, limit=10_000)]
    seen = kept[-3] - 1  # the client saw up to here: beyond the stored log's length, before its last entries
    assert seen > store.log_length(job_id)
    stream = client.get(f"/v1/jobs/{job_id}/log", headers={"Accept": "text/event-stream", "Last-Event-ID": str(seen)})
    ids = [int(line[4:]) for line in stream.text.splitlines() if line.startswith("id: ")]
    assert ids == [i for i in kept if i > seen] and ids[-1] == last
    assert "event: end" in stream.text
