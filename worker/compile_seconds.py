"""What the first solve of a model structure adds to its time: the kernels it compiles, or their load.

A grid model's solve runs kernels generated for its structure (:mod:`worker._codegen`), compiled by numba
on first use and then kept in the kernel folder.  Which kernels a solve compiles follows from the plan
:mod:`worker.estimate` makes (the reward storage, the hints, static choices, draws after the choice), so
the cold cost is counted kernel by kernel: each kind has a fixed cost and, where the kernel writes the
model's expressions out (pointwise evaluation), a cost per part of the reward and feasibility expressions
(:func:`worker.kernel_limits.expression_nodes`).  Kernels reading reward tables do not depend on the
expressions.  Every figure was measured on the 2-core development machine by ``bench/bench_compile.py``
(numba's compile events, per kernel, in a fresh process with an empty kernel folder).

When the structure's kernels are in the kernel folder already (:mod:`worker.kernel_presence` says so),
the first solve in a fresh process only loads them: ``LOAD_S``.  A model with taste shocks runs the
installed kernels of :mod:`worker.kernels` only (nothing generated), and a tabular model none.

Not counted: the first solve after installing fixq, which also compiles the installed kernels
(:mod:`worker.kernels`, :mod:`worker.drawsteps`, :mod:`worker.continuous.interp_kernels`: measured up to
2.2 s for the cubic interpolation's) once for the installation.  Imports no numba.
"""

from __future__ import annotations

import math
from typing import Any

from worker.kernel_limits import expression_nodes

__all__ = ["LOAD_S", "compile_kernels", "compile_seconds", "continuous_kernels"]

LOAD_S = 0.4
"""What the first solve in a fresh worker process adds when its kernels are compiled already: modules
imported on first use, the generated module and numba's machine code loaded from the folders (seconds;
measured 0.22–0.33 on the 14 grid documents of ``bench/bench_estimates.py`` on a quiet machine, 0.34–0.94 on a
busy one; a model with taste shocks, which compiles nothing of its own, 0.3–0.8 for its whole first solve).
Also part of every cold first solve, beside the compile."""
SCAN_PAIRS_MAX = 20_000_000
"""As :data:`worker.griddiagnostics.SCAN_MAX_PAIRS` (not imported: that module builds on numpy's kernels'
results; ``tests/worker/test_estimates_accuracy.py`` checks they agree)."""

KERNEL_COSTS: dict[str, tuple[float, float]] = {
    "table scan": (0.20, 0.0),
    "table scan with draws": (0.35, 0.0),
    "policy nodes from tables": (0.14, 0.0),
    "policy nodes with draws": (0.30, 0.0),
    "hinted table search": (0.37, 0.0),
    "exact block search": (0.78, 0.025),
    "hinted search": (0.35, 0.0105),
    "pointwise policy nodes": (0.10, 0.006),
    "pair counts": (0.12, 0.008),
    "static choices maximised out": (1.40, 0.025),
    "draw tables": (0.55, 0.02),
    "continuous search": (2.10, 0.025),
    "continuous policy": (0.20, 0.0),
}
"""Compile time of each kind of generated kernel: ``(fixed, per part)`` in seconds, the part being one
number, name, operator or call of the reward and feasibility expressions.  Measured by
``bench/bench_compile.py`` (numba's compile events, one fresh process per document, empty kernel folder):
table scan 0.17–0.22 (0.31–0.37 with draws after the choice); its policy nodes 0.11–0.22 (0.27–0.32 with
draws); the hinted search on tables 0.37; the exact block search 1.10 at 12 parts and 2.06 at 50 (0.92–1.18
on the others); the pointwise hinted search 0.48 at 12 parts, 0.88 at 50; the pointwise policy nodes 0.17 at 12
parts, 0.40 at 50; the pair counts of a pointwise model with an interpolated state 0.24–0.32; the static
choices' kernel 1.7–1.9 (an elastic-labour model, 17 parts); the draw tables' fill 0.84–1.09 at 15 and 26
parts; the continuous choice's search 2.43 and its policy kernel 0.19 (the beekeeper example, 12 parts).
The expressions' defines add nothing measurable (they are computed once per point)."""


def _parts(model: Any) -> int:
    nodes = expression_nodes(model)
    return nodes["reward"] + nodes["feasible"]


def compile_kernels(model: Any, plan: Any) -> list[str]:
    """The kinds of generated kernel the first solve of a grid model (no continuous choice) compiles, from its
    :class:`worker.estimate.GridPlan` (as :mod:`worker.gridmodel` and :mod:`worker.gridproblem` warm them up)."""
    if getattr(model, "taste_shocks", None) is not None:
        return []  # the installed kernels only (worker.tastegrid)
    draws = plan.nodes >> plan.interpolated > 1
    static = plan.table_entries < plan.pairs
    kinds = []
    if plan.reward_storage == "tables":
        if static:
            kinds.append("static choices maximised out")
        elif draws and plan.interpolated:
            kinds.append("draw tables")
        kinds += ["table scan with draws" if draws else "table scan",
                  "policy nodes with draws" if draws else "policy nodes from tables"]
        if plan.hints_active:
            kinds.append("hinted table search")
    else:
        kinds += ["exact block search", "pointwise policy nodes"]
        if plan.hints_active:
            kinds.append("hinted search")
        if plan.interpolated and plan.pairs <= SCAN_PAIRS_MAX:
            kinds.append("pair counts")  # the clamped-state counts of the diagnostics (worker.griddiagnostics)
    return kinds


def continuous_kernels() -> list[str]:
    """The kinds of generated kernel the first solve of a model with a continuous choice compiles."""
    return ["continuous search", "continuous policy"]


def compile_seconds(model: Any, kinds: list[str], *, cached: bool = False) -> tuple[float, str]:
    """``(seconds, basis)`` a first solve adds: ``LOAD_S``, plus compiling ``kinds`` unless ``cached`` (the
    kernels are in the kernel folder)."""
    if cached or not kinds:
        why = "its kernels are in the kernel folder" if cached and kinds else "no kernel generated for it"
        return LOAD_S, f"{why}: loading in a fresh process ({LOAD_S:g} s)"
    parts = _parts(model)
    costs = {kind: KERNEL_COSTS[kind][0] + KERNEL_COSTS[kind][1] * parts for kind in kinds}
    seconds = LOAD_S + math.fsum(costs.values())
    listed = ", ".join(f"{kind} {cost:.2f} s" for kind, cost in costs.items())
    return seconds, f"compiling {listed} ({parts} parts in the reward and feasibility), loading {LOAD_S:g} s"
