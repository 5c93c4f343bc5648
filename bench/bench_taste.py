"""Benchmark: a machine-replacement model with taste shocks, fixq against a hand-written numpy solver.

An invented machine shop: a machine's wear is one of 90 levels; each period
it is kept (wear rises by 0, 1 or 2 levels with probabilities 0.35, 0.5,
0.15, capped at the top) at an upkeep that grows with wear, or replaced (a
fixed price, less a resale value that falls with wear; wear starts again at
0).  Each choice carries an additive extreme-value taste shock of scale 0.5;
β = 0.99.  All numbers are invented.

The same model is solved in one run by

* fixq (``worker.solve``, a tabular document, Howard's method, tolerance
  1e-8; the second of two solves in the process, as a worker that has served
  a job runs), and
* a hand-written numpy smoothed value iteration
  ``v ← s·log Σ_a exp((r_a + β P_a v)/s)`` (max subtracted first), stopped when
  ``‖Δv‖∞ ≤ 1e-8·(1 − β)/β``, the usual rule for the same accuracy;

it prints both times, their ratio (target: fixq at least 5× faster), and the
largest differences of the values and of the choice probabilities.

Run from the repository root: ``python bench/bench_taste.py``.
"""

from __future__ import annotations

import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from worker import solve  # noqa: E402

LEVELS = 90
BETA = 0.99
SCALE = 0.5
TOLERANCE = 1e-8
STEPS = (0.35, 0.5, 0.15)
"""Probabilities that wear rises by 0, 1 or 2 levels in a period the machine is kept (invented)."""


def model_arrays() -> tuple[np.ndarray, np.ndarray]:
    """``(reward (S, 2), transition (S, 2, S))``: keep, replace."""
    wear = np.arange(LEVELS, dtype=np.float64)
    reward = np.column_stack([-0.05 * wear, -(6.0 - 0.03 * (LEVELS - 1 - wear))])
    transition = np.zeros((LEVELS, 2, LEVELS))
    for level in range(LEVELS):
        for rise, probability in enumerate(STEPS):
            transition[level, 0, min(level + rise, LEVELS - 1)] += probability
    transition[:, 1, 0] = 1.0
    return reward, transition


def document() -> dict:
    reward, transition = model_arrays()
    return {
        "version": 1,
        "label": "machine shop replacing a machine as it wears, with taste shocks (invented)",
        "discount": BETA,
        "model": {
            "kind": "tabular", "states": LEVELS, "actions": ["keep", "replace"],
            "reward": reward.tolist(), "transition": transition.tolist(),
            "taste_shocks": {"scale": SCALE},
        },
        "solver": {"method": "howard", "tolerance": TOLERANCE},
    }


def numpy_solve() -> tuple[np.ndarray, np.ndarray, int]:
    """``(v, choice probabilities (S, 2), iterations)`` by smoothed value iteration."""
    reward, transition = model_arrays()
    keep, replace = transition[:, 0, :], transition[:, 1, :]
    v = np.zeros(LEVELS)
    stop = TOLERANCE * (1 - BETA) / BETA
    for iteration in range(1, 1_000_000):
        q = np.column_stack([reward[:, 0] + BETA * keep @ v, reward[:, 1] + BETA * replace @ v])
        top = q.max(axis=1)
        new = top + SCALE * np.log(np.exp((q[:, 0] - top) / SCALE) + np.exp((q[:, 1] - top) / SCALE))
        change = np.abs(new - v).max()
        v = new
        if change <= stop:
            break
    q = np.column_stack([reward[:, 0] + BETA * keep @ v, reward[:, 1] + BETA * replace @ v])
    probabilities = np.exp((q - v[:, None]) / SCALE)
    return v, probabilities / probabilities.sum(axis=1, keepdims=True), iteration


def main() -> int:
    doc = document()
    first = time.perf_counter()
    solve(doc)
    first = time.perf_counter() - first
    started = time.perf_counter()
    result = solve(doc)
    fixq_s = time.perf_counter() - started
    started = time.perf_counter()
    v, probabilities, iterations = numpy_solve()
    numpy_s = time.perf_counter() - started
    value_gap = np.abs(np.array(result["value"]) - v).max()
    probability_gap = np.abs(np.array(result["choice_probabilities"]) - probabilities).max()
    ratio = numpy_s / fixq_s
    print(f"machine replacement with taste shocks, {LEVELS} wear levels x 2 choices, beta {BETA}, scale {SCALE} "
          "(invented)")
    print(f"  fixq {fixq_s * 1e3:.1f} ms (first solve in the process {first * 1e3:.0f} ms; {result['iterations']} "
          f"iterations, {result['evaluation_steps']} evaluation steps, error bound {result['error_bound']:.1e})")
    print(f"  numpy smoothed value iteration {numpy_s * 1e3:.1f} ms ({iterations} iterations)")
    print(f"  fixq {ratio:.1f}x faster (target >= 5x)  {'PASS' if ratio >= 5 else 'FAIL'}")
    print(f"  same answer: max |value difference| {value_gap:.1e}, max |probability difference| "
          f"{probability_gap:.1e}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
