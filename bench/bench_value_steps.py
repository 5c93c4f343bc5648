"""The calibration of value iteration's step count (``worker.costs.VALUE_SPAN_SHARE``, :mod:`worker.mixing`).

Run from the repository root: ``python bench/bench_value_steps.py``.  Every document of ``tests/_estimate_set.py``
without a horizon is solved by value iteration in this process; printed per document: the iterations the solver
took, the steps the estimate promised, their ratio (estimate / measured), and the share of the steps a
contraction at rate β would need from a span of 1 that the solver took (the figure ``VALUE_SPAN_SHARE`` stands for
on grid models; a tabular model's steps come from its chains).  Iteration counts do not depend on the machine's
load.

Target, printed with PASS or FAIL per kind: tabular models' steps within a factor of two of the solver's; grid
models' shares are printed with their spread (no figure from the sizes alone holds them within two: how fast the
chain mixes depends on the policy).
"""

from __future__ import annotations

import copy
import math
import os
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
os.environ.setdefault("FIXQ_COLD_BRIDGE", "off")

from tests._estimate_set import documents  # noqa: E402
from worker.costs import VALUE_SPAN_SHARE  # noqa: E402
from worker.document import parse_document  # noqa: E402
from worker.estimate import estimate  # noqa: E402

FACTOR = 2.0
"""Largest ratio of promised to measured steps on tabular models, and its inverse the smallest (dimensionless)."""


def main() -> int:
    from worker import solve

    tabular, shares, grid = [], [], []
    print(f"{'document':32s} {'kind':8s} {'solver':>7s} {'estimate':>8s} {'ratio':>6s} {'share of rate-β steps':>22s}")
    for name, raw in documents().items():
        raw = copy.deepcopy(raw)
        solver = raw.setdefault("solver", {})
        solver["method"] = "value_iteration"
        solver.pop("evaluation_steps", None)
        doc = parse_document(raw)
        if doc.model.horizon is not None:
            continue
        promised = int(estimate(doc)["basis"].split(" iterations")[0])
        measured = int(solve(raw)["iterations"])
        beta, tolerance = float(doc.discount), float(doc.solver.tolerance)
        at_rate_beta = math.log(2 * tolerance * (1 - beta) / beta) / math.log(beta)
        share = measured / at_rate_beta
        ratio = promised / measured
        (tabular if doc.model.kind == "tabular" else grid).append(ratio)
        if doc.model.kind == "grid":
            shares.append(share)
        print(f"{name:32s} {doc.model.kind:8s} {measured:7d} {promised:8d} {ratio:6.2f} {share:22.2f}", flush=True)
    middle = math.exp(sum(math.log(s) for s in shares) / len(shares))
    print(f"grid: shares {min(shares):.2f} to {max(shares):.2f}, geometric mean {middle:.2f} (VALUE_SPAN_SHARE "
          f"{VALUE_SPAN_SHARE:g}); steps estimated / measured {min(grid):.2f} to {max(grid):.2f}")
    ok = all(1 / FACTOR <= ratio <= FACTOR for ratio in tabular)
    print(f"tabular: steps estimated / measured {min(tabular):.2f} to {max(tabular):.2f}: {'PASS' if ok else 'FAIL'} "
          f"(within {FACTOR:g}x)")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
