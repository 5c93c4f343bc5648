"""The unrestricted Bellman step of a continuous ``next_of`` choice: branch and bound (with and without the proof
at the incumbent) against the scan.

Run from the repository root: ``python bench/bench_unrestricted_step.py`` (``--quick``: 200 points only).
The model is the accuracy benchmark's (:mod:`bench_accuracy`, variants (b) ``linear`` and (c)
``monotone_cubic``: the invented household of :mod:`baseline_egm`, 7 income states).  Each size is solved
once with its hints; then the unrestricted step that verifies them, ``bellman_step(v, restricted=False,
policy_guess=policy)`` at the solved value, is timed with the branch and bound of
:mod:`worker.continuous.bound_search` and with the scan it replaces (the same kernels, the bound switched
off), interleaved, median of :data:`REPEATS`; also with the proof at the incumbent of
:mod:`worker.continuous.bound_proof` before the branch and bound (both variants; the share of points where it
held is printed),
the branch and bound alone being then the proof switched off.  The scan is the baseline measured in the same
run; the script also prints the largest amount by which the bound's value falls below the scan's at any point
(rounding only, or the script says FAIL; the same for the proof's) and how far it rises above it.  The machine
may be shared and noisy: the ratios are those of this one run.
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

import bench_accuracy  # noqa: E402

SIZES = (200, 1_000, 5_000)
"""Asset points (count; 7 income states each)."""
REPEATS = 7
"""Timed steps of each search (count); the median is printed."""
ROUNDING = 1e-13
"""Largest fall below the scan's value counted as rounding, relative to the largest value's size (about 450
ulps; the two searches stop Brent's method at different points of the same flat top)."""


def run(points: int, variant: str) -> bool:
    from worker.solve import compile_document, solve

    document = bench_accuracy.document(points, variant)
    result = solve(json.loads(json.dumps(document)))
    _, problem = compile_document(document)
    v = np.asarray(result["value"], dtype=np.float64).reshape(-1)
    policy = problem.bellman_step(v, restricted=True)[1]  # the hinted step at v: the verification's incumbent
    incumbent = problem.last_step  # the proof runs from the last step's choices at the same v only
    provable = problem.bound_proof
    modes = ("proof", "bound", "scan") if provable else ("bound", "scan")
    times: dict[str, list[float]] = {mode: [] for mode in modes}
    answers = {}
    proven = 0
    for _ in range(REPEATS + 1):
        for mode in modes:
            problem.bound_search = mode != "scan"
            problem.bound_proof = mode == "proof"
            problem.last_step = incumbent
            started = time.perf_counter()
            answers[mode] = problem.bellman_step(v, restricted=False, policy_guess=policy)[0]
            times[mode].append(time.perf_counter() - started)
            if mode == "proof":
                proven = int(np.count_nonzero(problem.proven))
    ms = {mode: 1e3 * statistics.median(times[mode][1:]) for mode in modes}
    size = float(np.abs(answers["scan"]).max())
    ok = True
    label = bench_accuracy.VARIANTS[variant][0]
    line = f"  {points:>6,} x 7  {label:<34} scan {ms['scan']:8.2f} ms  bound {ms['bound']:8.2f} ms"
    for mode in modes[:-1]:
        gap = answers[mode] - answers["scan"]
        ok = ok and bool(gap.min() >= -ROUNDING * size)
    gap = answers["bound"] - answers["scan"]
    line += f"  ratio {ms['bound'] / ms['scan']:5.2f}  value: lowest {gap.min():+.1e}, highest {gap.max():+.1e}"
    if provable:
        gap = answers["proof"] - answers["bound"]
        line += (f"\n  {'':>10}  {'':<34} proof {ms['proof']:8.2f} ms  held at {proven / v.size:6.1%} of points  "
                 f"ratio to bound {ms['proof'] / ms['bound']:5.2f}, to scan {ms['proof'] / ms['scan']:5.2f}  "
                 f"value vs bound: lowest {gap.min():+.1e}, highest {gap.max():+.1e}")
    print(line + f"  {'ok' if ok else 'FAIL'}")
    return ok


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="200 asset points only")
    args = parser.parse_args()
    print("unrestricted Bellman step at the solved value (threads as the solver picks them)")
    ok = True
    for points in (SIZES[:1] if args.quick else SIZES):
        for variant in ("(b)", "(c)"):
            ok = run(points, variant) and ok
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
