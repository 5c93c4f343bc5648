"""Life-cycle benchmark: fixq's backward induction against a hand-written numpy one, measured in one run.

Run from the repository root: ``python bench/bench_life_cycle.py``.  An invented life cycle of
61 ages × 1,000 asset points × 7 income states: log utility of consumption, an income profile by
age (a hump, then a pension from age 45 on), survival probabilities in the discount, a bequest
value at the end.  The income chain is Rouwenhorst's (1995), built here and given to fixq as an
explicit Markov chain, so both solvers use the same numbers.

Target (issue 13), printed with PASS or FAIL: fixq with hints at least 10× faster than the
baseline, the same policy and values within 1e-9.  Also printed: fixq without hints, and the
peak memory each allocates (``tracemalloc``, numpy arrays included; the interpreter not counted).
The kernels are compiled (and cached) by a first, untimed solve.
"""

from __future__ import annotations

import statistics
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from worker import solve  # noqa: E402

AGES = 61
ASSET_POINTS = 1_000
INCOME_STATES = 7
RATE = 0.03
BETA = 0.96
BEQUEST = 2.0
REPEATS = 3
"""Timed runs of each solver; the median is reported (count)."""
TARGET_RATIO = 10.0
"""fixq with hints at least this many times faster than the baseline (issue 13)."""


def rouwenhorst(points: int, rho: float, sigma: float) -> tuple[np.ndarray, np.ndarray]:
    """Rouwenhorst's (1995) chain for an AR(1) with persistence ``rho`` and innovation s.d. ``sigma``."""
    p = (1 + rho) / 2
    matrix = np.array([[p, 1 - p], [1 - p, p]])
    for n in range(3, points + 1):
        grown = np.zeros((n, n))
        grown[:-1, :-1] += p * matrix
        grown[:-1, 1:] += (1 - p) * matrix
        grown[1:, :-1] += (1 - p) * matrix
        grown[1:, 1:] += p * matrix
        grown[1:-1] /= 2
        matrix = grown
    spread = sigma / np.sqrt(1 - rho**2) * np.sqrt(points - 1)
    return np.linspace(-spread, spread, points), matrix


def invented_profile() -> tuple[np.ndarray, np.ndarray]:
    """Income by age (a hump, a pension from age 45 of the 61) and survival to the next age (invented)."""
    age = np.arange(AGES)
    income = np.where(age < 45, 1.0 + 0.04 * age - 0.0009 * age**2, 0.6)
    survival = np.clip(1.0 - 0.0004 * np.exp(0.09 * age), 0.5, 1.0)
    return income, survival


def document(hints: bool) -> dict:
    shock_values, matrix = rouwenhorst(INCOME_STATES, 0.95, 0.1)
    income, survival = invented_profile()
    return {
        "version": 1,
        "label": "invented life cycle, 61 ages",
        "discount": BETA,
        "model": {
            "kind": "grid",
            "params": {"r": RATE, "income": income.tolist(), "survival": survival.tolist(), "bequest": BEQUEST},
            "states": {"a": {"min": 0.0, "max": 30.0, "points": ASSET_POINTS}},
            "shocks": {"z": {"markov": {"values": shock_values.tolist(), "matrix": matrix.tolist()}}},
            "choices": {"an": {"next_of": "a"}},
            "define": {"c": "(1 + r) * a + income * exp(z) - an"},
            "feasible": ["c > 0"],
            "reward": "log(c)",
            "hints": {"monotone": hints, "concave": hints},
            "horizon": {"periods": AGES, "terminal_value": "bequest * log(1 + a)", "discount": "discount * survival"},
        },
    }


def baseline() -> tuple[np.ndarray, np.ndarray]:
    """Backward induction by hand in numpy: all (asset, income, next asset) triples each age."""
    shock_values, matrix = rouwenhorst(INCOME_STATES, 0.95, 0.1)
    income, survival = invented_profile()
    assets = np.linspace(0.0, 30.0, ASSET_POINTS)
    after = np.broadcast_to(BEQUEST * np.log1p(assets)[:, None], (ASSET_POINTS, INCOME_STATES))
    values = np.empty((AGES, ASSET_POINTS, INCOME_STATES))
    policy = np.empty((AGES, ASSET_POINTS, INCOME_STATES), dtype=np.int64)
    for t in range(AGES - 1, -1, -1):
        cash = (1 + RATE) * assets[:, None] + income[t] * np.exp(shock_values)[None, :]  # (a, z)
        c = cash[:, :, None] - assets[None, None, :]  # (a, z, a')
        expected = (after @ matrix.T).T  # (z, a'): E[V(a', z') | z]
        with np.errstate(divide="ignore", invalid="ignore"):
            q = np.where(c > 0, np.log(c), -np.inf) + BETA * survival[t] * expected[None, :, :]
        policy[t] = q.argmax(axis=2)
        values[t] = np.take_along_axis(q, policy[t][:, :, None], axis=2)[:, :, 0]
        after = values[t]
    return values, assets[policy]


def timed(run) -> tuple[float, object]:
    """Median seconds of ``REPEATS`` runs, and the last run's output."""
    times = []
    for _ in range(REPEATS):
        started = time.perf_counter()
        out = run()
        times.append(time.perf_counter() - started)
    return statistics.median(times), out


def peak_bytes(run) -> int:
    """Peak bytes allocated during one run (``tracemalloc``; it slows the run, so that run is not timed)."""
    tracemalloc.start()
    run()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return peak


def main() -> None:
    solve(document(True))  # compile (or load) the kernels: not timed
    solve(document(False))
    base_s, (base_values, base_policy) = timed(baseline)
    base_peak = peak_bytes(baseline)
    print(f"life cycle: {AGES} ages x {ASSET_POINTS:,} assets x {INCOME_STATES} income states "
          f"(median of {REPEATS} runs each)")
    print(f"baseline (numpy backward induction): {base_s:8.3f} s, peak {base_peak / 2**20:8.1f} MiB")
    ratios = {}
    for hints in (True, False):
        seconds, result = timed(lambda: solve(document(hints)))
        peak = peak_bytes(lambda: solve(document(hints)))
        values = np.array(result["value"])
        same_policy = np.array_equal(np.array(result["policy"]["an"]), base_policy)
        gap = float(np.abs(values - base_values).max())
        ratios[hints] = (base_s / seconds, same_policy, gap)
        print(f"fixq {'with hints   ' if hints else 'without hints'}: {seconds:8.3f} s, peak {peak / 2**20:8.1f} MiB "
              f"(the result document's nested lists included), {base_s / seconds:6.1f}x faster, same policy: "
              f"{same_policy}, max value gap {gap:.2e}, error bound {result['error_bound']:.2e}")
    ratio, same_policy, gap = ratios[True]
    ok = ratio >= TARGET_RATIO and same_policy and gap <= 1e-9
    print(f"target: with hints >= {TARGET_RATIO:g}x faster, same answer: {'PASS' if ok else 'FAIL'} ({ratio:.1f}x)")


if __name__ == "__main__":
    main()
