"""A sweep's ``sweep.finished`` webhook end to end: ``fixq api``, two real worker processes, Redis, a receiver.

The API and the workers use database 8 of the session's private Redis server.
The bundled machine-shop example (an invented scenario) is swept over the
reward of running a new lathe; one value overflows while solving (the row
fails), one equals a job solved before (the row is answered from that twin).
"""

from __future__ import annotations

import hashlib
import hmac
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
from tests._processes import WORKER_LAUNCH, api_process, stop_process_groups
from tests._receiver import Receiver

REPO = Path(__file__).resolve().parents[2]
EXAMPLE = json.loads((REPO / "service" / "examples" / "machine_replacement.json").read_text())
DATABASE = 8
SECRET = "lathe floor secret"
PATH = "model.reward[0][0]"
OVERFLOW = 1e308
"""A finite reward at the door whose discounted sum overflows to inf while solving: the row fails."""


@pytest.fixture
def lab(redis_server: EmbeddedRedis, settings: Settings, tmp_path: Path) -> Iterator[tuple[dict[str, str], Path]]:
    url = f"{redis_server.url.rsplit('/', 1)[0]}/{DATABASE}"
    client = redis.Redis.from_url(url)
    client.flushdb()
    env = {**os.environ, "FIXQ_REDIS_URL": url, "FIXQ_AUTH": "off", "FIXQ_NOTIFY_ALLOW_HOSTS": "127.0.0.1",
           "FIXQ_NOTIFY_ALLOW_PRIVATE": "true", "FIXQ_NOTIFY_POLL_S": "0.05", "PYTHONPATH": str(REPO)}  # fmt: skip
    yield env, tmp_path
    client.flushdb()
    client.close()


def start(command: list[str], env: dict[str, str], log: Path) -> subprocess.Popen:
    with open(log, "wb") as out:
        return subprocess.Popen(command, cwd=REPO, env=env, stdout=out, stderr=subprocess.STDOUT,
                                start_new_session=True)  # fmt: skip


@pytest.fixture
def api(lab: tuple[dict[str, str], Path]) -> Iterator[httpx.Client]:
    """``fixq api`` as a child process on loopback, with auth off."""
    env, logs = lab
    with api_process(env, logs / "api.log") as client:
        yield client


def wait_for(api: httpx.Client, path: str, done: str, logs: Path, timeout_s: float = 60) -> dict:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        body = api.get(path).json()
        if body["state"] == done:
            return body
        time.sleep(0.1)
    raise AssertionError(f"{path} never became {done}: {body}\n" + "\n".join(
        p.read_text(errors="replace")[-2000:] for p in sorted(logs.glob("*.log"))))  # fmt: skip


def with_reward(reward: float, **extra) -> dict:
    document = json.loads(json.dumps(EXAMPLE))
    document["model"]["reward"][0][0] = reward
    return {**document, **extra}


def sweep_events(requests: list[dict]) -> list[dict]:
    return [json.loads(r["body"]) for r in requests if r["headers"]["Fixq-Event"] == "sweep.finished"]


def test_a_sweep_is_notified_once_when_every_row_ended_and_when_it_is_canceled(
    lab: tuple[dict[str, str], Path], api: httpx.Client
) -> None:
    env, logs = lab
    notify = {"url": "", "secret": SECRET}
    workers: list[subprocess.Popen] = []
    with Receiver([204]) as receiver:
        notify["url"] = receiver.url
        # Canceled as a whole before any worker runs: both jobs are canceled in their queue.
        canceled = api.post("/v1/sweeps", json={"base": with_reward(12.0, notify=notify),
                                                "vary": {PATH: [13.0, 14.0]}}).json()  # fmt: skip
        assert api.delete(f"/v1/sweeps/{canceled['id']}").status_code in (200, 202)
        twin = api.post("/v1/jobs", json=with_reward(11.0)).json()  # no notify: sends nothing
        try:
            workers = [start([sys.executable, "-c", WORKER_LAUNCH], env, logs / f"worker-{n}.log") for n in range(2)]
            wait_for(api, f"/v1/jobs/{twin['id']}", "done", logs)
            values = [11.0, 12.5, OVERFLOW]
            response = api.post("/v1/sweeps", json={"base": with_reward(12.0, notify=notify), "vary": {PATH: values}})
            assert response.status_code == 202, response.text
            sweep = response.json()
            view = wait_for(api, f"/v1/sweeps/{sweep['id']}", "done", logs)
            # 2 + 3 job.finished, and one sweep.finished for each sweep.
            requests = receiver.wait_for(7, 30)
            time.sleep(1.0)  # a second sweep.finished would arrive by now
            requests = list(receiver.requests)
        finally:
            stop_process_groups(workers)
    events = sweep_events(requests)
    assert len(requests) == 7 and len(events) == 2, [r["headers"]["Fixq-Event"] for r in requests]
    by_id = {event["sweep"]["id"]: event for event in events}
    assert set(by_id) == {canceled["id"], sweep["id"]}

    finished = by_id[sweep["id"]]["sweep"]
    assert finished["state"] == "done" and finished["tag"] == f"sweep:{sweep['id']}"
    assert {k: v for k, v in finished["counts"].items() if v} == {"done": 2, "failed": 1}
    rows = finished["rows"]["data"]
    assert finished["rows"]["next"] is None and len(rows) == 3
    assert [row["values"] for row in rows] == [{PATH: v} for v in values]
    assert [row["job"] for row in rows] == [row["job"] for row in view["rows"]["data"]]
    assert [row["state"] for row in rows] == ["done", "done", "failed"]
    assert api.get(f"/v1/jobs/{rows[0]['job']}").json()["reused_from"] == twin["id"]
    assert rows[1]["status"] == "converged" and rows[2]["error"]

    gone = by_id[canceled["id"]]["sweep"]
    assert gone["state"] == "canceled" and {k: v for k, v in gone["counts"].items() if v} == {"canceled": 2}
    assert [row["state"] for row in gone["rows"]["data"]] == ["canceled", "canceled"]

    job_events = [json.loads(r["body"]) for r in requests if r["headers"]["Fixq-Event"] == "job.finished"]
    assert sorted(e["job"]["id"] for e in job_events) == sorted(
        [row["job"] for row in rows] + [row["job"] for row in gone["rows"]["data"]])  # fmt: skip
    for request in requests:
        headers, body = request["headers"], request["body"]
        # The signature recomputed here with the standard library's HMAC, not fixq's.
        expected = hmac.new(SECRET.encode(), headers["Fixq-Timestamp"].encode() + b"." + body, hashlib.sha256)
        assert headers["Fixq-Signature"] == "sha256=" + expected.hexdigest()
        if headers["Fixq-Event"] == "sweep.finished":
            assert headers["Fixq-Delivery"] == "sweep:" + json.loads(body)["sweep"]["id"]
