"""A sweep's rows are answered from the owner's solved jobs, as submissions are, unless ``?fresh=true``.

In process on the private Redis server; executions are the real ``service.task.run_job`` (tabular
documents: the invented machine shop of ``tests._documents``); its finish hook advances chained sweeps.
"""

from __future__ import annotations

import httpx

from service import queue as rq_queues
from service.store import JobStore
from service.task import run_job
from tests._documents import machine_shop


def _run(store: JobStore, job_id: str) -> str:
    record = store.get_job(job_id)
    store.redis.lrem(rq_queues.queue_key(record["priority"]), 0, f"{job_id}-1")
    return run_job(job_id)["outcome"]


def _sweep(client: httpx.Client, body: dict, **params: str) -> dict:
    response = client.post("/v1/sweeps", json=body, params=params)
    assert response.status_code == 202, response.text
    return response.json()


def _solved(client: httpx.Client, store: JobStore, document: dict) -> str:
    response = client.post("/v1/jobs", json=document)
    assert response.status_code == 202, response.text
    job_id = response.json()["id"]
    assert _run(store, job_id) == "done"
    return job_id


def test_a_row_the_owner_solved_already_is_done_at_once(client: httpx.Client, store: JobStore) -> None:
    earlier = _solved(client, store, machine_shop(discount=0.9))
    sweep = _sweep(client, {"base": machine_shop(), "vary": {"discount": [0.8, 0.9]}})
    rows = sweep["rows"]["data"]
    assert [row["state"] for row in rows] == ["queued", "done"]
    reused = client.get(f"/v1/jobs/{rows[1]['job']}").json()
    assert reused["reused"] is True and reused["reused_from"] == earlier
    assert f"sweep:{sweep['id']}" in reused["tags"]
    assert store.queue_depths()["normal"] == 1
    # fresh=true solves every row again.
    fresh = _sweep(client, {"base": machine_shop(), "vary": {"discount": [0.8, 0.9]}}, fresh="true")
    assert [row["state"] for row in fresh["rows"]["data"]] == ["queued", "queued"]


def test_a_chain_of_solved_rows_is_followed_to_its_end_at_once(client: httpx.Client, store: JobStore) -> None:
    # Solved once as a chain; the same chain again is answered row after row, each row's warm start
    # (solver.initial naming its predecessor) aside, and nothing is queued.
    body = {"base": machine_shop(), "vary": {"discount": [0.8, 0.85, 0.9]}, "chain": True}
    first = _sweep(client, body)
    for _ in range(3):
        queued = [row["job"] for row in client.get(f"/v1/sweeps/{first['id']}").json()["rows"]["data"]
                  if row["state"] == "queued"]
        for job_id in queued:
            assert _run(store, job_id) == "done"
    again = _sweep(client, body)
    assert [row["state"] for row in again["rows"]["data"]] == ["done", "done", "done"]
    assert again["state"] == "done" and store.queue_depths()["normal"] == 0


def test_a_resent_sweep_of_solved_rows_needs_no_slot_of_the_full_cap(app_settings, redis_client) -> None:
    # Before: the door asked for a slot for every first row before it looked for solved twins, so a nightly
    # sweep sent again while the key's cap was full was refused 429, though it queues nothing (a single job
    # sent again is answered 201 at the same cap).
    from service.app import create_app
    from tests.service._http import make_client

    settings = app_settings.model_copy(update={"max_active_jobs": 3})
    store = JobStore(redis_client, settings)
    with make_client(create_app(settings)) as client:
        body = {"base": machine_shop(), "vary": {"discount": [0.8, 0.85, 0.9]}}
        for row in _sweep(client, body)["rows"]["data"]:
            assert _run(store, row["job"]) == "done"
        for discount in (0.5, 0.6):
            assert client.post("/v1/jobs", json=machine_shop(discount=discount)).status_code == 202
        again = _sweep(client, body)
        assert [row["state"] for row in again["rows"]["data"]] == ["done"] * 3
        # One new row among solved ones takes the one slot left; two new rows do not fit, and nothing is made.
        one_new = _sweep(client, {**body, "vary": {"discount": [0.8, 0.85, 0.9, 0.95]}})
        assert [row["state"] for row in one_new["rows"]["data"]] == ["done", "done", "done", "queued"]
        refused = client.post("/v1/sweeps", json={**body, "vary": {"discount": [0.8, 0.96, 0.97]}})
        assert refused.status_code == 429, refused.text
        assert refused.json()["limit"] == "max_active_jobs"
        assert client.post("/v1/sweeps", json=body, params={"fresh": "true"}).status_code == 429
        assert len(client.get("/v1/sweeps").json()["data"]) == 3
