"""Threads benchmark: one large solve on every core against one thread, the ratio measured in one run.

Run from the repository root: ``python bench/bench_threads.py``.  Target, printed with PASS or
FAIL: the 4,000-point growth document without hints (:func:`bench_solver.growth_document`;
28,000 points × 4,000 choice points, reward tables) solves at least 1.6× faster with
``FIXQ_SOLVE_THREADS`` left at its default (every CPU of the process) than with
``FIXQ_SOLVE_THREADS=1``, with the same value, policy, iterations and error bound, bit for bit.

The two settings alternate, ``REPEATS`` solves each after one solve that compiles or loads the
kernels, and the medians are compared.  The machine may be shared and noisy: the ratio is that
of this one run.
"""

from __future__ import annotations

import json
import os
import statistics
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from bench_solver import growth_document, verdict  # noqa: E402

POINTS = 4_000
"""Capital points of the benchmark's growth document (count; 7 shock points each)."""
REPEATS = 3
"""Timed solves per setting; the median is reported (count)."""
TARGET = 1.6
"""Least speed-up of all threads over one (ratio of median solve times)."""


def timed_solve(text: str, threads: str) -> tuple[float, dict]:
    from worker import solve

    os.environ["FIXQ_SOLVE_THREADS"] = threads
    started = time.perf_counter()
    result = solve(json.loads(text))
    return time.perf_counter() - started, result


def same_bits(one: dict, other: dict) -> bool:
    return (
        np.array_equal(np.array(one["value"]).view(np.int64), np.array(other["value"]).view(np.int64))
        and one["policy_index"] == other["policy_index"]
        and one["iterations"] == other["iterations"]
        and one["error_bound"] == other["error_bound"]
    )


def main() -> int:
    from worker.environment import available_cpus

    os.environ["FIXQ_COLD_BRIDGE"] = "off"  # compiled kernels in both settings
    text = growth_document(points=POINTS, hints=False)
    every = str(available_cpus())
    timed_solve(text, every)  # compiles or loads the kernels
    times: dict[str, list[float]] = {"1": [], every: []}
    results: dict[str, dict] = {}
    for _ in range(REPEATS):
        for threads in ("1", every):
            seconds, results[threads] = timed_solve(text, threads)
            times[threads].append(seconds)
    one, many = statistics.median(times["1"]), statistics.median(times[every])
    identical = same_bits(results["1"], results[every])
    ratio = one / many
    ok = ratio >= TARGET and identical
    print(
        f"growth without hints, {POINTS:,} x 7 points, reward storage "
        f"{results['1']['diagnostics']['reward_storage']}, {results['1']['iterations']} iterations: "
        f"1 thread {one:.2f} s, {every} threads {many:.2f} s = {ratio:.2f}x (target >= {TARGET}x); "
        f"same bits: {identical}  {verdict(ok)}"
    )
    print(f"  solve times (s), 1 thread: {', '.join(f'{t:.2f}' for t in times['1'])}; "
          f"{every} threads: {', '.join(f'{t:.2f}' for t in times[every])}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
