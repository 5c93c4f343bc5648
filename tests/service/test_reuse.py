"""Resubmission without waste: Idempotency-Key, reuse of solved documents, warm starts and their owners."""

from __future__ import annotations

import copy
import threading
from typing import Any

import httpx
import numpy as np
import pytest
import redis
from fastapi import FastAPI

from service.keys import KeyStore
from service.resubmission import SolvedJobs
from service.settings import Settings
from service.store import JobStore
from tests._documents import plant_capacity, print_shop
from tests.service._http import assert_problem, make_client, run_inline, submit
from worker import solve


def idem(client: httpx.Client, key: str, document: dict[str, Any], **params: Any) -> httpx.Response:
    return client.post("/v1/jobs", json=document, headers={"Idempotency-Key": key}, params=params)


def test_same_idempotency_key_and_body_answers_the_same_job(alice: httpx.Client, store: JobStore) -> None:
    first = idem(alice, "nightly-2026-12-01", print_shop())
    again = idem(alice, "nightly-2026-12-01", print_shop())
    assert first.status_code == again.status_code == 202
    assert again.headers["idempotent-replayed"] == "true" and "idempotent-replayed" not in first.headers
    assert again.json()["id"] == first.json()["id"] and again.headers["location"] == first.headers["location"]
    assert store.counts_by_state()["queued"] == 1 and store.queue_depths()["normal"] == 1
    run_inline(first.json()["id"])
    replay = idem(alice, "nightly-2026-12-01", print_shop())
    assert replay.json()["id"] == first.json()["id"] and replay.json()["state"] == "done"


def test_same_idempotency_key_with_another_body_is_422_naming_the_header(alice: httpx.Client) -> None:
    first = idem(alice, "calibration-7", print_shop()).json()
    body = assert_problem(idem(alice, "calibration-7", print_shop(discount=0.91)), 422)
    assert body["errors"][0]["path"] == "header.Idempotency-Key"
    assert "Idempotency-Key" in body["detail"] and first["id"] in body["detail"]
    assert alice.get("/v1/jobs").json()["data"][0]["id"] == first["id"]


def test_a_refused_body_does_not_burn_its_idempotency_key(alice: httpx.Client) -> None:
    assert_problem(idem(alice, "retry-me", print_shop(discount=1.0)), 422)
    assert idem(alice, "retry-me", print_shop()).status_code == 202


def test_idempotency_keys_belong_to_their_owner(alice: httpx.Client, bob: httpx.Client) -> None:
    mine = idem(alice, "shared-name", print_shop()).json()
    theirs = idem(bob, "shared-name", print_shop(discount=0.7)).json()
    assert mine["id"] != theirs["id"] and theirs["owner"] == "bob"


def test_concurrent_requests_with_one_idempotency_key_make_one_job(
    auth_app: FastAPI, keys: KeyStore, store: JobStore
) -> None:
    key = keys.add("racer")
    barrier = threading.Barrier(12)
    answers: list[httpx.Response] = []

    def send() -> None:
        with make_client(auth_app, Authorization=f"Bearer {key}") as client:
            barrier.wait()
            answers.append(idem(client, "once", print_shop()))

    threads = [threading.Thread(target=send) for _ in range(12)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert {response.status_code for response in answers} == {202}
    assert len({response.json()["id"] for response in answers}) == 1
    assert store.counts_by_state()["queued"] == 1 and store.queue_depths()["normal"] == 1


def test_a_solved_document_resubmitted_is_a_done_job_at_once(alice: httpx.Client, store: JobStore) -> None:
    first = submit(alice)
    assert run_inline(first["id"])["outcome"] == "done"
    # Only submission keys differ: label, tags and priority are not part of the problem.
    response = alice.post("/v1/jobs", json=print_shop(label="print shop, again (invented)", tags=["rerun"],
                                                       priority="low"))  # fmt: skip
    assert response.status_code == 201, response.text
    reused = response.json()
    assert reused["id"] != first["id"] and reused["state"] == "done"
    assert reused["reused"] is True and reused["reused_from"] == first["id"]
    assert reused["label"] == "print shop, again (invented)" and reused["tags"] == ["rerun"]
    assert response.headers["location"] == f"/v1/jobs/{reused['id']}"
    assert store.queue_depths() == {"high": 0, "normal": 0, "low": 0}
    assert alice.get(f"/v1/jobs/{reused['id']}/result").json() == alice.get(f"/v1/jobs/{first['id']}/result").json()
    logs = [alice.get(f"/v1/jobs/{job['id']}/log").json()["data"] for job in (reused, first)]
    assert logs[0] == logs[1] and logs[0]
    shown = alice.get(f"/v1/jobs/{reused['id']}").json()
    assert shown["reused"] is True and shown["iterations"] == alice.get(f"/v1/jobs/{first['id']}").json()["iterations"]
    listed = {job["id"]: job for job in alice.get("/v1/jobs").json()["data"]}
    assert listed[reused["id"]]["reused"] is True and listed[first["id"]]["reused"] is False
    assert alice.get("/v1/jobs", params={"tag": "rerun"}).json()["data"][0]["id"] == reused["id"]


def test_fresh_true_solves_again(alice: httpx.Client, store: JobStore) -> None:
    first = submit(alice)
    run_inline(first["id"])
    fresh = submit(alice, fresh="true")
    assert fresh["state"] == "queued" and fresh["reused"] is False
    assert store.queue_depths()["normal"] == 1


def test_reuse_needs_the_same_owner_a_finished_result_and_a_reusable_status(
    alice: httpx.Client, bob: httpx.Client, store: JobStore, redis_client: redis.Redis
) -> None:
    queued = submit(alice)
    assert submit(alice)["state"] == "queued", "a queued twin is not reused"
    run_inline(queued["id"])
    assert submit(bob)["state"] == "queued", "another owner's solve is not reused"
    redis_client.delete(store.keys.result(queued["id"]))
    assert submit(alice, print_shop())["state"] == "queued", "an expired result is not reused"
    timed = submit(alice, print_shop(discount=0.6))
    run_inline(timed["id"])
    redis_client.hset(store.keys.job(timed["id"]), "status", "time_limit")
    assert submit(alice, print_shop(discount=0.6))["state"] == "queued", "a timed-out solve is not reused"


def test_a_replayed_idempotency_key_of_a_reused_job_answers_that_job(alice: httpx.Client) -> None:
    first = submit(alice)
    run_inline(first["id"])
    reused = idem(alice, "nightly", print_shop())
    assert reused.status_code == 201
    replay = idem(alice, "nightly", print_shop())
    assert replay.status_code == 202 and replay.json()["id"] == reused.json()["id"]
    assert replay.json()["reused"] is True


def test_a_warm_start_from_another_owners_job_is_refused(
    alice: httpx.Client, bob: httpx.Client, admin: httpx.Client
) -> None:
    solved = submit(alice)
    run_inline(solved["id"])
    warm = print_shop(discount=0.905, solver={"method": "value_iteration", "initial": {"job": solved["id"]}})
    body = assert_problem(bob.post("/v1/jobs", json=warm), 422)
    assert body["errors"][0]["path"] == "solver.initial.job" and "there is no job" in body["errors"][0]["message"]
    assert admin.post("/v1/jobs", json=warm).status_code == 202
    own = submit(alice, warm)
    assert run_inline(own["id"])["outcome"] == "done"


def small_plant(points: int, price: float = 1.0) -> dict[str, Any]:
    """The bundled plant example (an invented scenario) on a coarser grid, solved by plain value iteration."""
    document = plant_capacity(points, solver={"method": "value_iteration", "tolerance": 1e-6})
    document["model"]["params"]["price"] = price
    document.pop("report", None)
    return document


def test_a_warm_start_onto_a_finer_grid_is_interpolated_and_starts_close(alice: httpx.Client) -> None:
    coarse = submit(alice, small_plant(40))
    assert run_inline(coarse["id"])["outcome"] == "done"
    fine = small_plant(70, price=1.01)
    warm_document = copy.deepcopy(fine)
    warm_document["solver"]["initial"] = {"job": coarse["id"]}
    warm = submit(alice, warm_document)
    assert run_inline(warm["id"])["outcome"] == "done"
    warm_result = alice.get(f"/v1/jobs/{warm['id']}/result").json()
    cold = solve(fine)
    assert len(warm_result["axes"]["capacity"]) == 70
    assert warm_result["status"] == cold["status"] == "converged"
    # Started from the coarse solution carried onto the 70 points, the first step is a small
    # correction; from zeros (as if the warm start were ignored) it would equal the cold one.
    assert warm_result["log"][0]["distance"] < 0.2 * cold["log"][0]["distance"]
    assert warm_result["log"][0]["error_bound"] < 0.2 * cold["log"][0]["error_bound"]
    assert warm_result["iterations"] < cold["iterations"]
    # Both answers are certified within their error bounds of the same fixed point,
    # so they can differ by at most the sum of the two bounds.
    gap = np.max(np.abs(np.asarray(warm_result["value"]) - np.asarray(cold["value"])))
    assert gap <= warm_result["error_bound"] + cold["error_bound"]


def test_reuse_applies_with_auth_off_to_the_anonymous_owner(
    settings: Settings, redis_client: redis.Redis
) -> None:
    from service.app import create_app

    with make_client(create_app(settings.model_copy(update={"auth": False}))) as client:
        first = submit(client)
        run_inline(first["id"])
        again = client.post("/v1/jobs", json=print_shop())
        assert again.status_code == 201 and again.json()["owner"] == "anonymous"
        assert again.json()["reused_from"] == first["id"]


def test_unknown_idempotency_and_fresh_inputs_are_400(alice: httpx.Client) -> None:
    assert_problem(alice.post("/v1/jobs", json=print_shop(), params={"fresh": "maybe"}), 400)
    assert_problem(alice.post("/v1/jobs", json=print_shop(), headers={"Idempotency-Key": "x" * 300}), 400)


def test_a_twin_whose_result_expires_mid_request_is_solved_afresh(
    alice: httpx.Client, store: JobStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    solved = submit(alice)
    run_inline(solved["id"])
    # The result expires between the lookup and the copy: the lookup still names the job.
    monkeypatch.setattr(SolvedJobs, "find", lambda self, owner, document_hash: solved["id"])
    store.redis.delete(store.keys.result(solved["id"]))
    response = alice.post("/v1/jobs", json=print_shop())
    assert response.status_code == 202 and response.json()["state"] == "queued"
    assert response.json()["reused"] is False
    assert store.queue_depths()["normal"] == 1
    assert run_inline(response.json()["id"])["outcome"] == "done"


def test_a_twin_that_cannot_be_queued_for_the_cap_leaves_no_queued_job(
    settings: Settings, redis_client: redis.Redis, keys: KeyStore, store: JobStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    from service.app import create_app

    app = create_app(settings.model_copy(update={"auth": True, "max_active_jobs": 1}))
    with make_client(app, Authorization=f"Bearer {keys.add('alice')}") as alice:
        solved = submit(alice)
        run_inline(solved["id"])
        submit(alice, print_shop(discount=0.7))
        monkeypatch.setattr(SolvedJobs, "find", lambda self, owner, document_hash: solved["id"])
        store.redis.delete(store.keys.result(solved["id"]))
        assert alice.post("/v1/jobs", json=print_shop()).status_code == 429
    assert store.counts_by_state()["queued"] == 1 and store.queue_depths()["normal"] == 1
