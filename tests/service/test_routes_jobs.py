"""``/v1/jobs`` in process: the app from ``create_app`` on the private Redis server.

Executions are the real ``service.task.run_job`` called in the test process
(tabular documents only, so no numba), or a hand-driven lease through the
store's execution API where a test needs a job caught mid-solve.
"""

from __future__ import annotations

import csv
import io
import itertools
import json
import secrets
import threading
import time

import anyio
import httpx
import numpy as np
import pytest
import redis

from service.app import create_app
from service.settings import Settings
from service.store import JobStore
from service.task import run_job
from tests._documents import machine_shop
from tests.service._http import PROBLEM_JSON, assert_problem, make_client, run_inline
from worker import solve


def submit(client: httpx.Client, document: dict | None = None, **headers: str) -> dict:
    response = client.post("/v1/jobs", json=document or machine_shop(), headers=headers)
    assert response.status_code == 202, response.text
    return response.json()


def test_submit_answers_202_with_the_record_and_location(client: httpx.Client, store: JobStore) -> None:
    response = client.post("/v1/jobs", json=machine_shop())
    assert response.status_code == 202
    record = response.json()
    assert response.headers["location"] == f"/v1/jobs/{record['id']}"
    assert record["state"] == "queued" and record["owner"] == "anonymous"
    assert record["label"] == "machine shop (invented)" and record["tags"] == ["shop"]
    assert record["estimate"]["points"] == 3 and record["estimate"]["choice_points"] == 2
    assert store.queue_depths()["normal"] == 1
    assert client.get(record["links"]["self"]).json() == record


def test_invalid_documents_are_422_with_every_fault_and_nothing_is_queued(
    client: httpx.Client, store: JobStore
) -> None:
    document = machine_shop(discount=1.0)
    document["model"]["transition"][1][0] = [0.5, 0.5, 0.5]
    body = assert_problem(client.post("/v1/jobs", json=document), 422)
    paths = {error["path"] for error in body["errors"]}
    assert "discount" in paths
    assert any(path.startswith("model.transition[1][0]") for path in paths)
    assert all(error["message"] for error in body["errors"])
    assert store.counts_by_state()["queued"] == 0 and store.queue_depths()["normal"] == 0


def test_unknown_keys_are_named(client: httpx.Client) -> None:
    body = assert_problem(client.post("/v1/jobs", json=machine_shop(colour="blue")), 422)
    assert any(error["path"] == "colour" for error in body["errors"])


@pytest.mark.parametrize(
    ("body", "line", "column"),
    [(b'{"version": 1,\n  "discount": 0.9,,}', 2, 19), (b'{"discount": NaN}', 1, 14), (b"[1, 2", 1, 6)],
)
def test_malformed_json_is_400_naming_the_position(client: httpx.Client, body: bytes, line: int, column: int) -> None:
    problem = assert_problem(client.post("/v1/jobs", content=body, headers={"content-type": "application/json"}), 400)
    assert (problem["line"], problem["column"]) == (line, column)
    assert f"line {line} column {column}" in problem["detail"]


@pytest.mark.parametrize("body", [b"", b"   ", b'"a string"', b"[]", b"3", b"null", b"\xff\xfe"])
def test_bodies_that_are_no_json_object_are_4xx(client: httpx.Client, body: bytes) -> None:
    response = client.post("/v1/jobs", content=body)
    assert response.status_code in (400, 422)
    assert response.headers["content-type"] == PROBLEM_JSON


def test_hostile_documents_never_yield_5xx(client: httpx.Client) -> None:
    bodies = [
        b'{"version": 1, "discount": 0.9, "model": ' + b"[" * depth + b"0" + b"]" * depth + b"}"
        for depth in (900, 5000)
    ]
    shapes = [
        {"version": 1, "discount": "0.9", "model": {"kind": "grid"}},
        {"version": 1, "discount": 0.9, "model": {"kind": "tabular", "states": 10**12, "actions": 10**12,
                                                   "reward": [], "transition": []}},
        {"version": 1, "discount": 0.9, "model": {"kind": "grid", "states": {"k": {"min": 0, "max": 1, "points": 5}},
                                                   "choices": {"c": {"next_of": "k"}}, "reward": "__import__('os')"}},
        machine_shop(solver={"method": "simplex"}),
        machine_shop(model={"kind": "tabular", "states": 1, "actions": 1, "reward": [[1e308]],
                            "transition": {"dtype": "float64", "shape": [1, 1, 1], "base64": "!!"}}),
    ]  # fmt: skip
    for body in bodies + [json.dumps(document).encode() for document in shapes]:
        response = client.post("/v1/jobs", content=body)
        assert 400 <= response.status_code < 500, response.text
        assert response.headers["content-type"] == PROBLEM_JSON


def test_body_over_max_body_mb_is_413_by_content_length(app_settings: Settings, redis_client: redis.Redis) -> None:
    app = create_app(app_settings.model_copy(update={"max_body_mb": 0.001}))
    with make_client(app) as client:
        body = assert_problem(client.post("/v1/jobs", content=b" " * 2000), 413)
    assert "max_body_mb" in body["detail"]


def test_body_over_max_body_mb_is_413_when_streamed_without_a_length(
    app_settings: Settings, redis_client: redis.Redis
) -> None:
    app = create_app(app_settings.model_copy(update={"max_body_mb": 0.001}))
    chunks = [b"[" + b"0," * 300] * 4 + [b"0]"]
    sent: list[dict] = []

    async def receive() -> dict:
        return {"type": "http.request", "body": chunks.pop(0), "more_body": bool(chunks[1:])}

    async def send(message: dict) -> None:
        sent.append(message)

    scope = {
        "type": "http", "asgi": {"version": "3.0"}, "http_version": "1.1", "method": "POST", "scheme": "http",
        "path": "/v1/jobs", "raw_path": b"/v1/jobs", "query_string": b"", "root_path": "",
        "headers": [(b"host", b"fixq.test"), (b"transfer-encoding", b"chunked")],
        "client": ("127.0.0.1", 1), "server": ("fixq.test", 80),
    }  # fmt: skip
    anyio.run(app, scope, receive, send)
    start = sent[0]
    assert start["status"] == 413
    assert (b"content-type", PROBLEM_JSON.encode()) in start["headers"]
    assert json.loads(b"".join(m.get("body", b"") for m in sent[1:]))["status"] == 413


def test_problem_over_max_problem_mb_is_413_naming_the_estimate(
    app_settings: Settings, redis_client: redis.Redis, store: JobStore
) -> None:
    app = create_app(app_settings.model_copy(update={"max_problem_mb": 0.0001}))
    with make_client(app) as client:
        body = assert_problem(client.post("/v1/jobs", json=machine_shop()), 413)
    assert body["estimate"]["points"] == 3 and body["estimate"]["bytes"] > 0.0001 * 2**20
    assert "MiB" in body["detail"] and "max_problem_mb" in body["detail"]
    assert body["errors"][0]["path"] == "model"
    assert store.counts_by_state()["queued"] == 0


def test_idempotency_key_answers_the_same_job(client: httpx.Client, store: JobStore) -> None:
    first = submit(client, **{"Idempotency-Key": "nightly-2026-12-01"})
    again = submit(client, **{"Idempotency-Key": "nightly-2026-12-01"})
    other = submit(client, **{"Idempotency-Key": "nightly-2026-12-02"})
    assert first["id"] == again["id"] != other["id"]
    assert store.counts_by_state()["queued"] == 2


def test_warm_start_must_name_a_finished_job(client: httpx.Client) -> None:
    body = assert_problem(
        client.post("/v1/jobs", json=machine_shop(solver={"initial": {"job": "0123456789abcdef"}})), 422
    )
    assert body["errors"][0]["path"] == "solver.initial.job"
    queued = submit(client)
    body = assert_problem(client.post("/v1/jobs", json=machine_shop(solver={"initial": {"job": queued["id"]}})), 422)
    assert "queued" in body["errors"][0]["message"]
    done = submit(client)
    run_inline(done["id"])
    assert submit(client, machine_shop(solver={"initial": {"job": done["id"]}}))["state"] == "queued"


@pytest.mark.parametrize("job_id", ["0123456789abcdef", "nope", "0123456789ABCDEF", "x" * 300, "0123456789abcde"])
def test_unknown_or_malformed_ids_are_404(client: httpx.Client, job_id: str) -> None:
    for path in ("", "/result", "/log"):
        assert_problem(client.get(f"/v1/jobs/{job_id}{path}"), 404)
    assert_problem(client.delete(f"/v1/jobs/{job_id}"), 404)


def test_result_is_409_until_done_and_then_the_result_document(client: httpx.Client) -> None:
    document = machine_shop()
    record = submit(client, document)
    body = assert_problem(client.get(f"/v1/jobs/{record['id']}/result"), 409)
    assert body["state"] == "queued" and "queued" in body["detail"]
    assert run_inline(record["id"])["outcome"] == "done"
    response = client.get(f"/v1/jobs/{record['id']}/result")
    assert response.status_code == 200 and response.headers["content-type"] == "application/json"
    result = response.json()
    # The HTTP answer is the in-process front door's answer (worker.solve).
    expected = solve(document)
    assert result["status"] == expected["status"] == "converged"
    assert result["policy"] == expected["policy"]
    np.testing.assert_allclose(result["value"], expected["value"], rtol=0, atol=1e-9)
    finished = client.get(f"/v1/jobs/{record['id']}").json()
    assert finished["state"] == "done" and finished["iterations"] == result["iterations"]


def test_result_of_a_failed_job_is_409_saying_so(client: httpx.Client, store: JobStore) -> None:
    record = submit(client)
    token = secrets.token_hex(8)
    assert store.claim(record["id"], token, worker="test:1") == "ok"
    body = assert_problem(client.get(f"/v1/jobs/{record['id']}/result"), 409)
    assert body["state"] == "running"
    error = {"title": "solver error", "detail": "the machine caught fire", "errors": []}
    assert store.finish(record["id"], token, "failed", error=error)
    body = assert_problem(client.get(f"/v1/jobs/{record['id']}/result"), 409)
    assert body["state"] == "failed" and "caught fire" in body["detail"]


def read_csv(text: str) -> tuple[list[str], list[list[str]]]:
    rows = list(csv.reader(io.StringIO(text)))
    return rows[0], rows[1:]


def test_csv_of_a_tabular_result_has_one_row_per_state(client: httpx.Client) -> None:
    record = submit(client)
    run_inline(record["id"])
    result = client.get(f"/v1/jobs/{record['id']}/result").json()
    response = client.get(f"/v1/jobs/{record['id']}/result", params={"format": "csv"})
    assert response.status_code == 200 and response.headers["content-type"].startswith("text/csv")
    header, rows = read_csv(response.text)
    assert header == [*result["axes"], "value", *result["policy"]]
    assert len(rows) == 3
    (axis,) = result["axes"].values()
    (choice,) = result["policy"].values()
    for row, label, value, action in zip(rows, axis, result["value"], choice):
        assert row[0] == str(label) and float(row[1]) == value and row[2] == str(action)
    by_accept = client.get(f"/v1/jobs/{record['id']}/result", headers={"accept": "text/csv"})
    assert by_accept.text == response.text
    # An Accept header that merely mentions text/csv, preferring JSON, gets JSON (as Julia's HTTP.jl
    # or a browser may send); one preferring CSV gets CSV.
    for accept, wants in [("application/json, text/csv;q=0.5", False), ("text/csv, application/json", True),
                        ("application/json;q=0.4, text/csv", True), ("*/*", False), ("text/csv;q=0", False)]:
        answer = client.get(f"/v1/jobs/{record['id']}/result", headers={"accept": accept})
        assert answer.headers["content-type"].startswith("text/csv") is wants, accept


def test_csv_of_a_grid_result_covers_every_state_and_shock_combination(client: httpx.Client, store: JobStore) -> None:
    # A result document of the shape the README's result reference gives a grid problem:
    # two states and one shock, value and policy of shape (3, 2, 2).
    axes = {"k": [1.0, 2.0, 3.0], "h": [0.0, 1.0], "z": [0.9, 1.1]}
    value = np.arange(12, dtype=float).reshape(3, 2, 2) / 7
    policy = {"k_next": (np.arange(12).reshape(3, 2, 2) % 3 + 1.0).tolist(), "work": np.full((3, 2, 2), 0.5).tolist()}
    result = {"status": "converged", "error_bound": 1e-9, "iterations": 4, "seconds": 0.1, "axes": axes,
              "value": value.tolist(), "policy": policy, "policy_index": policy, "log": [],
              "diagnostics": {}}  # fmt: skip
    record = submit(client)
    token = secrets.token_hex(8)
    store.claim(record["id"], token, worker="test:1")
    assert store.finish(record["id"], token, "done", result=result)
    header, rows = read_csv(client.get(f"/v1/jobs/{record['id']}/result?format=csv").text)
    assert header == ["k", "h", "z", "value", "k_next", "work"]
    assert len(rows) == 12
    combos = [(float(r[0]), float(r[1]), float(r[2])) for r in rows]
    assert combos == list(itertools.product(axes["k"], axes["h"], axes["z"]))
    for (i, j, s), row in zip(itertools.product(range(3), range(2), range(2)), rows):
        assert float(row[3]) == value[i, j, s]
        assert float(row[4]) == policy["k_next"][i][j][s] and float(row[5]) == 0.5


def test_unknown_format_is_400(client: httpx.Client) -> None:
    record = submit(client)
    body = assert_problem(client.get(f"/v1/jobs/{record['id']}/result", params={"format": "xlsx"}), 400)
    assert body["errors"][0]["path"] == "query.format"


def fake_entries(first: int, last: int) -> list[dict]:
    return [
        {"iteration": i, "distance": 0.5**i, "error_bound": 9 * 0.5**i, "seconds": i / 100}
        for i in range(first, last + 1)
    ]


def test_log_pages_with_cursors(client: httpx.Client, store: JobStore) -> None:
    record = submit(client)
    token = secrets.token_hex(8)
    store.claim(record["id"], token, worker="test:1")
    store.write_log(record["id"], token, fake_entries(1, 25), progress=fake_entries(25, 25)[0])
    seen, cursor, pages = [], 0, 0
    while cursor is not None:
        page = client.get(f"/v1/jobs/{record['id']}/log", params={"cursor": cursor, "limit": 10}).json()
        seen += [entry["iteration"] for entry in page["data"]]
        cursor, pages = page["next"], pages + 1
    assert seen == list(range(1, 26)) and pages == 3
    running = client.get(f"/v1/jobs/{record['id']}").json()
    assert running["state"] == "running" and running["progress"]["iteration"] == 25
    assert_problem(client.get(f"/v1/jobs/{record['id']}/log", params={"limit": 0}), 400)
    assert_problem(client.get(f"/v1/jobs/{record['id']}/log", params={"cursor": 10**30}), 400)
    store.finish(record["id"], token, "canceled", iterations=25)
    huge = client.get(
        f"/v1/jobs/{record['id']}/log", headers={"accept": "text/event-stream", "last-event-id": "9" * 30}
    )
    assert huge.status_code == 200 and parse_sse(huge.text)[-1][1] == "end"


def parse_sse(text: str) -> list[tuple[str | None, str, dict]]:
    events = []
    for block in text.strip().split("\n\n"):
        fields: dict[str, str] = {}
        for line in block.splitlines():
            if line.startswith(":"):
                continue
            name, _, value = line.partition(": ")
            fields[name] = value
        if fields:
            events.append((fields.get("id"), fields.get("event", "message"), json.loads(fields["data"])))
    return events


def test_live_log_streams_entries_as_written_and_ends_with_the_state(client: httpx.Client, store: JobStore) -> None:
    record = submit(client)
    job_id = record["id"]
    token = secrets.token_hex(8)
    store.claim(job_id, token, worker="test:1")
    store.write_log(job_id, token, fake_entries(1, 3), progress=None)

    def solver() -> None:
        for first in range(4, 40, 4):
            time.sleep(0.03)
            store.write_log(job_id, token, fake_entries(first, first + 3), progress=None)
        store.finish(job_id, token, "canceled", iterations=39)

    writer = threading.Thread(target=solver)
    writer.start()
    response = client.get(f"/v1/jobs/{job_id}/log", headers={"accept": "text/event-stream"})
    writer.join()
    assert response.headers["content-type"].startswith("text/event-stream")
    events = parse_sse(response.text)
    entries = [event for event in events if event[1] == "entry"]
    assert [int(event_id) for event_id, _, _ in entries] == list(range(1, 40))
    assert [data["iteration"] for _, _, data in entries] == list(range(1, 40))
    assert events[-1][1:] == ("end", {"state": "canceled"})

    resumed = parse_sse(client.get(f"/v1/jobs/{job_id}/log", headers={"accept": "text/event-stream",
                                                                         "last-event-id": "30"}).text)  # fmt: skip
    assert [data["iteration"] for _, kind, data in resumed if kind == "entry"] == list(range(31, 40))


def test_live_log_of_a_resumed_job_sends_each_iteration_once(client: httpx.Client, store: JobStore) -> None:
    record = submit(client)
    job_id = record["id"]
    token = secrets.token_hex(8)
    store.claim(job_id, token, worker="test:1")
    store.write_log(job_id, token, fake_entries(1, 10), progress=None)

    def resume_from_checkpoint_at_6() -> None:
        time.sleep(0.05)
        store.write_log(job_id, token, [], progress=None, trim_from=7)
        store.write_log(job_id, token, fake_entries(7, 14), progress=None)
        store.finish(job_id, token, "canceled", iterations=14)

    writer = threading.Thread(target=resume_from_checkpoint_at_6)
    writer.start()
    events = parse_sse(client.get(f"/v1/jobs/{job_id}/log", headers={"accept": "text/event-stream"}).text)
    writer.join()
    assert [data["iteration"] for _, kind, data in events if kind == "entry"] == list(range(1, 15))


def test_cancel_of_a_queued_job(client: httpx.Client, store: JobStore) -> None:
    record = submit(client)
    response = client.delete(f"/v1/jobs/{record['id']}")
    assert response.status_code == 200 and response.json()["state"] == "canceled"
    assert store.queue_depths()["normal"] == 0
    assert run_job(record["id"])["outcome"] == "terminal"
    again = client.delete(f"/v1/jobs/{record['id']}")
    assert again.status_code == 200 and again.json()["state"] == "canceled"


def test_cancel_of_a_running_job_is_202_and_the_solver_is_told(client: httpx.Client, store: JobStore) -> None:
    record = submit(client)
    token = secrets.token_hex(8)
    store.claim(record["id"], token, worker="test:1")
    response = client.delete(f"/v1/jobs/{record['id']}")
    assert response.status_code == 202 and response.json()["state"] == "running"
    assert store.stop_signals(record["id"], token) == (True, True)


def test_cancel_of_a_done_job_changes_nothing(client: httpx.Client) -> None:
    record = submit(client)
    run_inline(record["id"])
    response = client.delete(f"/v1/jobs/{record['id']}")
    assert response.status_code == 200 and response.json()["state"] == "done"


def test_list_is_newest_first_filtered_and_paginated(client: httpx.Client) -> None:
    ids = [submit(client, machine_shop(label=f"shop {i} (invented)", tags=["even" if i % 2 == 0 else "odd"]))["id"]
           for i in range(5)]  # fmt: skip
    run_inline(ids[1])
    listed, cursor = [], None
    while True:
        page = client.get("/v1/jobs", params={"limit": 2, **({"cursor": cursor} if cursor else {})}).json()
        listed += [job["id"] for job in page["data"]]
        cursor = page["next"]
        if cursor is None:
            break
    assert listed == ids[::-1]
    assert [j["id"] for j in client.get("/v1/jobs", params={"tag": "even"}).json()["data"]] == [ids[4], ids[2], ids[0]]
    assert [j["id"] for j in client.get("/v1/jobs", params={"state": "done"}).json()["data"]] == [ids[1]]
    both = client.get("/v1/jobs", params=[("state", "done"), ("state", "queued")]).json()["data"]
    assert len(both) == 5
    assert [j["id"] for j in client.get("/v1/jobs", params={"label": "shop 3 (invented)"}).json()["data"]] == [ids[3]]


@pytest.mark.parametrize(
    ("params", "path"),
    [({"limit": 0}, "query.limit"), ({"limit": 100000}, "query.limit"), ({"state": "sleeping"}, "query.state[0]"),
     ({"cursor": "not-a-cursor"}, "query.cursor")],
)  # fmt: skip
def test_bad_list_parameters_are_400(client: httpx.Client, params: dict, path: str) -> None:
    body = assert_problem(client.get("/v1/jobs", params=params), 400)
    assert body["errors"][0]["path"] == path


def test_auth_on_refuses_requests_without_a_valid_key(app_settings: Settings, redis_client: redis.Redis) -> None:
    app = create_app(app_settings.model_copy(update={"auth": True}))
    with make_client(app) as client:
        for request in (client.build_request("POST", "/v1/jobs", json=machine_shop()),
                        client.build_request("GET", "/v1/jobs"),
                        client.build_request("GET", "/v1/jobs/0123456789abcdef",
                                             headers={"authorization": "Bearer k"})):  # fmt: skip
            response = client.send(request)
            assert_problem(response, 401)
            assert response.headers["www-authenticate"].startswith("Bearer")
        assert client.get("/healthz").status_code == 200
        assert client.get("/metrics").status_code == 200


def test_unexpected_errors_are_500_problems(app: object, client: httpx.Client, monkeypatch: pytest.MonkeyPatch) -> None:
    def broken(job_id: str) -> None:
        raise RuntimeError("a bug")

    monkeypatch.setattr(app.state.store, "get_job", broken)
    body = assert_problem(client.get("/v1/jobs/0123456789abcdef"), 500)
    assert "a bug" not in body["detail"]


def test_redis_down_is_503_problem(app_settings: Settings) -> None:
    from service.embedded_redis import free_port

    app = create_app(app_settings.model_copy(update={"redis_url": f"redis://127.0.0.1:{free_port()}/0"}))
    with make_client(app) as client:
        response = client.post("/v1/jobs", json=machine_shop())
        assert_problem(response, 503)
        assert response.headers["retry-after"]
        assert client.get("/healthz").status_code == 503
