"""The whole service over real HTTP: ``fixq api`` and ``fixq worker`` processes on the private Redis.

The processes use database 3 of the session's private server, so other tests
emptying database 0 never touch them.  The worker is started and stopped by
the tests that need it present or absent.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
import redis
from prometheus_client.parser import text_string_to_metric_families

from service.client import FixqClient
from service.embedded_redis import EmbeddedRedis, free_port
from tests._documents import plant_capacity
from worker.convergence_log import kept

DATABASE = 3
MAX_BODY_MB = 0.05
PROBLEM_JSON = "application/problem+json"


class Service:
    """One ``fixq api`` and at most one ``fixq worker``, as child processes."""

    def __init__(self, redis_url: str, log_dir: Path) -> None:
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.env = {
            **os.environ,
            "FIXQ_REDIS_URL": redis_url,
            "FIXQ_AUTH": "off",
            "FIXQ_MAX_BODY_MB": str(MAX_BODY_MB),
            "FIXQ_REAPER_INTERVAL_S": "1",
            "FIXQ_LEASE_S": "6",
        }
        self.log_dir = log_dir
        self.api: subprocess.Popen | None = None
        self.worker: subprocess.Popen | None = None
        self.http = httpx.Client(base_url=self.url, timeout=30.0)

    def _spawn(self, *args: str) -> subprocess.Popen:
        # The child keeps its own copy of the file descriptor; this process closes its one at once.
        with open(self.log_dir / f"{args[0]}-{time.monotonic_ns()}.log", "wb") as log:
            return subprocess.Popen([sys.executable, "-m", "service.cli", *args], env=self.env, stdout=log, stderr=log)

    def start_api(self) -> None:
        self.api = self._spawn("api", "--port", str(self.port))
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            assert self.api.poll() is None, "fixq api exited"
            try:
                if self.http.get("/healthz").status_code == 200:
                    return
            except httpx.TransportError:
                time.sleep(0.1)
        raise AssertionError("fixq api did not become healthy")

    def kill_api(self) -> None:
        assert self.api is not None
        self.api.kill()
        self.api.wait()

    def start_worker(self) -> None:
        if self.worker is None or self.worker.poll() is not None:
            self.worker = self._spawn("worker")
            wait_for(lambda: self.http.get("/healthz").json()["workers"] >= 1, 60, "the worker to register")

    def stop_worker(self) -> None:
        if self.worker is not None and self.worker.poll() is None:
            self.worker.send_signal(signal.SIGTERM)
            try:
                self.worker.wait(10)
            except subprocess.TimeoutExpired:
                self.worker.send_signal(signal.SIGTERM)
                self.worker.wait(10)
        self.worker = None
        wait_for(lambda: self.http.get("/healthz").json()["workers"] == 0, 30, "the worker to leave")

    def close(self) -> None:
        self.stop_worker()
        if self.api is not None and self.api.poll() is None:
            self.api.send_signal(signal.SIGTERM)
            self.api.wait(20)
        self.http.close()

    def submit(self, document: dict) -> dict:
        response = self.http.post("/v1/jobs", json=document)
        assert response.status_code == 202, response.text
        return response.json()

    def job(self, job_id: str) -> dict:
        return self.http.get(f"/v1/jobs/{job_id}").json()

    def wait_state(self, job_id: str, states: set[str], timeout_s: float) -> dict:
        return wait_for(lambda: (record := self.job(job_id))["state"] in states and record, timeout_s, f"{states}")


def wait_for(predicate, timeout_s: float, what: str):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        time.sleep(0.05)
    raise AssertionError(f"timed out waiting for {what}")


@pytest.fixture(scope="module")
def service(redis_server: EmbeddedRedis, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Service]:
    url = f"redis://127.0.0.1:{redis_server.port}/{DATABASE}"
    redis.Redis.from_url(url).flushdb()
    running = Service(url, tmp_path_factory.mktemp("service-logs"))
    running.start_api()
    try:
        yield running
    finally:
        running.close()


def plant(points: int = 120, **solver: object) -> dict:
    return plant_capacity(points, solver={"method": "value_iteration", "tolerance": 1e-8, **solver}, report={})


def long_plant(seconds: float) -> dict:
    """Runs until its time limit: the tolerance is below what float64 reaches."""
    return plant(tolerance=1e-300, time_limit_s=seconds, max_iterations=10_000_000, checkpoint_s=1.0)


def assert_problem(response: httpx.Response, status: int) -> dict:
    assert response.status_code == status, response.text
    assert response.headers["content-type"] == PROBLEM_JSON
    body = response.json()
    assert body["status"] == status and body["title"] and body["detail"]
    return body


def test_bad_input_is_answered_4xx_with_problem_details(service: Service) -> None:
    body = assert_problem(service.http.post("/v1/jobs", content=b'{"version": 1, "discount": }'), 400)
    assert body["line"] == 1 and body["column"] == 28
    document = plant()
    document["discount"] = 1.02
    document["model"]["reward"] = "__import__('os').system('true')"
    body = assert_problem(service.http.post("/v1/jobs", json=document), 422)
    assert {"discount", "model.reward"} <= {error["path"] for error in body["errors"]}
    size = int(MAX_BODY_MB * 2**20) * 2
    assert_problem(service.http.post("/v1/jobs", content=b" " * size), 413)

    def chunked() -> Iterator[bytes]:
        for _ in range(8):
            yield b" " * (size // 8)

    assert_problem(service.http.post("/v1/check", content=chunked()), 413)
    assert_problem(service.http.get("/v1/jobs/not-a-job-id"), 404)
    assert service.http.get("/healthz").json()["redis"] == "ok"


def test_a_queued_job_is_canceled_at_once(service: Service) -> None:
    service.stop_worker()
    record = service.submit(plant())
    response = service.http.delete(f"/v1/jobs/{record['id']}")
    assert response.status_code == 200 and response.json()["state"] == "canceled"
    service.start_worker()
    time.sleep(0.5)
    assert service.job(record["id"])["state"] == "canceled"
    assert_problem(service.http.get(f"/v1/jobs/{record['id']}/result"), 409)


def follow(service: Service, job_id: str) -> list[tuple[str | None, str, dict]]:
    """Every SSE event of the job's live log, until the stream ends."""
    events, fields = [], {}
    with service.http.stream("GET", f"/v1/jobs/{job_id}/log", headers={"Accept": "text/event-stream"},
                             timeout=httpx.Timeout(10.0, read=120.0)) as response:  # fmt: skip
        assert response.status_code == 200
        assert response.headers["content-type"].startswith("text/event-stream")
        for line in response.iter_lines():
            if line == "":
                if "data" in fields:
                    events.append((fields.get("id"), fields.get("event", "message"), json.loads(fields["data"])))
                fields = {}
            elif not line.startswith(":"):
                name, _, value = line.partition(": ")
                fields[name] = value
    return events


def test_full_lifecycle(service: Service) -> None:
    service.start_worker()
    record = service.submit(plant(tolerance=1e-9))
    job_id = record["id"]
    events = follow(service, job_id)
    entries = [data for _, kind, data in events if kind == "entry"]
    ids = [int(event_id) for event_id, kind, _ in events if kind == "entry"]
    assert len(entries) >= 20
    assert ids == [entry["iteration"] for entry in entries] == list(range(1, len(entries) + 1))
    assert all(math.isfinite(entry["error_bound"]) for entry in entries)
    assert events[-1][1:] == ("end", {"state": "done"})

    finished = service.job(job_id)
    result = service.http.get(f"/v1/jobs/{job_id}/result").json()
    assert finished["state"] == "done" and result["status"] == "converged"
    assert finished["iterations"] == result["iterations"] == len(entries)
    assert result["error_bound"] <= 1e-9
    logged = service.http.get(f"/v1/jobs/{job_id}/log", params={"limit": 1000}).json()
    assert logged["data"] == entries and logged["next"] is None

    table = list(csv.reader(io.StringIO(service.http.get(f"/v1/jobs/{job_id}/result?format=csv").text)))
    assert table[0] == ["capacity", "demand", "value", "capacity_next"]
    sizes = [len(values) for values in result["axes"].values()]
    assert len(table) - 1 == math.prod(sizes) == 120 * 7
    assert (
        float(table[1][2]) == result["value"][0][0] and float(table[-1][3]) == result["policy"]["capacity_next"][-1][-1]
    )

    listed = service.http.get("/v1/jobs", params={"state": "done", "tag": "example"}).json()
    assert job_id in [job["id"] for job in listed["data"]]


def test_a_running_job_is_canceled_between_sweeps(service: Service) -> None:
    service.start_worker()
    record = service.submit(long_plant(60))
    job_id = record["id"]
    wait_for(lambda: (service.job(job_id).get("progress") or {}).get("iteration", 0) >= 2, 60, "progress")
    response = service.http.delete(f"/v1/jobs/{job_id}")
    assert response.status_code == 202 and response.json()["state"] == "running"
    canceled = service.wait_state(job_id, {"canceled", "done", "failed"}, 30)
    assert canceled["state"] == "canceled"
    assert canceled["iterations"] >= 2
    body = assert_problem(service.http.get(f"/v1/jobs/{job_id}/result"), 409)
    assert body["state"] == "canceled"


def test_an_api_restart_does_not_disturb_a_running_job(service: Service) -> None:
    service.start_worker()
    record = service.submit(long_plant(8))
    job_id = record["id"]
    wait_for(lambda: (service.job(job_id).get("progress") or {}).get("iteration", 0) >= 2, 60, "progress")
    assert service.job(job_id)["state"] == "running"
    seen: list[int] = []
    waited: list[dict] = []

    def follow() -> None:
        with FixqClient(service.url) as client:
            waited.append(client.wait(job_id, on_progress=lambda e: seen.append(e["iteration"])))

    follower = threading.Thread(target=follow)
    follower.start()
    wait_for(lambda: seen, 30, "the client to follow the live log")
    service.kill_api()
    service.start_api()
    finished = service.wait_state(job_id, {"done", "failed", "canceled"}, 60)
    assert finished["state"] == "done" and finished["attempts"] == 1
    follower.join(60)
    assert waited and waited[0]["state"] == "done"
    assert seen == sorted(set(seen)) and seen[-1] == finished["iterations"]
    result = service.http.get(f"/v1/jobs/{job_id}/result").json()
    assert result["status"] == "time_limit"
    iterations = [entry["iteration"] for entry in result["log"]]
    # The log is bounded (worker.convergence_log): the iterations it keeps, each once, in order.
    assert iterations == [i for i in range(1, result["iterations"] + 1) if kept(i, result["iterations"])]
    assert result["diagnostics"]["log_dropped"] == result["iterations"] - len(iterations)


def test_metrics_parse(service: Service) -> None:
    response = service.http.get("/metrics")
    assert response.status_code == 200
    samples = {
        (sample.name, tuple(sorted(sample.labels.items()))): sample.value
        for family in text_string_to_metric_families(response.text)
        for sample in family.samples
    }
    assert samples[("fixq_redis_up", ())] == 1
    assert samples[("fixq_jobs", (("state", "done"),))] >= 1
    assert samples[("fixq_jobs", (("state", "canceled"),))] >= 1
    assert samples[("fixq_solve_seconds_count", ())] >= 1
    assert ("fixq_queue_depth", (("queue", "fixq-normal"),)) in samples


def test_a_continuous_choice_solves_through_the_queue(service: Service) -> None:
    """The bundled continuous-choice example (invented), end to end: result, table, plots."""
    from service.examples import load_example

    service.start_worker()
    document = load_example("beekeeper_savings")
    record = service.submit(document)
    job_id = record["id"]
    finished = service.wait_state(job_id, {"done", "failed"}, 120)
    assert finished["state"] == "done", finished
    result = service.http.get(f"/v1/jobs/{job_id}/result").json()
    assert result["policy_index"] is None and result["diagnostics"]["continuous_choice"]["interpolation"]
    (choice,) = result["policy"]
    assert result["diagnostics"]["euler_errors"]["max_log10"] < -2
    table = list(csv.reader(io.StringIO(service.http.get(f"/v1/jobs/{job_id}/result?format=csv").text)))
    assert table[0][-1] == choice and float(table[1][-1]) == result["policy"][choice][0][0]
    for picture in ("policy", "value", "euler_errors"):
        response = service.http.get(f"/v1/jobs/{job_id}/plots/{picture}.svg")
        assert response.status_code == 200 and response.text.lstrip().startswith("<?xml"), picture
