"""``/v1/check``, ``/v1/schema``, ``/healthz``, ``/metrics`` and the app's own answers, in process."""

from __future__ import annotations

import subprocess
import sys
import types

import httpx
import redis
from prometheus_client.parser import text_string_to_metric_families

from service.app import create_app
from service.embedded_redis import free_port
from service.settings import Settings
from service.store import JobStore
from tests._documents import machine_shop, plant_capacity
from tests.service._http import assert_problem, make_client, run_inline, submit
from worker.document import json_schema
from worker.errors import InfeasibleModel


def test_check_validates_and_estimates_without_queueing(client: httpx.Client, store: JobStore) -> None:
    response = client.post("/v1/check", json=machine_shop())
    assert response.status_code == 200
    body = response.json()
    assert body["valid"] is True
    assert body["estimate"]["points"] == 3 and body["estimate"]["bytes"] > 0 and body["estimate"]["seconds"] >= 0
    assert len(body["document_hash"]) == 64
    assert store.counts_by_state() == {"queued": 0, "running": 0, "done": 0, "failed": 0, "canceled": 0}
    assert store.queue_depths() == {"high": 0, "normal": 0, "low": 0}


def test_check_names_faults_like_submit(client: httpx.Client) -> None:
    document = machine_shop()
    document["model"]["reward"][2] = [None, None]
    checked = assert_problem(client.post("/v1/check", json=document), 422)
    submitted = assert_problem(client.post("/v1/jobs", json=document), 422)
    assert checked["errors"] == submitted["errors"]
    assert checked["type"] == "urn:fixq:problem:infeasible-model"
    assert any(error["path"].startswith("model.reward[2]") for error in checked["errors"])


def test_check_of_a_grid_document_needs_no_numba() -> None:
    # The service validates and estimates; the kernels load only in workers.
    code = """
import json, sys
from service.admission import admit
from service.settings import Settings
doc = json.load(open("service/examples/plant_capacity.json"))
admitted = admit(doc, Settings(redis_url="redis://127.0.0.1:1/0"))
import service.app
assert admitted.estimate["points"] > 0
print("numba" in sys.modules)
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_schema_is_the_schema_modules_2020_12_schema(client: httpx.Client) -> None:
    response = client.get("/v1/schema")
    assert response.status_code == 200
    assert response.headers["content-type"] == "application/schema+json"
    schema = response.json()
    assert schema == json_schema()
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"


def test_healthz_reports_redis(client: httpx.Client, app_settings: Settings) -> None:
    response = client.get("/healthz")
    assert response.status_code == 200
    assert response.json()["status"] == "ok" and response.json()["redis"] == "ok"
    dead = create_app(app_settings.model_copy(update={"redis_url": f"redis://127.0.0.1:{free_port()}/0"}))
    with make_client(dead) as http:
        down = http.get("/healthz")
    assert down.status_code == 503 and down.json()["redis"] == "unreachable"


def metric_samples(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    samples = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            samples[(sample.name, tuple(sorted(sample.labels.items())))] = sample.value
    return samples


def test_metrics_count_jobs_queues_and_solves_without_job_contents(client: httpx.Client, store: JobStore) -> None:
    done = submit(client, machine_shop(label="secret plant (invented)"))
    run_inline(done["id"])
    # Other discounts: the same document again would reuse the done job's result.
    submit(client, machine_shop(label="secret plant (invented)", priority="high", discount=0.85))
    submit(client, machine_shop(discount=0.8))
    response = client.get("/metrics")
    assert response.status_code == 200 and response.headers["content-type"].startswith("text/plain")
    samples = metric_samples(response.text)
    assert samples[("fixq_redis_up", ())] == 1
    assert samples[("fixq_jobs", (("state", "done"),))] == 1
    assert samples[("fixq_jobs", (("state", "queued"),))] == 2
    assert samples[("fixq_queue_depth", (("queue", "fixq-high"),))] == 1
    assert samples[("fixq_queue_depth", (("queue", "fixq-normal"),))] == 1
    assert samples[("fixq_solve_seconds_count", ())] == 1
    assert samples[("fixq_solve_iterations_count", ())] == 1
    iterations = client.get(f"/v1/jobs/{done['id']}").json()["iterations"]
    assert samples[("fixq_solve_iterations_sum", ())] == iterations
    assert samples[("fixq_solve_iterations_bucket", (("le", "+Inf"),))] == 1
    assert "secret" not in response.text and done["id"] not in response.text


def test_metrics_answer_when_redis_is_down(app_settings: Settings) -> None:
    dead = create_app(app_settings.model_copy(update={"redis_url": f"redis://127.0.0.1:{free_port()}/0"}))
    with make_client(dead) as http:
        response = http.get("/metrics")
    assert response.status_code == 200
    assert metric_samples(response.text)[("fixq_redis_up", ())] == 0


def test_unknown_routes_and_methods_are_problems(client: httpx.Client) -> None:
    body = assert_problem(client.get("/v2/jobs"), 404)
    assert "/v2/jobs" in body["detail"]
    response = client.put("/v1/jobs")
    body = assert_problem(response, 405)
    assert response.headers["allow"]
    assert "PUT" in body["detail"]


def test_every_route_has_a_one_line_description(client: httpx.Client) -> None:
    spec = client.get("/openapi.json").json()
    operations = [op for methods in spec["paths"].values() for op in methods.values()]
    assert len(operations) >= 10
    for operation in operations:
        text = operation.get("description", "")
        assert text and "\n" not in text.strip(), operation["operationId"]


def test_redis_errors_mid_request_are_503(app: object, client: httpx.Client, monkeypatch) -> None:
    def unreachable(*args: object, **kwargs: object) -> None:
        raise redis.ConnectionError("connection reset")

    monkeypatch.setattr(app.state.store, "list_jobs", unreachable)
    assert_problem(client.get("/v1/jobs"), 503)



def infeasible_plant() -> dict:
    document = plant_capacity()
    document["model"]["feasible"] = ["capacity_next < 0"]
    return document


def test_the_door_runs_the_grid_feasibility_check(client: httpx.Client, monkeypatch, store: JobStore) -> None:
    calls = []

    def check_feasibility(doc, *, budget_s):
        calls.append(budget_s)
        raise InfeasibleModel.at("model.feasible", "no choice is allowed at capacity = 0.5, demand = 2.0")

    monkeypatch.setitem(sys.modules, "worker.feasibility", types.SimpleNamespace(check_feasibility=check_feasibility))
    body = assert_problem(client.post("/v1/jobs", json=infeasible_plant()), 422)
    assert body["type"] == "urn:fixq:problem:infeasible-model" and body["errors"][0]["path"] == "model.feasible"
    assert calls and 0 < calls[0] <= 5
    assert store.counts_by_state()["queued"] == 0
    assert client.post("/v1/check", json=machine_shop()).status_code == 200 and len(calls) == 1


def test_an_infeasible_grid_model_is_refused_at_the_door(client: httpx.Client) -> None:
    body = assert_problem(client.post("/v1/check", json=infeasible_plant()), 422)
    assert body["errors"][0]["path"].startswith("model.")
