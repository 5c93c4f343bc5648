"""A chained sweep end to end: ``fixq api``, two real worker processes, Redis, and a webhook receiver.

The API and the workers use database 6 of the session's private Redis server, so other
tests emptying database 0 never touch them; each has a notifier thread, as
``run_worker`` is to start one.  The bundled machine-shop example (an
invented scenario) is swept over two of its inputs with warm starts along
the chain.
"""

from __future__ import annotations

import csv
import hashlib
import hmac
import io
import json
import os
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
import redis

from service.embedded_redis import EmbeddedRedis
from service.settings import Settings
from service.store import JobStore
from tests._processes import WORKER_LAUNCH, api_process, stop_process_groups
from tests._receiver import Receiver
from worker import solve

REPO = Path(__file__).resolve().parents[2]
EXAMPLE = json.loads((REPO / "service" / "examples" / "machine_replacement.json").read_text())
DATABASE = 6
WORKERS = 2
SECRET = "shop floor secret"


@pytest.fixture
def lab(redis_server: EmbeddedRedis, settings: Settings, tmp_path: Path) -> Iterator[tuple[JobStore, Path]]:
    url = f"{redis_server.url.rsplit('/', 1)[0]}/{DATABASE}"
    client = redis.Redis.from_url(url)
    client.flushdb()
    lab_settings = settings.model_copy(update={"redis_url": url, "auth": False, "notify_allow_hosts": "127.0.0.1",
                                               "notify_allow_private": True})  # fmt: skip
    yield JobStore(client, lab_settings), tmp_path
    client.flushdb()
    client.close()


@pytest.fixture
def workers(lab: tuple[JobStore, Path]) -> Iterator[list[subprocess.Popen]]:
    store, logs = lab
    env = {**os.environ, "FIXQ_REDIS_URL": store.settings.redis_url, "FIXQ_NOTIFY_ALLOW_HOSTS": "127.0.0.1",
           "FIXQ_NOTIFY_ALLOW_PRIVATE": "true", "FIXQ_NOTIFY_POLL_S": "0.05", "PYTHONPATH": str(REPO)}  # fmt: skip
    processes = []
    for n in range(WORKERS):
        with open(logs / f"worker-{n}.log", "wb") as out:
            processes.append(subprocess.Popen([sys.executable, "-c", WORKER_LAUNCH], cwd=REPO, env=env, stdout=out,
                                              stderr=subprocess.STDOUT, start_new_session=True))  # fmt: skip
    try:
        yield processes
    finally:
        for process in processes:
            stop(process)


@pytest.fixture
def api(lab: tuple[JobStore, Path]) -> Iterator[httpx.Client]:
    """``fixq api`` as a child process on loopback, with auth off."""
    store, logs = lab
    env = {**os.environ, "FIXQ_REDIS_URL": store.settings.redis_url, "FIXQ_AUTH": "off",
           "FIXQ_NOTIFY_ALLOW_HOSTS": "127.0.0.1", "FIXQ_NOTIFY_ALLOW_PRIVATE": "true",
           "PYTHONPATH": str(REPO)}  # fmt: skip
    with api_process(env, logs / "api.log") as client:
        yield client


def stop(process: subprocess.Popen) -> None:
    stop_process_groups([process])


def worker_logs(logs: Path) -> str:
    return "\n".join(p.read_text(errors="replace")[-3000:] for p in sorted(logs.glob("worker-*.log")))


def test_a_chained_sweep_runs_on_real_workers_and_notifies_every_job(
    lab: tuple[JobStore, Path], workers: list[subprocess.Popen], api: httpx.Client
) -> None:
    store, logs = lab
    with Receiver([204]) as receiver:
        base = {**EXAMPLE, "notify": {"url": receiver.url, "secret": SECRET}}
        vary = {"discount": [0.9, 0.95, 0.97], "model.reward[0][0]": [12.0, 14.0]}
        response = api.post("/v1/sweeps", json={"base": base, "vary": vary, "chain": True, "tags": ["nightly"]})
        assert response.status_code == 202, response.text
        sweep = response.json()
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            view = api.get(f"/v1/sweeps/{sweep['id']}").json()
            if view["state"] != "active":
                break
            time.sleep(0.1)
        assert view["state"] == "done", worker_logs(logs)
        requests = receiver.wait_for(7, 20)  # six job.finished and the sweep's sweep.finished
    rows = view["rows"]["data"]
    assert view["counts"]["done"] == 6 and all(row["status"] == "converged" for row in rows)
    jobs = [row["job"] for row in rows]
    assert {j["id"] for j in api.get("/v1/jobs", params={"tag": sweep["tag"]}).json()["data"]} == set(jobs)

    # The chain: (β, r) starts from (β, previous r), and (β, 12) from (previous β, 12).
    assert [row["after"] for row in rows] == [None, 0, 0, 2, 2, 4]
    for row in rows:
        document = store.get_document(row["job"])
        record = store.get_job(row["job"])
        assert document["discount"] == row["values"]["discount"]
        assert document["model"]["reward"][0][0] == row["values"]["model.reward[0][0]"]
        if row["after"] is None:
            assert document["solver"] == EXAMPLE["solver"]
            continue
        before = store.get_job(jobs[row["after"]])
        assert document["solver"]["initial"] == {"job": before["id"]}
        assert record["started_at"] >= before["finished_at"]
        # The warm start pays: fewer Bellman steps than the same document solved from zeros in process.
        cold = solve({**document, "solver": EXAMPLE["solver"]})
        assert row["iterations"] < cold["iterations"], (row, cold["iterations"])
        warm = store.get_result(row["job"])
        gap = max(abs(a - b) for a, b in zip(warm["value"], cold["value"]))
        assert gap <= warm["error_bound"] + cold["error_bound"]  # both within their certified bounds
        assert row["means"] == warm["stationary"]["means"]

    table = list(csv.reader(io.StringIO(api.get(f"/v1/sweeps/{sweep['id']}", params={"format": "csv"}).text)))
    assert table[0][:3] == ["index", "discount", "model.reward[0][0]"] and "mean.state_label" in table[0]
    assert [line[table[0].index("job")] for line in table[1:]] == jobs

    ended = [r for r in requests if r["headers"]["Fixq-Event"] == "sweep.finished"]
    assert [r["headers"]["Fixq-Delivery"] for r in ended] == [f"sweep:{sweep['id']}"]
    requests = [r for r in requests if r not in ended]
    assert sorted(r["headers"]["Fixq-Delivery"] for r in requests) == sorted(jobs)
    for request in requests:
        headers, body = request["headers"], request["body"]
        expected = hmac.new(SECRET.encode(), headers["Fixq-Timestamp"].encode() + b"." + body, hashlib.sha256)
        assert headers["Fixq-Signature"] == "sha256=" + expected.hexdigest()
        payload = json.loads(body)
        assert payload["event"] == "job.finished" and payload["job"]["state"] == "done"
        assert sweep["tag"] in payload["job"]["tags"] and "nightly" in payload["job"]["tags"]
