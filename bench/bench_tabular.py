"""Benchmark: a sparse tabular problem sent as packed arrays, compiled and solved.

An invented warehouse: 100,000 stock levels (states) × 5 reorder sizes
(actions), each (state, action) moving to 10 nearby stock levels.  The
document carries its reward and its transition entries as packed base64
arrays (``worker.arrays.encode_array``), as a numpy client would send them.

Run from the repository root::

    python bench/bench_tabular.py [--states N]

It prints the wall seconds of ``worker.solve`` (validation, decoding,
compiling, solving, result document) — the second of two solves in one
process, as a worker that has already served a job runs, with the first
solve's time beside it — and the peak memory two ways —
``tracemalloc`` (Python and numpy allocations during a second, traced solve)
and ``resource.getrusage`` ``ru_maxrss`` (the whole process's peak resident
set, document building included) — each as a ratio to its target
(≤ 1 means the target is met).
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import time
import tracemalloc

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from worker import solve  # noqa: E402
from worker.arrays import encode_array  # noqa: E402

TARGET_SECONDS = 3.0
"""Wall-clock target of one solve (seconds)."""
TARGET_BYTES = 1.5 * 2**30
"""Peak memory target (bytes; 1.5 GiB)."""
ACTIONS = 5
SUCCESSORS = 10
WINDOW = 50
"""Successors lie within this many stock levels of today's (states)."""


def warehouse_document(n_states: int, seed: int = 0) -> dict:
    """The invented warehouse problem, packed."""
    rng = np.random.default_rng(seed)
    stock = np.arange(n_states, dtype=np.float64)
    order = np.arange(ACTIONS, dtype=np.float64)
    reward = (
        np.sqrt(stock[:, None] + 1.0) * 0.01 - 0.3 * order[None, :] + rng.normal(scale=0.1, size=(n_states, ACTIONS))
    )
    pairs = n_states * ACTIONS
    state = np.repeat(np.arange(pairs) // ACTIONS, SUCCESSORS)
    action = np.repeat(np.arange(pairs) % ACTIONS, SUCCESSORS)
    drift = (action * 4 - 8).astype(np.int64)
    offset = rng.integers(-WINDOW, WINDOW + 1, size=pairs * SUCCESSORS) + drift
    successor = np.clip(state + offset, 0, n_states - 1)
    weight = rng.random(pairs * SUCCESSORS) + 0.1
    weight /= np.add.reduceat(weight, np.arange(0, weight.size, SUCCESSORS)).repeat(SUCCESSORS)
    entries = np.column_stack([state, action, successor, weight]).astype(np.float64)
    return {
        "version": 1,
        "label": "warehouse stock levels (invented benchmark)",
        "discount": 0.95,
        "model": {
            "kind": "tabular",
            "states": n_states,
            "actions": ACTIONS,
            "reward": encode_array(reward),
            "transition": {"entries": encode_array(entries)},
        },
        "solver": {"method": "howard", "tolerance": 1e-6},
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--states", type=int, default=100_000, help="number of states (default 100,000)")
    args = parser.parse_args()

    document = warehouse_document(args.states)
    started = time.perf_counter()
    solve(document)
    cold = time.perf_counter() - started
    started = time.perf_counter()
    result = solve(document)
    seconds = time.perf_counter() - started
    maxrss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # Linux reports KiB

    tracemalloc.start()
    solve(document)
    _, traced_peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()

    print(f"problem: {args.states:,} states x {ACTIONS} actions x {SUCCESSORS} successors "
          f"({args.states * ACTIONS * SUCCESSORS:,} transition entries, packed)")
    print(f"result: status {result['status']}, {result['iterations']} iterations, "
          f"{result['evaluation_steps']} evaluation steps, error bound {result['error_bound']:.2e}")
    print(
        f"wall seconds        {seconds:8.3f}   target {TARGET_SECONDS:.1f} s     ratio {seconds / TARGET_SECONDS:.2f}"
    )
    print(
        f"  first solve       {cold:8.3f}   (includes one-time loading of compiled helpers)  ratio "
        f"{cold / TARGET_SECONDS:.2f}"
    )
    print(
        f"peak tracemalloc    {traced_peak / 2**30:8.3f} GiB  target {TARGET_BYTES / 2**30:.1f} GiB  ratio "
        f"{traced_peak / TARGET_BYTES:.2f}"
    )
    print(
        f"peak maxrss         {maxrss / 2**30:8.3f} GiB  target {TARGET_BYTES / 2**30:.1f} GiB  ratio "
        f"{maxrss / TARGET_BYTES:.2f}"
    )


if __name__ == "__main__":
    main()
