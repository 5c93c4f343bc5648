"""Service benchmark: what HTTP + the queue cost on top of the numerics, measured in one run.

    python bench/bench_service.py [--quick]

Starts a private Redis server (never the machine's shared one), ``fixq api``
and two ``fixq worker`` processes, and prints three ratios with PASS/FAIL:

1. end to end: a problem that takes about 1 s in process, submitted over
   HTTP and waited for (SSE) until its result is fetched, against
   ``worker.solve`` on the same document in this process — target ≤ 1.10×;
2. throughput of tiny jobs through 2 fixq workers (submitted over HTTP,
   counted until the last is done) against bare RQ running ``numpy.ones(16)``
   with one forking worker on the same Redis — target ≥ 40 %;
3. the median round trip of a tiny job (submit → done → result fetched) —
   target ≤ 50 ms.
"""

from __future__ import annotations

import argparse
import copy
import json
import os
import signal
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx
import redis
from rq import Queue

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from service.client import FixqClient  # noqa: E402
from service.embedded_redis import EmbeddedRedis, free_port  # noqa: E402

END_TO_END_TARGET = 1.10
THROUGHPUT_TARGET = 0.40
ROUND_TRIP_TARGET_S = 0.050
END_TO_END_REPEATS = 5
"""In-process and HTTP solves of the 1 s problem, alternated; their medians are compared."""
BARE_QUEUE = "bench-bare"


def tiny_document(i: int) -> dict:
    """An invented two-state machine; solved in well under a millisecond."""
    return {
        "version": 1,
        "label": f"bench tiny {i} (invented)",
        "tags": ["bench"],
        "discount": 0.9,
        "model": {
            "kind": "tabular",
            "states": 2,
            "actions": 2,
            "reward": [[1.0, 0.0], [0.0, 2.0]],
            "transition": [[[0.5, 0.5], [1.0, 0.0]], [[0.0, 1.0], [0.3, 0.7]]],
        },
    }


def second_problem(points: int) -> dict:
    document = json.loads((ROOT / "service" / "examples" / "plant_capacity.json").read_text())
    document = copy.deepcopy(document)
    document["model"]["states"]["capacity"]["points"] = points
    document["report"] = {}
    return document


def calibrate(target_s: float = 1.0) -> tuple[dict, float]:
    """A plant document whose in-process solve takes about ``target_s`` (warm), and that time."""
    from worker import solve

    points = 120
    while True:
        document = second_problem(points)
        solve(document)  # compile and load the kernels first
        started = time.perf_counter()
        solve(document)
        elapsed = time.perf_counter() - started
        if elapsed >= 0.6 * target_s or points >= 4000:
            return document, elapsed
        points = int(points * min(2.0, max(1.2, (target_s / max(elapsed, 1e-3)) ** 0.5)))


class Processes:
    def __init__(self, env: dict[str, str], log_dir: Path) -> None:
        self.env = env
        self.log_dir = log_dir
        self.children: list[subprocess.Popen] = []

    def spawn(self, name: str, argv: list[str], **extra_env: str) -> subprocess.Popen:
        log = open(self.log_dir / f"{name}.log", "wb")
        child = subprocess.Popen(argv, env={**self.env, **extra_env}, stdout=log, stderr=log, cwd=ROOT)
        self.children.append(child)
        return child

    def stop(self, child: subprocess.Popen) -> None:
        if child.poll() is None:
            child.send_signal(signal.SIGTERM)
            try:
                child.wait(10)
            except subprocess.TimeoutExpired:
                child.kill()
                child.wait()

    def stop_all(self) -> None:
        for child in reversed(self.children):
            self.stop(child)


def wait_until(predicate, timeout_s: float, what: str) -> None:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        try:
            if predicate():
                return
        except httpx.TransportError:
            pass
        time.sleep(0.05)
    raise RuntimeError(f"timed out waiting for {what}")


def bare_rq_throughput(connection: redis.Redis, processes: Processes, jobs: int) -> float:
    queue = Queue(BARE_QUEUE, connection=connection)
    # The job is numpy.ones(16); the worker imports numpy before it forks, as a
    # fixq worker has imported its task, so each work-horse starts warm.
    code = (
        "import sys; import numpy; from redis import Redis; from rq import Queue, Worker; "
        f"r = Redis.from_url(sys.argv[1]); Worker([Queue('{BARE_QUEUE}', connection=r)], connection=r).work(burst=True)"
    )
    url = f"redis://127.0.0.1:{connection.connection_pool.connection_kwargs['port']}/0"
    with connection.pipeline() as pipe:
        for _ in range(jobs):
            queue.enqueue("numpy.ones", 16, pipeline=pipe, result_ttl=3600)
        pipe.execute()
    started = time.perf_counter()
    worker = processes.spawn("bare-rq", [sys.executable, "-c", code, url], PYTHONPATH="")
    worker.wait(1800)
    elapsed = time.perf_counter() - started
    done, failed = queue.finished_job_registry.count, queue.failed_job_registry.count
    if done != jobs or failed:
        raise RuntimeError(
            f"bare RQ finished {done} of {jobs} jobs ({failed} failed); see {processes.log_dir}/bare-rq.log"
        )
    return jobs / elapsed


def fixq_throughput(client: FixqClient, jobs: int) -> float:
    ids: list[str] = []
    started = time.perf_counter()
    for i in range(jobs):
        ids.append(client.submit(tiny_document(i), fresh=True)["id"])
    # Jobs finish roughly in submission order: wait for each in turn.
    for job_id in ids:
        while (state := client.status(job_id)["state"]) not in ("done", "failed", "canceled"):
            time.sleep(0.002)
        if state != "done":
            raise RuntimeError(f"tiny job {job_id} ended {state}: {client.status(job_id).get('error')}")
    return jobs / (time.perf_counter() - started)


def round_trip(client: FixqClient) -> float:
    started = time.perf_counter()
    job = client.submit(tiny_document(0), fresh=True)
    record = client.wait(job["id"])
    if record["state"] != "done":
        raise RuntimeError(f"tiny job ended {record['state']}: {record.get('error')}")
    client.result(job["id"])
    return time.perf_counter() - started


def time_in_process(document: dict) -> float:
    from worker import solve

    started = time.perf_counter()
    solve(document)
    return time.perf_counter() - started


def time_over_http(client: FixqClient, document: dict) -> float:
    started = time.perf_counter()
    job = client.submit(document, fresh=True)
    record = client.wait(job["id"])
    client.result(job["id"])
    elapsed = time.perf_counter() - started
    if record["state"] != "done":
        raise RuntimeError(f"the 1 s problem ended {record['state']}: {record.get('error')}")
    return elapsed


def verdict(ok: bool) -> str:
    return "PASS" if ok else "FAIL"


def _stop_on_sigterm(signum: int, frame: object) -> None:
    raise SystemExit(143)


def main() -> int:
    signal.signal(signal.SIGTERM, _stop_on_sigterm)
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true", help="fewer jobs (a smoke run, not a measurement)")
    args = parser.parse_args()
    tiny_jobs, bare_jobs, trips = (60, 200, 15) if args.quick else (300, 1000, 41)

    print("calibrating a problem of about 1 s in process ...", flush=True)
    document, _ = calibrate()
    points = document["model"]["states"]["capacity"]["points"]

    with tempfile.TemporaryDirectory() as tmp, EmbeddedRedis(Path(tmp) / "redis") as server:
        connection = redis.Redis.from_url(server.url)
        port = free_port()
        env = {**os.environ, "FIXQ_REDIS_URL": server.url, "FIXQ_AUTH": "off", "FIXQ_WORKER_LOG_LEVEL": "WARNING"}
        processes = Processes(env, Path(tmp))
        fixq = [sys.executable, "-m", "service.cli"]
        try:
            api = processes.spawn("api", [*fixq, "api", "--port", str(port)])
            client = FixqClient(f"http://127.0.0.1:{port}")
            wait_until(lambda: api.poll() is None and client.health()["status"] == "ok", 60, "the API")
            workers = [processes.spawn(f"worker-{i}", [*fixq, "worker"]) for i in range(2)]
            wait_until(lambda: client.health()["workers"] == 2, 60, "two workers")

            round_trip(client)  # the first job of a worker pays for its imports
            for _ in range(2):
                client.wait(client.submit(document, fresh=True)["id"])  # both workers have the kernels loaded
            in_process, over_http = [], []
            for _ in range(END_TO_END_REPEATS):
                in_process.append(time_in_process(document))
                over_http.append(time_over_http(client, document))
            in_process_s, service_s = statistics.median(in_process), statistics.median(over_http)

            trip_times = sorted(round_trip(client) for _ in range(trips))
            fixq_rate = fixq_throughput(client, tiny_jobs)
            for worker in workers:
                processes.stop(worker)
            bare_rate = bare_rq_throughput(connection, processes, bare_jobs)
        finally:
            processes.stop_all()
            connection.close()

    ratio = service_s / in_process_s
    share = fixq_rate / bare_rate
    median = statistics.median(trip_times)
    print(f"\nend to end ({points} capacity points, medians of {END_TO_END_REPEATS} alternated runs):")
    print(f"  in process {in_process_s:.3f} s, over HTTP + queue {service_s:.3f} s, "
          f"ratio {ratio:.3f} (target <= {END_TO_END_TARGET:.2f}) {verdict(ratio <= END_TO_END_TARGET)}")  # fmt: skip
    print("throughput of tiny jobs:")
    print(f"  fixq with 2 workers {fixq_rate:.1f} jobs/s, bare RQ with 1 worker {bare_rate:.1f} jobs/s, "
          f"share {share:.0%} (target >= {THROUGHPUT_TARGET:.0%}) {verdict(share >= THROUGHPUT_TARGET)}")  # fmt: skip
    print("round trip of a tiny job:")
    print(f"  median {median * 1000:.1f} ms over {trips} (p10 {trip_times[len(trip_times) // 10] * 1000:.1f} ms, "
          f"p90 {trip_times[9 * len(trip_times) // 10] * 1000:.1f} ms) (target <= {ROUND_TRIP_TARGET_S * 1000:.0f} ms) "
          f"{verdict(median <= ROUND_TRIP_TARGET_S)}")  # fmt: skip
    return 0


if __name__ == "__main__":
    sys.exit(main())
