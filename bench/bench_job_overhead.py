"""Benchmark: what one job costs in a fixq worker beyond ``worker.solve`` in process, search and single, at one load.

    python bench/bench_job_overhead.py [--repeats 10] [--points 200]

Starts a private Redis (never the machine's shared one), ``fixq api`` and one RQ worker process (the child
``fixq worker`` would run, started directly so that its CPU time can be read from ``/proc``), and submits
``bench/bench_aiyagari.py``'s household (ρ = 0.9) as a search job and as a single job (``r`` = 3.8 %, the
stationary report on), alternating with ``worker.solve`` on the same documents in this process, so that
every figure is taken at the same load.  Each job is followed in turn by SSE (``FixqClient.wait``, as a user
does) and not followed (the record read once after 0.3 s), to show what following costs.  Per kind, medians:

* in process: wall and CPU seconds of ``solve(document)`` (the baseline);
* in the worker: CPU seconds of the worker process over the job (all its threads: the solve, the lease
  heartbeat, the reaper and beacon), and wall from the record's ``started_at`` to ``finished_at``;
* the API's and Redis's CPU seconds per job, and, with SSE, the user's wait from submit to the end seen.

The ratios printed are worker CPU / in-process CPU (the code's own overhead, which load does not change)
and worker wall / in-process wall.  Linux only (``/proc/PID/task/*/schedstat``).
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from datetime import datetime
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from bench_aiyagari import document, single_job  # noqa: E402
from bench_service import Processes, wait_until  # noqa: E402

from service.client import FixqClient  # noqa: E402
from service.embedded_redis import EmbeddedRedis, free_port  # noqa: E402
from service.supervisor import child_command  # noqa: E402
from worker.solve import solve  # noqa: E402

R_SINGLE = 0.038
"""The single job's interest rate (near the equilibrium of the ρ = 0.9 cell)."""


def cpu_seconds(pid: int) -> float:
    """CPU seconds of every thread of a process so far (``schedstat``: nanoseconds on the CPU)."""
    total = 0
    for task in os.listdir(f"/proc/{pid}/task"):
        try:
            total += int(Path(f"/proc/{pid}/task/{task}/schedstat").read_text().split()[0])
        except (OSError, ValueError, IndexError):
            pass
    return total / 1e9


def _seconds(stamp: str) -> float:
    return datetime.fromisoformat(stamp.replace("Z", "+00:00")).timestamp()


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeats", type=int, default=10, help="jobs of each kind and way of waiting")
    parser.add_argument("--points", type=int, default=200, help="asset points of the household")
    args = parser.parse_args()
    search = document(0.9, 3, args.points, "howard")
    single = single_job(search, R_SINGLE)
    rows: dict[tuple[str, str], list[dict[str, float]]] = {}
    with tempfile.TemporaryDirectory() as tmp, EmbeddedRedis(Path(tmp) / "redis") as server:
        port = free_port()
        env = {**os.environ, "FIXQ_REDIS_URL": server.url, "FIXQ_AUTH": "off", "FIXQ_WORKER_LOG_LEVEL": "WARNING"}
        processes = Processes(env, Path(tmp))
        try:
            api = processes.spawn("api", [sys.executable, "-m", "service.cli", "api", "--port", str(port)])
            client = FixqClient(f"http://127.0.0.1:{port}", timeout_s=600)
            wait_until(lambda: api.poll() is None and client.health()["status"] == "ok", 60, "the API")
            worker = processes.spawn("worker", child_command(False))
            wait_until(lambda: client.health()["workers"] == 1, 60, "the worker")
            redis_pid = server.process.pid
            for doc in (single, search, single, search):  # warm up: kernels compiled or loaded on both sides
                client.wait(client.submit(doc, fresh=True)["id"])
                solve(doc)
            for _ in range(args.repeats):
                for kind, doc in (("search", search), ("single", single)):
                    wall, cpu = time.perf_counter(), time.process_time()
                    solve(doc)
                    in_wall, in_cpu = time.perf_counter() - wall, time.process_time() - cpu
                    for mode in ("sse", "unfollowed"):
                        before = [cpu_seconds(pid) for pid in (worker.pid, api.pid, redis_pid)]
                        started = time.perf_counter()
                        job = client.submit(doc, fresh=True)
                        if mode == "sse":
                            record = client.wait(job["id"])
                        else:
                            time.sleep(0.3)
                            record = client.status(job["id"])
                        seen = time.perf_counter() - started
                        if record["state"] != "done":
                            raise RuntimeError(f"a {kind} job ended {record['state']}: {record.get('error')}")
                        after = [cpu_seconds(pid) for pid in (worker.pid, api.pid, redis_pid)]
                        rows.setdefault((kind, mode), []).append({
                            "in_wall": in_wall, "in_cpu": in_cpu, "seen": seen,
                            "worker_wall": _seconds(record["finished_at"]) - _seconds(record["started_at"]),
                            "worker_cpu": after[0] - before[0], "api_cpu": after[1] - before[1],
                            "redis_cpu": after[2] - before[2]})
        finally:
            processes.stop_all()

    print(f"bench_aiyagari's household, rho 0.9, {args.points} asset points; medians of {args.repeats} jobs, ms; "
          f"load average {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    print(f"{'kind':6} {'waiting':10} {'in-process':>17} {'worker':>17} {'cpu ratio':>9} {'wall ratio':>10} "
          f"{'api cpu':>7} {'redis cpu':>9} {'submit->seen':>12}")
    for (kind, mode), found in rows.items():
        m = {key: 1e3 * statistics.median(row[key] for row in found) for key in found[0]}
        seen = f"{m['seen']:12.1f}" if mode == "sse" else f"{'':>12}"
        print(f"{kind:6} {mode:10} {m['in_wall']:7.1f} (cpu {m['in_cpu']:5.1f}) {m['worker_wall']:7.1f} "
              f"(cpu {m['worker_cpu']:5.1f}) {m['worker_cpu'] / m['in_cpu']:8.2f}x "
              f"{m['worker_wall'] / m['in_wall']:9.2f}x "
              f"{m['api_cpu']:7.1f} {m['redis_cpu']:9.1f} {seen}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
