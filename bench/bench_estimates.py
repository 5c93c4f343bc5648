"""The size estimates against measurements: memory and time of every document of ``tests/_estimate_set.py``.

Run from the repository root: ``python bench/bench_estimates.py`` (add ``--large`` for three grid models of
29,000 to 300,000 points, ``--rss`` for the resident-memory column, ``--cold`` for the first solve of each
structure with an empty kernel cache; ``--continuous`` alone for the time of sixteen models with a continuous
choice, :func:`continuous_main`; ``--horizon`` alone for the time of the finite-horizon shapes of
``tests/_horizon_shapes.py``, :func:`horizon_main`).  Target, printed with PASS or FAIL: every ratio estimate / measured
within [1/2, 2].  Besides the set, two documents are solved under a memory cap that leaves their tables
out (``POINTWISE``), for the exact pointwise search through an interpolated state.

What is measured (the figures the estimate promises):

* memory: the peak of the memory :mod:`tracemalloc` traces (Python objects and numpy's arrays) during a
  solve of the document in a process that solved it once already, above what was traced just before, or the
  traced memory at a direct solve plus the LU factor it holds outside the trace, whichever is larger
  (:func:`tests._estimate_set.measure_memory`) — the ``bytes`` of ``POST /v1/check`` and of admission;
* with ``--rss``: a fresh process per document imports fixq, solves the document once (kernels loaded from
  the cache, libraries imported), then the growth of its peak resident memory (``VmHWM``, reset before) over a
  second solve is printed beside it, for information: freed memory the allocator keeps makes it smaller than
  the traced peak, and memory returned to the system in between makes it larger;
* time: the wall time of a warm solve (kernels compiled and loaded, the document solved once before), the
  median of ``REPEATS`` — the ``seconds`` of the estimate;
* with ``--cold``: a fresh process per grid document with an empty kernel folder (``FIXQ_KERNEL_CACHE``, the
  cold bridge off, so it waits for its kernels) imports fixq, solves the document, then solves it again: the
  first solve's extra time (``cold+``) is compared with ``compile_seconds``; a second fresh process on the same,
  now filled, folder gives the extra time of loading them (``load+``), compared with
  :data:`worker.compile_seconds.LOAD_S`.  ``bench/bench_compile.py`` splits the cold extra by kernel.

The documents: ``tests/_estimate_set.py``'s set, its ``method_variants`` (the taste-shock and draw documents by
policy iteration and value iteration) and ``POINTWISE``.

The machine may be shared and noisy: time ratios are those of this run (the median of the repeats), and
the test ``tests/worker/test_estimates_accuracy.py`` asserts the memory ratios only.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
os.environ.setdefault("FIXQ_COLD_BRIDGE", "off")

from tests._estimate_set import (  # noqa: E402
    POINTWISE,
    continuous_shapes,
    documents,
    measure_memory,
    measure_seconds,
    method_variants,
)
from tests._horizon_shapes import horizon_shapes  # noqa: E402
from worker.compile_seconds import LOAD_S  # noqa: E402
from worker.document import parse_document  # noqa: E402
from worker.estimate import estimate  # noqa: E402

REPEATS = 5
"""Timed warm solves per document; their median is compared (count)."""
CONTINUOUS_REPEATS = 7
"""Timed warm solves per document of ``--continuous`` (count; the median is compared)."""
FACTOR = 2.0
"""Largest ratio estimate / measured, and its inverse the smallest (dimensionless)."""
_MIB = 2**20

RSS_CHILD = r"""
import json, sys, os
sys.path.insert(0, {root!r})
from worker import solve
raw = json.loads(sys.stdin.read())
solve(raw)
def status(field):
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith(field + ":"):
                return int(line.split()[1]) * 1024
with open("/proc/self/clear_refs", "w") as f:
    f.write("5")
before = status("VmRSS")
solve(raw)
print(json.dumps({{"grown": status("VmHWM") - before}}))
"""

COLD_CHILD = r"""
import json, sys, time
sys.path.insert(0, {root!r})
given = json.loads(sys.stdin.read())
raw, limits = given["document"], given["limits"]
from worker import solve
start = time.perf_counter()
solve(raw, limits=limits)
first = time.perf_counter() - start
start = time.perf_counter()
solve(raw, limits=limits)
print(json.dumps({{"extra": first - (time.perf_counter() - start)}}))
"""


def _child(code: str, raw: dict, env: dict[str, str]) -> dict:
    done = subprocess.run(
        [sys.executable, "-c", code.format(root=str(ROOT))], input=json.dumps(raw), capture_output=True, text=True,
        env={**os.environ, **env}, timeout=900, check=True,
    )
    return json.loads(done.stdout.strip().splitlines()[-1])


def verdict(ratio: float) -> str:
    return "ok" if 1 / FACTOR <= ratio <= FACTOR else "OUT"


def continuous_main() -> int:
    """``--continuous``: the time estimate of :func:`tests._estimate_set.continuous_shapes` against the median of
    ``CONTINUOUS_REPEATS`` warm solves, with the solve's iterations and evaluation steps and the coarse start's
    iterations (the counts the estimate guesses)."""
    from worker import solve

    print(f"{'document':30s} {'est s':>8s} {'median s':>9s} {'ratio':>6s}    iterations (coarse)  evaluation steps")
    ratios = []
    for name, raw in continuous_shapes().items():
        size = estimate(parse_document(raw))
        seconds = measure_seconds(raw, CONTINUOUS_REPEATS)
        result = solve(raw)
        coarse = (result["diagnostics"].get("coarse_start") or {}).get("iterations", 0)
        ratios.append(size["seconds"] / seconds)
        print(f"{name:30s} {size['seconds']:8.4f} {seconds:9.4f} {ratios[-1]:6.2f} {verdict(ratios[-1]):3s} "
              f"{result['iterations']:4d} ({coarse:3d})        {result['evaluation_steps']:6d}", flush=True)
    ok = all(1 / FACTOR <= ratio <= FACTOR for ratio in ratios)
    print(f"continuous time ratios {min(ratios):.2f} to {max(ratios):.2f}: {'PASS' if ok else 'FAIL'} "
          f"(within {FACTOR:g}x, this run)")
    return 0 if ok else 1


def horizon_main() -> int:
    """``--horizon``: the time estimate of :func:`tests._horizon_shapes.horizon_shapes` (continuous and grid
    choices with draws after them, with and without params by period; a continuous choice with and without its
    hints; the glassblower's hinted grid) against the median of ``CONTINUOUS_REPEATS`` warm solves, with the
    median CPU time of the process (on a loaded machine nearer a quiet wall time, its threads' time summed) and of
    the result's construction (what :mod:`worker.horizon_costs` counts beside the periods' steps)."""
    import statistics
    import time

    import worker.periods as periods
    from worker import solve

    parts: dict[str, float] = {}
    build = periods.horizon_result

    def timed_result(*args, **kwargs):  # the result's lists (and the cohort), apart from the periods' steps
        start = time.perf_counter()
        try:
            return build(*args, **kwargs)
        finally:
            parts["result"] = time.perf_counter() - start

    periods.horizon_result = timed_result
    print(f"{'document':40s} {'est s':>8s} {'median s':>9s} {'ratio':>6s}     {'cpu s':>8s} {'ratio':>6s}  "
          "result s  periods")
    ratios, cpu_ratios = [], []
    try:
        for name, raw in horizon_shapes().items():
            size = estimate(parse_document(raw))
            solve(raw)
            wall, cpu, results = [], [], []
            for _ in range(CONTINUOUS_REPEATS):
                start, started = time.perf_counter(), time.process_time()
                solve(raw)
                wall.append(time.perf_counter() - start)
                cpu.append(time.process_time() - started)
                results.append(parts["result"])
            ratios.append(size["seconds"] / statistics.median(wall))
            cpu_ratios.append(size["seconds"] / statistics.median(cpu))
            print(f"{name:40s} {size['seconds']:8.4f} {statistics.median(wall):9.4f} {ratios[-1]:6.2f} "
                  f"{verdict(ratios[-1]):3s} {statistics.median(cpu):8.4f} {cpu_ratios[-1]:6.2f} "
                  f"{statistics.median(results):9.4f} {raw['model']['horizon']['periods']:8d}", flush=True)
    finally:
        periods.horizon_result = build
    ok = all(1 / FACTOR <= ratio <= FACTOR for ratio in ratios)
    print(f"horizon time ratios {min(ratios):.2f} to {max(ratios):.2f}: {'PASS' if ok else 'FAIL'} "
          f"(within {FACTOR:g}x, this run); against CPU time {min(cpu_ratios):.2f} to {max(cpu_ratios):.2f}")
    return 0 if ok else 1


def main(argv: list[str]) -> int:
    if "--continuous" in argv:
        return continuous_main()
    if "--horizon" in argv:
        return horizon_main()
    large, rss, cold = "--large" in argv, "--rss" in argv, "--cold" in argv
    rows = []
    print(f"{'document':28s} {'est MiB':>9s} {'traced':>9s} {'ratio':>6s}    {'est s':>8s} {'warm s':>8s} "
          f"{'ratio':>6s}" + ("   rss MiB" if rss else "")
          + ("  cold+  compile  ratio     load+  LOAD_S ratio" if cold else ""))
    variants = method_variants()
    cases = [(name, raw, None) for name, raw in {**documents(large), **variants}.items()]
    cases += [(name, raw, limits) for name, (raw, limits) in POINTWISE.items()]
    for name, raw, limits in cases:
        size = estimate(parse_document(raw), limits=limits)
        traced = measure_memory(raw, limits)
        seconds = measure_seconds(raw, REPEATS, limits)
        row = {"name": name, "memory": size["bytes"] / traced, "time": size["seconds"] / seconds,
               "variant": name in variants}
        line = (f"{name:28s} {size['bytes'] / _MIB:9.2f} {traced / _MIB:9.2f} {row['memory']:6.2f} "
                f"{verdict(row['memory']):3s} {size['seconds']:8.4f} {seconds:8.4f} {row['time']:6.2f} "
                f"{verdict(row['time']):3s}")
        if rss and limits is None:
            line += f" {_child(RSS_CHILD, raw, {})['grown'] / _MIB:9.2f}"
        if cold and raw["model"]["kind"] == "grid":
            with tempfile.TemporaryDirectory() as cache:
                env = {"FIXQ_KERNEL_CACHE": cache}
                extra = _child(COLD_CHILD, {"document": raw, "limits": limits}, env)["extra"]
                loaded = _child(COLD_CHILD, {"document": raw, "limits": limits}, env)["extra"]
            promised = size["compile_seconds"]
            row["cold"] = promised / extra
            line += (f" {extra:7.2f} {promised:7.2f} {row['cold']:6.2f} {verdict(row['cold']):3s}"
                     f" {loaded:6.2f} {LOAD_S:5.2f} {LOAD_S / loaded:6.2f}")
        print(line, flush=True)
        rows.append(row)
    memory_ok = all(1 / FACTOR <= row["memory"] <= FACTOR for row in rows)
    time_ok = all(1 / FACTOR <= row["time"] <= FACTOR for row in rows if not row["variant"])
    spread = [row["memory"] for row in rows]
    print(f"memory ratios {min(spread):.2f} to {max(spread):.2f}: {'PASS' if memory_ok else 'FAIL'} "
          f"(within {FACTOR:g}x)")
    spread = [row["time"] for row in rows if not row["variant"]]
    print(f"warm time ratios {min(spread):.2f} to {max(spread):.2f}: {'PASS' if time_ok else 'FAIL'} "
          f"(within {FACTOR:g}x, this run; the documents as written, each by its own method)")
    # The method variants' time is printed apart: value iteration's steps on a grid model depend on how fast
    # the policy's chain mixes, which the estimate cannot know before the solve (README, "Estimates").
    out = [f"{row['name']} {row['time']:.2f}" for row in rows
           if row["variant"] and not 1 / FACTOR <= row["time"] <= FACTOR]
    print("method variants' warm time: " + ("all within the factor" if not out else
          "outside the factor: " + ", ".join(out) + " (value iteration on a grid model: a rough figure)"))
    colds = [row["cold"] for row in rows if "cold" in row]
    cold_ok = all(1 / FACTOR <= ratio <= FACTOR for ratio in colds)
    if colds:
        print(f"compile_seconds / cold extra {min(colds):.2f} to {max(colds):.2f}: {'PASS' if cold_ok else 'FAIL'} "
              f"(within {FACTOR:g}x, this run)")
    return 0 if memory_ok and time_ok and cold_ok else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
