"""The job data model in Redis (service.store) on a private Redis server."""

from __future__ import annotations

import math
import types

import pytest
import redis
import redis.backoff
import redis.retry

import service.store.jobs as store_module
from service import queue as rq_queues
from service.embedded_redis import EmbeddedRedis, free_port
from service.settings import Settings
from service.store import JobStore
from tests._documents import tiny_tabular

RECORD_KEYS = {
    "id", "state", "label", "tags", "owner", "priority", "submitted_at", "started_at", "finished_at",
    "attempts", "progress", "estimate", "status", "iterations", "error_bound", "search", "error", "links",
}  # fmt: skip


def document(label: str = "plant expansion, base case (invented)", tags: list[str] | None = None, **extra) -> dict:
    return tiny_tabular(label=label, tags=["nightly"] if tags is None else tags, **extra)


def create(store: JobStore, owner: str = "alice", **kwargs) -> dict:
    doc_kwargs = {k: kwargs.pop(k) for k in ("label", "tags") if k in kwargs}
    return store.create_job(
        document(**doc_kwargs), owner=owner, estimate={"states": 2, "bytes": 64}, document_hash="abc", **kwargs
    )


def fake_clock(monkeypatch: pytest.MonkeyPatch, times: list[float]) -> None:
    """Submission times (seconds) for the next jobs, read by the store only."""
    clock = iter(times)
    monkeypatch.setattr(store_module, "time", types.SimpleNamespace(time=lambda: next(clock)))


def test_create_then_get_round_trips(store: JobStore, redis_client: redis.Redis) -> None:
    raw = document(priority="high")
    record = store.create_job(raw, owner="alice", estimate={"states": 2}, document_hash="h1")
    assert set(record) == RECORD_KEYS
    assert len(record["id"]) == 16 and int(record["id"], 16) >= 0
    assert record["state"] == "queued"
    assert record["label"] == raw["label"] and record["tags"] == ["nightly"]
    assert (record["owner"], record["priority"], record["attempts"]) == ("alice", "high", 0)
    assert record["submitted_at"].endswith("Z") and record["started_at"] is None and record["finished_at"] is None
    assert record["progress"] is None and record["error"] is None and record["estimate"] == {"states": 2}
    assert record["links"]["result"] == f"/v1/jobs/{record['id']}/result"
    assert store.get_job(record["id"]) == record
    assert store.get_document(record["id"]) == raw
    assert store.counts_by_state() == {"queued": 1, "running": 0, "done": 0, "failed": 0, "canceled": 0}
    assert store.queue_depths() == {"high": 1, "normal": 0, "low": 0}
    assert redis_client.lrange(rq_queues.queue_key("high"), 0, -1) == [f"{record['id']}-1".encode()]


def test_priority_argument_wins_and_is_checked(store: JobStore) -> None:
    assert create(store, priority="low")["priority"] == "low"
    assert create(store)["priority"] == "normal"
    with pytest.raises(ValueError, match="unknown priority"):
        create(store, priority="urgent")


def test_malformed_ids_never_reach_redis(settings: Settings) -> None:
    no_retry = redis.retry.Retry(redis.backoff.NoBackoff(), 0)
    dead = JobStore(redis.Redis(port=free_port(), socket_connect_timeout=0.2, retry=no_retry), settings)
    for bad in ("", "XYZ", "0123456789ABCDEF", "0123456789abcde", "../../etc", "0123456789abcdef0"):
        assert dead.get_job(bad) is None
        assert dead.get_result(bad) is None
        assert dead.get_document(bad) is None
        assert dead.get_log(bad) == []
        assert dead.request_cancel(bad) is None
    assert dead.ping() is False


def test_unknown_well_formed_id_is_none(store: JobStore) -> None:
    assert store.get_job("0123456789abcdef") is None
    assert store.request_cancel("0123456789abcdef") is None
    assert store.ping() is True


def test_idempotency_key_returns_the_earlier_job(store: JobStore) -> None:
    first = create(store, idempotency_key="nightly-2024-05-01")
    again = create(store, idempotency_key="nightly-2024-05-01")
    other_owner = create(store, owner="bob", idempotency_key="nightly-2024-05-01")
    assert again == first
    assert other_owner["id"] != first["id"]
    assert store.counts_by_state()["queued"] == 2


def test_list_is_newest_first_and_pages_cover_everything_once(store: JobStore, monkeypatch) -> None:
    # Several jobs share a millisecond (as a sweep's do), to exercise the cursor's tie-break.
    fake_clock(monkeypatch, [1000.0, 1000.0, 1001.0, 1001.0, 1001.0, 1002.0, 1003.0, 1003.0, 1004.0, 1005.0])
    created = [create(store)["id"] for _ in range(10)]
    everything, next_cursor = store.list_jobs(limit=100)
    assert next_cursor is None
    assert [r["id"] for r in everything] == [m.decode() for m in store.redis.zrevrange(store.keys.jobs, 0, -1)]
    assert set(r["id"] for r in everything) == set(created)
    assert everything[0]["id"] == created[-1] and everything[-1]["id"] in created[:2]
    paged, cursor, pages = [], None, 0
    while True:
        page, cursor = store.list_jobs(limit=3, cursor=cursor)
        paged += [r["id"] for r in page]
        pages += 1
        if cursor is None:
            break
    assert paged == [r["id"] for r in everything]
    assert pages == 4


def test_list_filters(store: JobStore) -> None:
    a = create(store, owner="alice", label="fishery (invented)", tags=["nightly", "fish"])
    b = create(store, owner="alice", label="household (invented)", tags=["adhoc"])
    c = create(store, owner="bob", label="fishery (invented)", tags=["fish"])
    store.request_cancel(b["id"])

    def ids(**filters) -> set[str]:
        records, cursor = store.list_jobs(**filters)
        assert cursor is None
        return {r["id"] for r in records}

    assert ids() == {a["id"], b["id"], c["id"]}
    assert ids(owner="alice") == {a["id"], b["id"]}
    assert ids(owner="carol") == set()
    assert ids(state="canceled") == {b["id"]}
    assert ids(state=["queued", "canceled"], owner="bob") == {c["id"]}
    assert ids(tag="fish") == {a["id"], c["id"]}
    assert ids(tag="fish", owner="alice") == {a["id"]}
    assert ids(label="fishery (invented)") == {a["id"], c["id"]}
    assert ids(label="fishery") == set()
    with pytest.raises(ValueError, match="unknown state"):
        store.list_jobs(state="finished")
    with pytest.raises(ValueError, match="malformed cursor"):
        store.list_jobs(cursor="not-a-cursor")


def test_list_stops_scanning_and_hands_back_a_cursor(store: JobStore, monkeypatch) -> None:
    monkeypatch.setattr(store_module, "LIST_SCAN_LIMIT", 3)
    wanted = create(store, tags=["rare"])
    for _ in range(7):
        create(store, tags=["common"])
    found, cursor, calls = [], None, 0
    while True:
        page, cursor = store.list_jobs(tag="rare", cursor=cursor)
        found += page
        calls += 1
        if cursor is None:
            break
    assert [r["id"] for r in found] == [wanted["id"]]
    assert calls >= 3


def test_cancel_of_a_queued_job_removes_it_from_its_queue(store: JobStore, redis_client: redis.Redis) -> None:
    record = create(store)
    reply = store.request_cancel(record["id"])
    assert reply is not None and reply["outcome"] == "canceled"
    assert reply["job"]["state"] == "canceled" and reply["job"]["finished_at"] is not None
    assert store.queue_depths()["normal"] == 0
    assert not redis_client.exists(rq_queues.rq_job_key(f"{record['id']}-1"))
    assert store.counts_by_state()["canceled"] == 1 and store.counts_by_state()["queued"] == 0
    again = store.request_cancel(record["id"])
    assert again is not None and again["outcome"] == "unchanged"


def test_cancel_of_a_running_job_sets_the_flag(store: JobStore) -> None:
    record = create(store)
    assert store.claim(record["id"], "token-a", worker="test:1") == "ok"
    reply = store.request_cancel(record["id"])
    assert reply is not None and reply["outcome"] == "cancel_requested" and reply["job"]["state"] == "running"
    assert store.stop_signals(record["id"], "token-a") == (True, True)
    assert store.finish(record["id"], "token-a", "canceled", iterations=3)
    job = store.get_job(record["id"])
    assert job is not None and (job["state"], job["iterations"]) == ("canceled", 3)
    assert store.stop_signals(record["id"], "token-a") == (False, False)


def test_claim_takes_the_lease_and_fences_everyone_else(store: JobStore) -> None:
    job_id = create(store)["id"]
    assert store.claim(job_id, "token-a", worker="host:1") == "ok"
    assert store.claim(job_id, "token-b", worker="host:2") == "busy"
    job = store.get_job(job_id)
    assert job is not None and (job["state"], job["attempts"]) == ("running", 1) and job["started_at"]
    assert store.renew_lease(job_id, "token-a") and not store.renew_lease(job_id, "token-b")
    assert not store.write_log(job_id, "token-b", [{"iteration": 1}], progress={"iteration": 1})
    assert store.get_log(job_id) == [] and store.get_job(job_id)["progress"] is None
    assert store.save_checkpoint(job_id, "token-b", 1, b"x") == "lease_lost"
    assert store.load_checkpoint(job_id) is None
    assert not store.finish(job_id, "token-b", "done", result={"status": "converged", "iterations": 1})
    assert store.get_result(job_id) is None and store.get_job(job_id)["state"] == "running"
    assert store.counts_by_state()["running"] == 1


def test_claim_of_finished_missing_or_canceled_jobs(store: JobStore) -> None:
    assert store.claim("0123456789abcdef", "t", worker="w") == "missing"
    done = create(store)["id"]
    assert store.claim(done, "t1", worker="w") == "ok"
    assert store.finish(done, "t1", "failed", error={"title": "x", "detail": "y", "errors": []})
    assert store.claim(done, "t2", worker="w") == "terminal"
    pending = create(store)["id"]
    store.redis.set(store.keys.cancel(pending), "1")
    assert store.claim(pending, "t3", worker="w") == "canceled"
    job = store.get_job(pending)
    assert job is not None and job["state"] == "canceled" and job["attempts"] == 0
    assert not store.redis.exists(store.keys.lease(pending))


def test_checkpoints_only_move_forward(store: JobStore) -> None:
    job_id = create(store)["id"]
    store.claim(job_id, "tok", worker="w")
    assert store.save_checkpoint(job_id, "tok", 5, b"five") == "saved"
    assert store.save_checkpoint(job_id, "tok", 3, b"three") == "stale"
    assert store.load_checkpoint(job_id) == (5, b"five")
    assert store.save_checkpoint(job_id, "tok", 5, b"five again") == "saved"
    assert store.save_checkpoint(job_id, "tok", 12, b"twelve\n\x00binary") == "saved"
    assert store.load_checkpoint(job_id) == (12, b"twelve\n\x00binary")
    ttl = store.redis.pttl(store.keys.checkpoint(job_id)) / 1000
    assert store.settings.checkpoint_ttl_s - 5 < ttl <= store.settings.checkpoint_ttl_s


def test_write_log_appends_trims_and_replaces(store: JobStore) -> None:
    job_id = create(store)["id"]
    store.claim(job_id, "tok", worker="w")
    entries = [{"iteration": i, "distance": 1.0 / i} for i in range(1, 6)]
    assert store.write_log(job_id, "tok", entries, progress={"iteration": 5})
    assert store.last_logged_iteration(job_id) == 5
    redo = [{"iteration": 3, "distance": 0.3}, {"iteration": 4, "distance": 0.2}]
    assert store.write_log(job_id, "tok", redo, progress={"iteration": 4}, trim_from=3)
    assert [e["iteration"] for e in store.get_log(job_id)] == [1, 2, 3, 4]
    assert store.get_log(job_id)[2]["distance"] == 0.3
    assert store.get_log(job_id, start=1, limit=2) == store.get_log(job_id)[1:3]
    assert store.log_length(job_id) == 4
    assert store.get_job(job_id)["progress"] == {"iteration": 4}
    assert store.write_log(job_id, "tok", entries[:2], progress=None, trim_from=-1)
    assert [e["iteration"] for e in store.get_log(job_id)] == [1, 2]


def test_finish_done_stores_the_result_once_with_its_ttl(store: JobStore) -> None:
    job_id = create(store)["id"]
    store.claim(job_id, "tok", worker="w")
    store.save_checkpoint(job_id, "tok", 1, b"c")
    result = {"status": "converged", "iterations": 28, "error_bound": 8.1e-7, "seconds": 0.04, "value": [1.5, 2.5]}
    assert store.finish(job_id, "tok", "done", result=result)
    assert store.get_result(job_id) == result
    ttl = store.redis.ttl(store.keys.result(job_id))
    assert store.settings.result_ttl_s - 5 < ttl <= store.settings.result_ttl_s
    job = store.get_job(job_id)
    assert job is not None
    assert (job["state"], job["status"], job["iterations"], job["error_bound"]) == ("done", "converged", 28, 8.1e-7)
    assert job["finished_at"] >= job["started_at"]
    for key in (store.keys.lease(job_id), store.keys.checkpoint(job_id), store.keys.cancel(job_id)):
        assert not store.redis.exists(key)
    assert not store.finish(job_id, "tok", "done", result={**result, "iterations": 99})
    assert store.get_result(job_id) == result
    assert store.counts_by_state()["done"] == 1 and store.counts_by_state()["running"] == 0
    assert job["search"] is None


def test_a_search_leaves_its_summary_in_the_job_record(store: JobStore) -> None:
    job_id = create(store)["id"]
    store.claim(job_id, "tok", worker="w")
    trials = [{"unknowns": {"r": 0.0}, "residuals": [-1.0]}, {"unknowns": {"r": 0.04}, "residuals": [1e-9]}]
    search = {"status": "converged", "unknowns": {"r": 0.04}, "residuals": [1e-9], "trials": trials}
    assert store.finish(job_id, "tok", "done", result={"status": "converged", "iterations": 3, "search": search})
    assert store.get_job(job_id)["search"] == {"status": "converged", "unknowns": {"r": 0.04}, "residuals": [1e-9],
                                               "trials": 2}


def test_solve_histograms_are_cumulative(store: JobStore) -> None:
    samples = [(0.004, 3), (0.3, 40), (0.3, 40), (7200.0, 2_000_000)]
    for seconds, iterations in samples:
        job_id = create(store)["id"]
        store.claim(job_id, "tok", worker="w")
        result = {"status": "converged", "iterations": iterations, "seconds": seconds}
        store.finish(job_id, "tok", "done", result=result)
    histograms = store.solve_histograms()
    seconds_h = histograms["seconds"]
    assert seconds_h["count"] == 4 and seconds_h["sum"] == pytest.approx(sum(s for s, _ in samples))
    bounds = dict(seconds_h["buckets"])
    assert bounds[0.01] == 1 and bounds[0.25] == 1 and bounds[0.5] == 3 and bounds[3600.0] == 3
    assert bounds[14400.0] == 4 and bounds[math.inf] == 4
    counts = [count for _, count in seconds_h["buckets"]]
    assert counts == sorted(counts)
    iterations_h = dict(histograms["iterations"]["buckets"])
    assert iterations_h[5.0] == 1 and iterations_h[50.0] == 3 and iterations_h[1_000_000.0] == 3
    assert iterations_h[math.inf] == 4


def test_failed_record_carries_the_error(store: JobStore) -> None:
    job_id = create(store)["id"]
    store.claim(job_id, "tok", worker="w")
    error = {"title": "invalid problem document", "detail": "discount: must be below 1",
             "errors": [{"path": "discount", "message": "must be below 1"}]}  # fmt: skip
    assert store.finish(job_id, "tok", "failed", error=error)
    job = store.get_job(job_id)
    assert job is not None and job["state"] == "failed" and job["error"] == error and job["status"] is None


def test_private_server_is_append_only_and_durable(redis_client: redis.Redis, tmp_path) -> None:
    assert redis_client.config_get("appendonly") == {"appendonly": "yes"}
    server = EmbeddedRedis(tmp_path / "durable").start()
    try:
        redis.Redis.from_url(server.url).set("fixq:probe", "kept")
    finally:
        server.stop()
    assert server.process is None
    with EmbeddedRedis(tmp_path / "durable") as again:
        assert redis.Redis.from_url(again.url).get("fixq:probe") == b"kept"


def test_settings_come_from_fixq_environment(monkeypatch) -> None:
    monkeypatch.setenv("FIXQ_LEASE_S", "3")
    monkeypatch.setenv("FIXQ_RESULT_TTL_S", "60")
    monkeypatch.setenv("FIXQ_REDIS_PREFIX", "lab2")
    settings = Settings()
    assert (settings.lease_s, settings.result_ttl_s, settings.redis_prefix) == (3.0, 60, "lab2")
    assert Settings.model_fields["lease_s"].description
    with pytest.raises(ValueError):
        Settings(redis_prefix="bad prefix")
