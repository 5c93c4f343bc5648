"""Issue 12's speed benchmark in one run: both shock models of fixq against their hand-written numpy solvers.

Run from the repository root: ``python bench/bench_shocks.py``.  It runs, in this one process,

1. :mod:`bench_taste`: an invented machine-replacement model with extreme-value taste shocks (90 wear
   levels, keep or replace), fixq's Howard method against a numpy smoothed value iteration;
2. :mod:`bench_draws`: an invented job search with separations drawn after the choice (3,200 points,
   10 choices), fixq's policy iteration (and Howard, printed) against a numpy value iteration;

each printing its own times, ratio and "same answer" figures, and exits 0 only when both reach the target
(fixq at least 5× faster at the same answer).  The machine may be shared and noisy: the ratios are those
of this one run.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import bench_draws  # noqa: E402
import bench_taste  # noqa: E402


def main() -> int:
    print("== taste shocks: machine replacement ==")
    taste = bench_taste.main()
    print("\n== draws after the choice: job search with separations ==")
    draws = bench_draws.main()
    verdict = "PASS" if taste == 0 and draws == 0 else "FAIL"
    print(f"\nboth shock models at least 5x faster than their numpy solvers at the same answer: {verdict}")
    return 0 if verdict == "PASS" else 1


if __name__ == "__main__":
    sys.exit(main())
