"""``/v1/sweeps`` in process, on the private Redis server.

Executions are the real ``service.task.run_job`` called in the test process
(tabular documents only, so no numba compilation); ``run_job`` runs the
finish hook that advances chained sweeps, as it does under a worker.
"""

from __future__ import annotations

import copy
import csv
import io
import threading

import httpx
import pytest
import redis
from fastapi import FastAPI

from service import lifecycle, submission, sweeps
from service import queue as rq_queues
from service.app import create_app
from service.deps import Caller, current_owner
from service.reaper import reap
from service.settings import Settings, get_settings
from service.store import JobStore
from service.sweeps import creation as sweep_creation
from service.task import run_job
from tests._documents import GROWTH, LQ, TWO_CHOICES, grid_document, savings_market
from tests._documents import machine_shop as shared_machine_shop
from tests.service._http import make_client
from worker import solve
from worker.errors import FixqError, InvalidDocument

PROBLEM_JSON = "application/problem+json"


def machine_shop(**overrides) -> dict:
    """The shared invented machine shop, reporting its stationary distribution (for the rows' means)."""
    return shared_machine_shop(**{"report": {"stationary": True}, **overrides})


@pytest.fixture
def http(client: httpx.Client) -> httpx.Client:
    return client


def assert_problem(response: httpx.Response, status: int) -> dict:
    assert response.status_code == status, response.text
    assert response.headers["content-type"] == PROBLEM_JSON
    body = response.json()
    assert body["status"] == status and body["detail"]
    return body


def post_sweep(http: httpx.Client, **body) -> dict:
    response = http.post("/v1/sweeps", json={"base": machine_shop(), **body})
    assert response.status_code == 202, response.text
    sweep = response.json()
    assert response.headers["location"] == f"/v1/sweeps/{sweep['id']}"
    return sweep


def run_inline(store: JobStore, job_id: str) -> str:
    """One real execution of a job in this process, taking its RQ entry off the queue as a worker would."""
    record = store.get_job(job_id)
    store.redis.lrem(rq_queues.queue_key(record["priority"]), 0, f"{job_id}-1")
    return run_job(job_id)["outcome"]


def run_all(http: httpx.Client, store: JobStore, sweep_id: str) -> dict:
    """Run the sweep's jobs inline, as they appear, until none is left queued."""
    for _ in range(100):
        view = http.get(f"/v1/sweeps/{sweep_id}", params={"limit": 1000}).json()
        queued = [row["job"] for row in view["rows"]["data"] if row["state"] == "queued"]
        if not queued:
            return view
        for job_id in queued:
            assert run_inline(store, job_id) == "done"
    raise AssertionError("the sweep never ran out of queued jobs")


def test_parse_path_reads_keys_and_indices() -> None:
    assert sweeps.parse_path("discount") == ("discount",)
    assert sweeps.parse_path("model.params.gamma") == ("model", "params", "gamma")
    assert sweeps.parse_path("model.reward[0][1]") == ("model", "reward", 0, 1)
    assert sweeps.parse_path("model.feasible[0]") == ("model", "feasible", 0)
    for bad in ["", ".a", "a.", "a..b", "[0]", "a[x]", "a[0]b", "a.[0]", "a[-1]"]:
        with pytest.raises(ValueError):
            sweeps.parse_path(bad)


def test_product_combinations_in_c_order_and_documents_leave_the_base_alone(settings: Settings) -> None:
    base = machine_shop()
    pristine = copy.deepcopy(base)
    request = sweeps.parse_request(
        {"base": base, "vary": {"discount": [0.8, 0.9], "model.reward[0][1]": [-1.0, -2.0, -3.0]}}, settings
    )
    assert request.count == 6 and request.shape == (2, 3)
    assert [request.values_of(i) for i in (0, 1, 3, 5)] == [
        {"discount": 0.8, "model.reward[0][1]": -1.0},
        {"discount": 0.8, "model.reward[0][1]": -2.0},
        {"discount": 0.9, "model.reward[0][1]": -1.0},
        {"discount": 0.9, "model.reward[0][1]": -3.0},
    ]
    document = request.document(5, sweep_id="0123456789abcdef")
    assert document["discount"] == 0.9 and document["model"]["reward"][0] == [3.0, -3.0]
    assert document["model"]["reward"][1] is base["model"]["reward"][1]  # untouched parts are shared
    assert document["tags"] == ["shop", "sweep:0123456789abcdef"]
    assert document["label"].startswith("machine shop (invented) · discount=0.9, model.reward[0][1]=-3.0")
    assert base == pristine


def test_chain_tree_steps_back_along_the_last_non_zero_axis(settings: Settings) -> None:
    request = sweeps.parse_request(
        {"base": machine_shop(), "vary": {"discount": [0.8, 0.85, 0.9], "solver.tolerance": [1e-6, 1e-7]},
         "chain": True},
        settings,
    )  # fmt: skip
    predecessors = [request.predecessor(i) for i in range(6)]
    # (i, j) ← (i, j-1) when j > 0, else (i-1, 0).
    assert predecessors == [None, 0, 0, 2, 2, 4]
    assert [request.successors(i) for i in range(6)] == [[2, 1], [], [4, 3], [], [5], []]
    zipped = sweeps.parse_request(
        {"base": machine_shop(), "vary": {"discount": [0.8, 0.9, 0.95], "solver.tolerance": [1e-6, 1e-7, 1e-8]},
         "mode": "zip", "chain": True},
        settings,
    )  # fmt: skip
    assert zipped.count == 3 and [zipped.predecessor(i) for i in range(3)] == [None, 0, 1]
    assert zipped.values_of(2) == {"discount": 0.95, "solver.tolerance": 1e-8}


def test_a_chain_over_a_finite_horizon_is_refused_at_chain(settings: Settings) -> None:
    # Before, the chain set each later row's solver.initial to its neighbour's job, which with a horizon is the value
    # after the last period: the row at r = 0.03 of an invented 5-period household solved with its neighbour's
    # period-0 value as terminal value, 0.49 away from the same document solved alone.
    base = machine_shop()
    base["model"]["horizon"] = {"periods": 4}
    for vary in ({"discount": [0.8, 0.9]}, {"model.horizon.periods": [3, 4]}):
        with pytest.raises(InvalidDocument) as caught:
            sweeps.parse_request({"base": base, "vary": vary, "chain": True}, settings)
        assert [f["path"] for f in caught.value.errors] == ["chain"]
        assert "terminal value" in caught.value.errors[0]["message"]
    infinite = machine_shop()
    with pytest.raises(InvalidDocument) as caught:
        sweeps.parse_request({"base": infinite, "vary": {"model.horizon": [None, {"periods": 3}]}, "chain": True},
                             settings)
    assert [f["path"] for f in caught.value.errors] == ["chain"]
    sweeps.parse_request({"base": base, "vary": {"discount": [0.8, 0.9]}}, settings)  # no chain: fine
    sweeps.parse_request({"base": infinite, "vary": {"discount": [0.8, 0.9]}, "chain": True}, settings)


def test_a_sweep_queues_one_tagged_job_per_combination(http: httpx.Client, store: JobStore) -> None:
    sweep = post_sweep(http, vary={"discount": [0.8, 0.9], "model.reward[0][1]": [-1.0, -2.0]}, tags=["calib"],
                       label="shop calibration", priority="low")  # fmt: skip
    assert sweep["combinations"] == 4 and sweep["state"] == "active" and sweep["counts"]["queued"] == 4
    assert sweep["tag"] == f"sweep:{sweep['id']}" and sweep["priority"] == "low"
    rows = sweep["rows"]["data"]
    assert [row["values"] for row in rows][1] == {"discount": 0.8, "model.reward[0][1]": -2.0}
    assert all(row["state"] == "queued" and row["job"] for row in rows)
    assert store.queue_depths()["low"] == 4
    listed = http.get("/v1/jobs", params={"tag": sweep["tag"]}).json()["data"]
    assert {job["id"] for job in listed} == {row["job"] for row in rows}
    job = store.get_job(rows[3]["job"])
    assert job["tags"] == ["shop", "calib", sweep["tag"]] and job["priority"] == "low"
    assert job["label"].startswith("shop calibration · discount=0.9")
    document = store.get_document(rows[3]["job"])
    assert document["discount"] == 0.9 and document["model"]["reward"][0] == [3.0, -2.0]


def test_rows_report_iterations_bounds_means_and_a_csv_table(http: httpx.Client, store: JobStore) -> None:
    sweep = post_sweep(http, vary={"discount": [0.8, 0.9, 0.95]})
    view = run_all(http, store, sweep["id"])
    assert view["state"] == "done" and view["counts"]["done"] == 3
    for row in view["rows"]["data"]:
        result = store.get_result(row["job"])
        assert row["status"] == result["status"] == "converged"
        assert row["iterations"] == result["iterations"] and row["error_bound"] == result["error_bound"]
        assert row["means"] == result["stationary"]["means"]
    # A more patient owner runs the machine longer before repairing it: the same
    # document solved in process gives the same means.
    reference = solve(machine_shop(discount=0.95))
    assert view["rows"]["data"][2]["means"] == pytest.approx(reference["stationary"]["means"], rel=1e-9)

    response = http.get(f"/v1/sweeps/{sweep['id']}", params={"format": "csv"})
    assert response.status_code == 200 and response.headers["content-type"].startswith("text/csv")
    table = list(csv.reader(io.StringIO(response.text)))
    assert table[0] == ["index", "discount", "job", "state", "status", "iterations", "error_bound",
                        "mean.state_label", "mean.action", "error"]  # fmt: skip
    assert [line[1] for line in table[1:]] == ["0.8", "0.9", "0.95"]
    assert float(table[3][7]) == pytest.approx(view["rows"]["data"][2]["means"]["state_label"])


def test_rows_are_paginated(http: httpx.Client) -> None:
    sweep = post_sweep(http, vary={"discount": [0.8, 0.85, 0.9, 0.95, 0.97]})
    first = http.get(f"/v1/sweeps/{sweep['id']}", params={"limit": 2}).json()["rows"]
    assert [row["index"] for row in first["data"]] == [0, 1] and first["next"] == 2
    last = http.get(f"/v1/sweeps/{sweep['id']}", params={"limit": 2, "cursor": 4}).json()["rows"]
    assert [row["index"] for row in last["data"]] == [4] and last["next"] is None


def test_a_sweep_of_searches_shows_each_row_s_answer_and_means(http: httpx.Client, store: JobStore) -> None:
    # Before, a row of a search sweep had means null (the sweep kept means only with report.stationary, which a
    # search's result carries anyway) and no word of what the search found: the interest rate of each row could
    # be read only from each job.  Invented households (tests/_documents.py) clearing a capital market.
    base = {"version": 1, "discount": 0.95, "model": savings_market(), "solver": {"tolerance": 1e-9},
            "search": {"unknowns": {"r": {"min": 0.0, "max": 0.05}}, "conditions": ["mean(a) - capital_demand"],
                       "tolerance": 1e-6}}
    response = http.post("/v1/sweeps", json={"base": base, "vary": {"model.params.alpha": [0.33, 0.36]}})
    assert response.status_code == 202, response.text
    view = run_all(http, store, response.json()["id"])
    assert view["counts"]["done"] == 2
    for row in view["rows"]["data"]:
        result, record = store.get_result(row["job"]), store.get_job(row["job"])
        assert row["means"] == result["stationary"]["means"]
        assert row["search"] == record["search"] and row["search"]["status"] == "converged"
        assert row["search"]["unknowns"] == result["search"]["unknowns"]
    table = http.get(f"/v1/sweeps/{response.json()['id']}", params={"format": "csv"}).text
    lines = list(csv.reader(io.StringIO(table)))
    assert lines[0][-3:] == ["search.status", "search.r", "error"]
    found = [float(line[-2]) for line in lines[1:]]
    assert found == [row["search"]["unknowns"]["r"] for row in view["rows"]["data"]]
    assert found[0] != found[1]  # a smaller capital share clears at another rate


def test_a_refused_combination_names_its_vary_entry_and_creates_nothing(http: httpx.Client, store: JobStore) -> None:
    body = {"base": machine_shop(), "vary": {"discount": [0.9, 1.5], "model.reward[0][1]": [-1.0, -2.0]}}
    problem = assert_problem(http.post("/v1/sweeps", json=body), 422)
    faults = {error["path"]: error["message"] for error in problem["errors"]}
    assert list(faults) == ["vary.discount[1]"]
    assert faults["vary.discount[1]"].startswith("discount: the discount factor must lie strictly between 0 and 1")
    assert "in 2 of 4 combinations; first #2" in faults["vary.discount[1]"]
    assert store.counts_by_state()["queued"] == 0 and store.queue_depths()["normal"] == 0
    assert http.get("/v1/sweeps").json()["data"] == []


def test_a_varied_horizon_beside_a_stationary_report_is_refused_at_its_vary_entry(
    http: httpx.Client, store: JobStore
) -> None:
    # Before, the combination with a horizon was queued and its result carried only a note that a finite horizon
    # has no stationary distribution; it is now refused like report.cohort without a horizon.
    body = {"base": machine_shop(), "vary": {"model.horizon": [None, {"periods": 3}]}}
    problem = assert_problem(http.post("/v1/sweeps", json=body), 422)
    faults = {error["path"]: error["message"] for error in problem["errors"]}
    assert list(faults) == ["base.report.stationary"]  # the base's field, in the combinations with a horizon
    message = faults["base.report.stationary"]
    assert message.startswith("a model with a finite horizon") and "report.cohort" in message
    assert 'in 1 of 2 combinations; first #1: model.horizon={"periods":3}' in message
    assert store.counts_by_state()["queued"] == 0


def test_faults_outside_the_varied_paths_are_named_in_the_base(http: httpx.Client) -> None:
    base = machine_shop()
    base["model"]["transition"][0][0] = [0.5, 0.6, 0.0]
    problem = assert_problem(http.post("/v1/sweeps", json={"base": base, "vary": {"discount": [0.8, 0.9]}}), 422)
    paths = [error["path"] for error in problem["errors"]]
    assert paths and all(path.startswith("base.model.transition[0][0]") for path in paths)
    assert "in 2 of 2 combinations" in problem["errors"][0]["message"]


@pytest.mark.parametrize(
    ("body", "path", "words"),
    [
        ({"vary": {}}, "vary", "required"),
        ({"vary": {"discount": []}}, "vary.discount", "non-empty list"),
        ({"vary": {"tags": [["a"]]}}, "vary.tags", "whole sweep"),
        ({"vary": {"notify.url": ["http://x"]}}, "vary.notify.url", "whole sweep"),
        ({"vary": {"solver.initial": ["zeros"]}, "chain": True}, "vary.solver.initial", "set by the chain"),
        ({"vary": {"model.reward[7][0]": [1.0]}}, "vary.model.reward[7][0]", "has 3 items"),
        ({"vary": {"discount.x": [1.0]}}, "vary.discount.x", "not an object"),
        ({"vary": {"model": [{}], "model.kind": ["grid"]}}, "vary.model.kind", "overlaps"),
        ({"vary": {"a[": [1]}}, "vary.a[", "not a path"),
        ({"vary": {"discount": [0.8, 0.9], "solver.tolerance": [1e-6]}, "mode": "zip"}, "vary", "same length"),
        ({"vary": {"discount": [0.9]}, "mode": "grid"}, "mode", "product"),
        ({"vary": {"discount": [0.9]}, "chain": "yes"}, "chain", "true or false"),
        ({"vary": {"discount": [0.9]}, "colour": "red"}, "colour", "unknown key"),
        ({"vary": {"discount": [0.9]}, "tags": ["no spaces"]}, "tags[0]", "a tag must be"),
        ({"vary": {"discount": [0.9]}, "tags": [f"t{i}" for i in range(31)]}, "tags", "at most 32"),
        ({"vary": {"discount": [0.9]}, "priority": "urgent"}, "priority", "high"),
    ],
)
def test_malformed_sweep_requests_are_422_naming_the_field(
    http: httpx.Client, body: dict, path: str, words: str
) -> None:
    problem = assert_problem(http.post("/v1/sweeps", json={"base": machine_shop(), **body}), 422)
    messages = {error["path"]: error["message"] for error in problem["errors"]}
    assert path in messages and words in messages[path], messages


def test_a_sweep_without_a_base_is_422(http: httpx.Client) -> None:
    problem = assert_problem(http.post("/v1/sweeps", json={"vary": {"discount": [0.9]}}), 422)
    assert problem["errors"][0]["path"] == "base"


def test_a_sweep_over_the_combination_cap_is_413_naming_the_setting(app_settings: Settings, redis_client) -> None:
    app = create_app(app_settings.model_copy(update={"sweep_max_combinations": 4}))
    with make_client(app) as http:
        body = {"base": machine_shop(), "vary": {"discount": [0.8, 0.9, 0.95], "solver.tolerance": [1e-6, 1e-7]}}
        problem = assert_problem(http.post("/v1/sweeps", json=body), 413)
        assert problem["errors"][0]["path"] == "vary"
        assert "6 combinations" in problem["detail"] and "sweep_max_combinations = 4" in problem["detail"]
        small = {"base": machine_shop(), "vary": {"discount": [0.8, 0.9]}}
        assert http.post("/v1/sweeps", json=small).status_code == 202


def test_a_sweep_whose_documents_exceed_the_storage_cap_is_413(app_settings: Settings, redis_client) -> None:
    app = create_app(app_settings.model_copy(update={"sweep_max_documents_mb": 0.001}))
    with make_client(app) as http:
        body = {"base": machine_shop(), "vary": {"discount": [0.8, 0.9, 0.95]}}
        problem = assert_problem(http.post("/v1/sweeps", json=body), 413)
        assert problem["errors"][0]["path"] == "base" and "sweep_max_documents_mb" in problem["detail"]


def test_a_webhook_in_the_base_is_refused_unless_allowlisted(http: httpx.Client, store: JobStore) -> None:
    base = machine_shop(notify={"url": "http://127.0.0.1:9/hook", "secret": "s"})
    problem = assert_problem(http.post("/v1/sweeps", json={"base": base, "vary": {"discount": [0.8, 0.9]}}), 422)
    assert problem["errors"][0]["path"] == "base.notify.url"
    assert "notify_allow_hosts is empty" in problem["errors"][0]["message"]
    assert store.counts_by_state()["queued"] == 0


def test_a_chain_creates_each_job_once_its_predecessor_finished(http: httpx.Client, store: JobStore) -> None:
    sweep = post_sweep(http, vary={"discount": [0.9, 0.92], "model.reward[0][0]": [3.0, 3.2]}, chain=True)
    rows = sweep["rows"]["data"]
    assert [row["state"] for row in rows] == ["queued", "waiting", "waiting", "waiting"]
    assert [row["after"] for row in rows] == [None, 0, 0, 2]
    assert rows[1]["job"] is None and sweep["counts"]["waiting"] == 3
    root = rows[0]["job"]
    assert store.get_document(root).get("solver", {}).get("initial", "zeros") == "zeros"
    assert run_inline(store, root) == "done"
    view = http.get(f"/v1/sweeps/{sweep['id']}").json()
    assert [row["state"] for row in view["rows"]["data"]] == ["done", "queued", "queued", "waiting"]
    view = run_all(http, store, sweep["id"])
    assert view["state"] == "done"
    jobs = [row["job"] for row in view["rows"]["data"]]
    for index, before in ((1, 0), (2, 0), (3, 2)):
        assert store.get_document(jobs[index])["solver"]["initial"] == {"job": jobs[before]}
        assert store.get_job(jobs[index])["started_at"] >= store.get_job(jobs[before])["finished_at"]
    # A warm start from the neighbouring calibration needs fewer Bellman steps than the cold root.
    iterations = [row["iterations"] for row in view["rows"]["data"]]
    assert all(n < iterations[0] for n in iterations[1:]), iterations
    # Warm or cold, each value function lies within its certified bound of the fixed point.
    for row in view["rows"]["data"][1:]:
        cold = solve(store.get_document(row["job"]) | {"solver": {"method": "value_iteration", "tolerance": 1e-8}})
        warm = store.get_result(row["job"])
        gap = max(abs(a - b) for a, b in zip(warm["value"], cold["value"]))
        assert gap <= warm["error_bound"] + cold["error_bound"]


def test_a_chain_goes_on_cold_after_a_canceled_predecessor(http: httpx.Client, store: JobStore) -> None:
    sweep = post_sweep(http, vary={"discount": [0.9, 0.92]}, chain=True)
    root = sweep["rows"]["data"][0]["job"]
    # Canceled in its queue: no worker sees it end, so the reaper's next pass takes the chain on.
    assert http.delete(f"/v1/jobs/{root}").json()["state"] == "canceled"
    reap(store, use_lock=False)
    view = http.get(f"/v1/sweeps/{sweep['id']}").json()
    second = view["rows"]["data"][1]
    assert second["state"] == "queued"
    assert store.get_document(second["job"])["solver"] == machine_shop()["solver"]
    assert view["state"] == "active" and view["counts"] == {"waiting": 0, "queued": 1, "running": 0, "done": 0,
                                                           "failed": 0, "canceled": 1}  # fmt: skip


def test_delete_cancels_the_remaining_jobs_and_starts_no_more(http: httpx.Client, store: JobStore) -> None:
    sweep = post_sweep(http, vary={"discount": [0.9, 0.92, 0.94]}, chain=True)
    root = sweep["rows"]["data"][0]["job"]
    response = http.delete(f"/v1/sweeps/{sweep['id']}")
    assert response.status_code == 200
    view = response.json()
    assert view["state"] == "canceled" and view["canceled_at"]
    assert [row["state"] for row in view["rows"]["data"]] == ["canceled"] * 3
    assert store.get_job(root)["state"] == "canceled" and store.queue_depths()["normal"] == 0
    again = http.get(f"/v1/sweeps/{sweep['id']}").json()
    assert [row["job"] for row in again["rows"]["data"]] == [root, None, None]


def test_delete_asks_running_jobs_to_stop(http: httpx.Client, store: JobStore) -> None:
    sweep = post_sweep(http, vary={"discount": [0.9, 0.92]})
    job_id = sweep["rows"]["data"][0]["job"]
    assert store.claim(job_id, "token", worker="test:1") == "ok"
    response = http.delete(f"/v1/sweeps/{sweep['id']}")
    assert response.status_code == 202
    states = [row["state"] for row in response.json()["rows"]["data"]]
    assert states == ["running", "canceled"]
    assert store.stop_signals(job_id, "token") == (True, True)


def test_another_owner_sees_404_and_an_admin_sees_all(app_settings: Settings, redis_client) -> None:
    def app_for(caller: Caller) -> FastAPI:
        app = create_app(app_settings)
        app.dependency_overrides[current_owner] = lambda: caller
        return app

    with make_client(app_for(Caller("alice"))) as alice, make_client(app_for(Caller("bob"))) as bob, \
            make_client(app_for(Caller("root", admin=True))) as admin:  # fmt: skip
        sweep = post_sweep(alice, vary={"discount": [0.9, 0.92]})
        assert sweep["owner"] == "alice"
        path = f"/v1/sweeps/{sweep['id']}"
        assert_problem(bob.get(path), 404)
        assert_problem(bob.delete(path), 404)
        assert bob.get("/v1/sweeps").json()["data"] == []
        assert bob.get("/v1/jobs", params={"tag": sweep["tag"]}).json()["data"] == []
        assert admin.get(path).status_code == 200
        assert [s["id"] for s in admin.get("/v1/sweeps").json()["data"]] == [sweep["id"]]
        assert all(alice.get(f"/v1/jobs/{row['job']}").json()["owner"] == "alice" for row in sweep["rows"]["data"])


def test_unknown_and_malformed_sweep_ids_are_404(http: httpx.Client) -> None:
    assert_problem(http.get("/v1/sweeps/0123456789abcdef"), 404)
    assert_problem(http.get("/v1/sweeps/not-an-id"), 404)
    assert_problem(http.delete("/v1/sweeps/0123456789abcdef"), 404)


def test_the_list_is_newest_first_and_paginated(http: httpx.Client) -> None:
    ids = [post_sweep(http, vary={"discount": [0.9]})["id"] for _ in range(3)]
    first = http.get("/v1/sweeps", params={"limit": 2}).json()
    assert [s["id"] for s in first["data"]] == ids[::-1][:2] and first["next"]
    assert "rows" not in first["data"][0]
    rest = http.get("/v1/sweeps", params={"limit": 2, "cursor": first["next"]}).json()
    assert [s["id"] for s in rest["data"]] == [ids[0]] and rest["next"] is None
    assert_problem(http.get("/v1/sweeps", params={"cursor": "garbage"}), 400)


def test_an_idempotency_key_returns_the_same_sweep(http: httpx.Client, store: JobStore) -> None:
    body = {"base": machine_shop(), "vary": {"discount": [0.9, 0.92]}}
    first = http.post("/v1/sweeps", json=body, headers={"Idempotency-Key": "nightly-42"}).json()
    second = http.post("/v1/sweeps", json=body, headers={"Idempotency-Key": "nightly-42"}).json()
    assert first["id"] == second["id"] and store.counts_by_state()["queued"] == 2
    # The same key with another body is refused naming the header, as for a job (before: the earlier
    # sweep was answered as if it were this one, and the new values were never solved).
    other = {"base": machine_shop(), "vary": {"discount": [0.5, 0.6, 0.7]}}
    problem = assert_problem(http.post("/v1/sweeps", json=other, headers={"Idempotency-Key": "nightly-42"}), 422)
    assert problem["errors"][0]["path"] == "header.Idempotency-Key" and problem["sweep"] == first["id"]
    assert store.counts_by_state()["queued"] == 2 and len(http.get("/v1/sweeps").json()["data"]) == 1


def test_a_chain_starts_cold_when_the_predecessor_result_has_expired(
    http: httpx.Client, store: JobStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    sweep = post_sweep(http, vary={"discount": [0.9, 0.92]}, chain=True)
    root = sweep["rows"]["data"][0]["job"]
    with monkeypatch.context() as patch:
        patch.setattr(sweeps, "job_finished", lambda store, job_id: None)  # the hook did not run
        assert run_inline(store, root) == "done"
    store.redis.delete(store.keys.result(root))
    assert http.get(f"/v1/sweeps/{sweep['id']}").json()["rows"]["data"][1]["state"] == "waiting"  # a read never writes
    reap(store, use_lock=False)
    second = http.get(f"/v1/sweeps/{sweep['id']}").json()["rows"]["data"][1]
    assert second["state"] == "queued"
    assert store.get_document(second["job"])["solver"] == machine_shop()["solver"]


def test_a_redis_failure_while_creating_jobs_leaves_the_sweep_canceled(
    http: httpx.Client, store: JobStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    real = sweep_creation.ensure_job
    calls = []

    def failing(sweep, index, **kwargs):
        calls.append(index)
        if len(calls) == 2:
            raise redis.ConnectionError("Redis went away")
        return real(sweep, index, **kwargs)

    monkeypatch.setattr(sweep_creation, "ensure_job", failing)
    response = http.post("/v1/sweeps", json={"base": machine_shop(), "vary": {"discount": [0.9, 0.92, 0.94]}})
    assert_problem(response, 503)
    monkeypatch.setattr(sweep_creation, "ensure_job", real)
    (listed,) = http.get("/v1/sweeps").json()["data"]
    view = http.get(f"/v1/sweeps/{listed['id']}").json()
    assert view["state"] == "canceled" and [row["state"] for row in view["rows"]["data"]] == ["canceled"] * 3
    assert store.counts_by_state()["queued"] == 0 and store.queue_depths()["normal"] == 0


def test_the_finish_hook_ignores_executions_that_did_not_finish_and_never_raises(
    store: JobStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    seen = []

    def broken(store, job_id):
        raise redis.ConnectionError("Redis went away")

    monkeypatch.setattr(lifecycle.webhooks, "schedule", broken)
    monkeypatch.setattr(lifecycle.sweeps, "job_finished", lambda store, job_id: seen.append(job_id))
    for outcome in ("busy", "terminal", "missing", "lease_lost", "redis_error"):
        lifecycle.job_finished(store, "0123456789abcdef", outcome)
    assert seen == []
    lifecycle.job_finished(store, "0123456789abcdef", "failed")
    assert seen == ["0123456789abcdef"]


def test_the_reaper_creates_rows_the_door_left_behind_once_it_is_gone(http: httpx.Client, store: JobStore) -> None:
    sweep = post_sweep(http, vary={"discount": [0.9, 0.92]})
    keys = f"fixq:sweep:{sweep['id']}"
    lost = sweep["rows"]["data"][1]["job"]
    store.request_cancel(lost)
    store.redis.hdel(f"{keys}:jobs", 1)  # as if the API died before creating row 1
    store.redis.set(f"{keys}:door", "1", px=60_000)  # ... while its door marker still lives
    reap(store, use_lock=False)
    assert http.get(f"/v1/sweeps/{sweep['id']}").json()["rows"]["data"][1]["state"] == "waiting"
    store.redis.delete(f"{keys}:door")
    assert http.get(f"/v1/sweeps/{sweep['id']}").json()["rows"]["data"][1]["state"] == "waiting"  # a read never writes
    reap(store, use_lock=False)
    row = http.get(f"/v1/sweeps/{sweep['id']}").json()["rows"]["data"][1]
    assert row["state"] == "queued" and row["job"] not in (None, lost)
    assert store.get_document(row["job"])["discount"] == 0.92
    # Every row has its job now: the next pass settles the sweep, and later passes skip it.
    assert store.redis.sismember("fixq:sweeps:pending", sweep["id"])
    reap(store, use_lock=False)
    assert not store.redis.sismember("fixq:sweeps:pending", sweep["id"])


@pytest.mark.parametrize(
    "body",
    [
        {"base": machine_shop(tags=[{"a": 1}, ["b"]]), "vary": {"discount": [0.9]}},
        {"base": machine_shop(), "vary": {"discount": [0.9]}, "tags": [{"a": 1}], "label": ["x"]},
        {"base": machine_shop(), "vary": {"discount": [0.9]}, "mode": ["zip"], "priority": {"p": 1}},
        {"base": machine_shop(label=7, priority=3), "vary": {"discount": [0.9]}},
        {"base": [], "vary": []},
        {"base": machine_shop(), "vary": {"model.reward[0]": [{"deep": [[[1]]]}], "solver": [None]}},
        {"base": machine_shop(), "vary": {"discount": [[0.9], "0.9", None, True, {"x": 1}]}},
        {"base": machine_shop(notify="http://x"), "vary": {"discount": [0.9]}},
    ],
)
def test_hostile_sweep_requests_are_4xx_never_5xx(http: httpx.Client, body: dict) -> None:
    response = http.post("/v1/sweeps", json=body)
    assert 400 <= response.status_code < 500, response.text
    assert response.headers["content-type"] == PROBLEM_JSON


def test_a_sweep_takes_active_job_slots_and_is_refused_over_the_cap(app_settings: Settings, redis_client) -> None:
    # The per-key cap on queued + running jobs holds for sweeps as for single jobs.
    settings = app_settings.model_copy(update={"max_active_jobs": 3})
    with make_client(create_app(settings)) as client:
        vary = {"discount": [0.9, 0.91, 0.92, 0.93]}
        too_many = client.post("/v1/sweeps", json={"base": machine_shop(), "vary": vary})
        assert too_many.status_code == 429, too_many.text
        assert too_many.headers["content-type"].startswith(PROBLEM_JSON)
        assert "max_active_jobs" in too_many.text
        fits = client.post("/v1/sweeps", json={"base": machine_shop(), "vary": {"discount": vary["discount"][:3]}})
        assert fits.status_code == 202, fits.text
        one_more = client.post("/v1/jobs", json=machine_shop(discount=0.95))
        assert one_more.status_code == 429, one_more.text


def test_jobs_a_chain_makes_later_count_among_the_owners_active_jobs(http: httpx.Client, store: JobStore) -> None:
    from service.limits import ActiveJobs

    sweep = post_sweep(http, vary={"discount": [0.9, 0.92]}, chain=True)
    first = [row["job"] for row in http.get(f"/v1/sweeps/{sweep['id']}").json()["rows"]["data"] if row["job"]]
    assert len(first) == 1
    assert run_inline(store, first[0]) == "done"
    rows = http.get(f"/v1/sweeps/{sweep['id']}").json()["rows"]["data"]
    successor = rows[1]["job"]
    assert successor and rows[1]["state"] == "queued"
    active = ActiveJobs(store.redis, store.settings.redis_prefix)
    assert store.redis.zscore(active.active_key("anonymous"), successor) is not None
    assert active.usage("anonymous")[0] == 1


def finished_root_without_hook(
    http: httpx.Client, store: JobStore, monkeypatch: pytest.MonkeyPatch, rows: int = 2
) -> dict:
    """A chain whose root is done while its finish hook did not run: row 1 is due and has no job."""
    sweep = post_sweep(http, vary={"discount": [0.9 + 0.005 * i for i in range(rows)]}, chain=True)
    with monkeypatch.context() as patch:
        patch.setattr(sweeps, "job_finished", lambda store, job_id: None)
        assert run_inline(store, sweep["rows"]["data"][0]["job"]) == "done"
    return sweep


def test_concurrent_creators_of_one_row_make_one_job(
    http: httpx.Client, store: JobStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    rows, creators = 10, 6
    sweep = finished_root_without_hook(http, store, monkeypatch, rows=rows)
    jobs_key = f"fixq:sweep:{sweep['id']}:jobs"
    barrier = threading.Barrier(creators)
    made: list[tuple[int, str | None]] = []

    def create() -> None:
        # Every creator races for every row in turn, retrying as overlapping hooks and reaper
        # passes would, until the row is recorded.
        mine = sweeps.load_sweep(store, sweep["id"])
        for index in range(1, rows):
            barrier.wait()
            for _ in range(200):
                made.append((index, sweeps.ensure_job(mine, index)))
                if store.redis.hexists(jobs_key, index):
                    break

    threads = [threading.Thread(target=create) for _ in range(creators)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    created = {index: job_id for index, job_id in made if job_id is not None}
    assert len([job_id for _, job_id in made if job_id is not None]) == rows - 1 == len(created)
    recorded = {int(k): v.decode() for k, v in store.redis.hgetall(jobs_key).items()}
    assert recorded == {0: sweep["rows"]["data"][0]["job"], **created}
    jobs, _ = store.list_jobs(tag=sweep["tag"], limit=100)
    assert sorted(job["id"] for job in jobs if job["state"] == "queued") == sorted(created.values())
    assert len(store.redis.lrange(rq_queues.queue_key("normal"), 0, -1)) == rows - 1


def test_a_creator_whose_claim_lapsed_leaves_the_row_to_the_one_that_recorded_it(
    http: httpx.Client, store: JobStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    sweep = finished_root_without_hook(http, store, monkeypatch)
    claim = f"fixq:sweep:{sweep['id']}:claim:1"
    real = sweep_creation.create_submitted_job
    late: list[str | None] = []
    calls = []

    def slow_create(*args, **kwargs):
        calls.append(1)
        if len(calls) == 1:
            # The first creator stalls past its claim; a second one arrives, creates and records the row.
            store.redis.delete(claim)
            late.append(sweeps.ensure_job(sweeps.load_sweep(store, sweep["id"]), 1))
        return real(*args, **kwargs)

    monkeypatch.setattr(sweep_creation, "create_submitted_job", slow_create)
    assert sweeps.ensure_job(sweeps.load_sweep(store, sweep["id"]), 1) is None
    (winner,) = late
    assert winner is not None and len(calls) == 2
    assert store.redis.hget(f"fixq:sweep:{sweep['id']}:jobs", 1) == winner.encode()
    jobs, _ = store.list_jobs(tag=sweep["tag"])
    states = {job["id"]: job["state"] for job in jobs}
    assert [job_id for job_id, state in states.items() if state == "queued"] == [winner]
    assert sorted(states.values()) == ["canceled", "done", "queued"]
    assert store.redis.lrange(rq_queues.queue_key("normal"), 0, -1) == [f"{winner}-1".encode()]
    assert not store.redis.exists(claim)



FOUR_AXES = {"discount": [0.9, 0.91], "model.reward[0][0]": [3.0, 3.1], "model.reward[1][0]": [2.0, 2.1],
             "model.reward[0][1]": [-1.0, -1.1]}  # fmt: skip
"""A chain over four axes of two values: the root has four successors, which want to run at once."""


def capped_everywhere(app_settings: Settings, monkeypatch: pytest.MonkeyPatch, cap: int) -> Settings:
    """The API's settings with ``max_active_jobs`` = ``cap``, which the executions in this process read too."""
    monkeypatch.setenv("FIXQ_MAX_ACTIVE_JOBS", str(cap))
    get_settings.cache_clear()
    return app_settings.model_copy(update={"max_active_jobs": cap})


def test_a_chain_stays_within_the_owners_active_job_cap(
    app_settings: Settings, redis_client, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Capped at 3, the rows past the cap wait in the sweep and are created as slots free, none refused.
    settings = capped_everywhere(app_settings, monkeypatch, 3)
    store = JobStore(redis_client, settings)
    with make_client(create_app(settings)) as client:
        sweep = post_sweep(client, vary=FOUR_AXES, chain=True)
        most_active = 0
        for _ in range(40):
            rows = client.get(f"/v1/sweeps/{sweep['id']}", params={"limit": 100}).json()["rows"]["data"]
            active = [row["job"] for row in rows if row["state"] in ("queued", "running")]
            most_active = max(most_active, len(active))
            if not active:
                break
            assert run_inline(store, active[0]) == "done"
        assert [row["state"] for row in rows] == ["done"] * 16
        assert most_active == 3


def test_a_chain_row_held_back_by_the_cap_is_created_when_another_job_of_the_owner_ends(
    app_settings: Settings, redis_client, monkeypatch: pytest.MonkeyPatch
) -> None:
    settings = capped_everywhere(app_settings, monkeypatch, 2)
    store = JobStore(redis_client, settings)
    with make_client(create_app(settings)) as client:
        # Rows (0,0) → (0,1) and (1,0); (1,0) → (1,1).
        sweep = post_sweep(client, vary={"discount": [0.9, 0.92], "model.reward[0][0]": [3.0, 3.2]}, chain=True)
        other = client.post("/v1/jobs", json=machine_shop(discount=0.95)).json()["id"]
        root = client.get(f"/v1/sweeps/{sweep['id']}").json()["rows"]["data"][0]["job"]
        assert run_inline(store, root) == "done"
        rows = client.get(f"/v1/sweeps/{sweep['id']}").json()["rows"]["data"]
        # The root's slot went to one successor; the other waits, with no job, not refused.
        assert rows[0]["state"] == "done" and rows[3]["state"] == "waiting"
        assert sorted(row["state"] for row in rows[1:3]) == ["queued", "waiting"]
        assert [row["job"] is None and row.get("error") is None for row in rows[1:3]].count(True) == 1
        assert run_inline(store, other) == "done"
        rows = client.get(f"/v1/sweeps/{sweep['id']}").json()["rows"]["data"]
        assert [row["state"] for row in rows] == ["done", "queued", "queued", "waiting"]


def test_a_sweep_over_the_cap_is_refused_before_any_combination_is_validated(
    app_settings: Settings, redis_client, monkeypatch: pytest.MonkeyPatch
) -> None:
    admitted: list[int] = []
    real = sweep_creation.admit_submission

    def counting(*args, **kwargs):
        admitted.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(sweep_creation, "admit_submission", counting)
    settings = app_settings.model_copy(update={"max_active_jobs": 3})
    with make_client(create_app(settings)) as client:
        vary = {"discount": [0.9 + 0.001 * i for i in range(20)]}
        too_many = client.post("/v1/sweeps", json={"base": machine_shop(), "vary": vary})
        assert too_many.status_code == 429, too_many.text
        assert admitted == []
        # The slots were given back: a sweep that fits is admitted, each combination once.
        fits = client.post("/v1/sweeps", json={"base": machine_shop(), "vary": {"discount": vary["discount"][:3]}})
        assert fits.status_code == 202, fits.text
        assert len(admitted) == 3


def _admission(raw: dict, settings: Settings, like=None) -> tuple:
    """What the door makes of ``raw``: the summary and feasibility (less its timing), or the faults."""
    try:
        admitted = submission.admit_submission(raw, settings, None, may_see=lambda record: True,
                                               check_notify=False, like=like)  # fmt: skip
    except FixqError as exc:
        return ("refused", type(exc).__name__, exc.errors)
    feasibility = {k: v for k, v in (admitted.feasibility or {}).items() if k != "seconds"}
    return ("admitted", submission.admitted_summary(admitted), feasibility)


@pytest.mark.parametrize(
    ("base", "vary"),
    [
        (machine_shop(), {"discount": [0.9, 0.5, 1.5]}),
        (machine_shop(), {"model.reward[0][0]": [3.0, "x", 4.0], "solver.tolerance": [1e-6, -1.0]}),
        (grid_document(GROWTH), {"model.params.gamma": [2.0, 1.5, "x"], "solver.tolerance": [1e-6, -1]}),
        (grid_document(TWO_CHOICES), {"discount": [0.95, 0.9, 1.0]}),
        (grid_document(LQ), {"model.states.x.points": [41, 11, 1]}),
        (grid_document(LQ, initial={"values": [0.0] * 41}), {"model.states.x.points": [41, 11]}),
    ],
)
def test_each_combination_validated_like_the_first_admits_exactly_as_a_full_validation(
    settings: Settings, base: dict, vary: dict
) -> None:
    request = sweeps.parse_request({"base": base, "vary": vary}, settings)
    documents = [request.document(i, sweep_id="0123456789abcdef") for i in range(request.count)]
    first = submission.admit_submission(documents[0], settings, None, may_see=lambda r: True, check_notify=False)
    for raw in documents[1:]:
        assert _admission(raw, settings, like=(documents[0], first)) == _admission(raw, settings)


def test_a_sweep_of_a_finite_horizon_may_vary_the_discount_past_one(http: httpx.Client, store: JobStore) -> None:
    base = machine_shop()
    base["model"]["horizon"] = {"periods": 12}
    base.pop("report", None)
    discounts = [0.9, 1.0, 1.05]
    response = http.post("/v1/sweeps", json={"base": base, "vary": {"discount": discounts}})
    assert response.status_code == 202, response.text
    view = run_all(http, store, response.json()["id"])
    assert view["state"] == "done" and view["counts"]["done"] == 3
    for row, discount in zip(sorted(view["rows"]["data"], key=lambda row: row["index"]), discounts):
        result = store.get_result(row["job"])
        assert result["method"] == "backward_induction" and row["iterations"] == 12
        assert result["value"] == solve({**base, "discount": discount})["value"]
