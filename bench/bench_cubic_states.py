"""Accuracy and time of ``monotone_cubic`` against ``linear`` interpolation on two state variables.

Run from the repository root: ``python bench/bench_cubic_states.py`` (``--quick``: the smaller grids only).
The model is invented growth with log utility, full depreciation, a productivity state ``A`` that drifts
(``A' = A**0.6``, so tomorrow's ``A`` falls between grid points) and a two-point shock ``z``
(``tests/worker/test_continuous_cubic.py``); its exact policy is known, ``k' = αβ·A·z·k**α`` (Brock &
Mirman 1972).  For each grid and interpolation it prints the largest distance of the solved policy from
that closed form at the grid points and the median solve time (the kernels compiled before timing).  There
is no target: it shows what the cubic buys and costs.  The machine may be shared and noisy.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402

from worker.solve import solve  # noqa: E402

ALPHA, BETA = 0.3, 0.95


def _document(k_points: int, a_points: int, how: str) -> dict:
    """The invented growth model (as in ``tests/worker/test_continuous_cubic.py``) on a given grid."""
    model = {
        "kind": "grid", "params": {"alpha": ALPHA, "rho": 0.6},
        "states": {"k": {"min": 0.05, "max": 0.4, "points": k_points},
                   "A": {"min": 0.7, "max": 1.4, "points": a_points}},
        "shocks": {"z": {"markov": {"values": [0.9, 1.1], "matrix": [[0.8, 0.2], [0.3, 0.7]]},
                         "transform": "none"}},
        "choices": {"k_next": {"next_of": "k", "continuous": True}},
        "next": {"A": "A**rho"}, "define": {"c": "A * z * k**alpha - k_next"}, "reward": "log(c)",
        "feasible": ["c > 0"], "hints": {"concave": True}, "interpolation": how,
    }
    return {"version": 1, "discount": BETA, "model": model, "solver": {"method": "howard", "tolerance": 1e-9}}


def _policy_error(result: dict) -> float:
    """Largest distance of the solved policy from Brock–Mirman's k' = αβ·A·z·k**α at the grid points."""
    k, a, z = (np.array(result["axes"][name]) for name in ("k", "A", "z"))
    exact = ALPHA * BETA * a[None, :, None] * z[None, None, :] * k[:, None, None] ** ALPHA
    return float(np.abs(np.array(result["policy"]["k_next"]) - exact).max())

GRIDS = ((12, 6), (24, 12), (100, 10), (200, 20))
"""(capital points, productivity points) of the benchmark."""
QUICK_GRIDS = ((12, 6), (24, 12))
REPEATS = 3


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="the smaller grids only")
    grids = QUICK_GRIDS if parser.parse_args().quick else GRIDS
    print(f"{'grid':>10} {'interpolation':>15} {'policy error':>13} {'seconds':>8}")
    for how in ("linear", "monotone_cubic"):
        solve(_document(12, 6, how))  # compile outside the timing
    for k_points, a_points in grids:
        for how in ("linear", "monotone_cubic"):
            times = []
            for _ in range(REPEATS):
                started = time.perf_counter()
                result = solve(_document(k_points, a_points, how))
                times.append(time.perf_counter() - started)
            print(f"{k_points:>5} x {a_points:<3} {how:>15} {_policy_error(result):>13.2e} "
                  f"{statistics.median(times):>8.3f}")


if __name__ == "__main__":
    main()
