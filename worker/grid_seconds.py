"""The time of a grid model's warm solve, from its sizes and the reward storage :mod:`worker.estimate` chose
(and, beside the time of policy iteration's exact evaluation, its memory: :func:`policy_solve_bytes`).

Kept apart from :mod:`worker.estimate` (which calls it) by topic: the counts of the work a solve does
(pairs filled, entries scanned, points searched, expectations formed, evaluation steps), times the costs
of :mod:`worker.costs`, divided among the threads :mod:`worker.threadpool` would use.  Imports no numba.
"""

from __future__ import annotations

import math
from typing import Any

from worker.costs import (
    DIRECT_SOLVE_MAX_POINTS,
    DRAWS_FIXED_S,
    EXACT_LEVEL_NS,
    EXPECTATION_NS,
    FEASIBILITY_COLUMNS,
    GRID_FIXED_S,
    HINTED_POINTS,
    INTERPOLATED_PAIR_NS,
    ITERATION_S,
    MATVEC_NS,
    NUMPY_PAIR_NS,
    POINT_NS,
    SCAN_NODE_NS,
    STATIC_CLIMB_POINTS,
    TABLE_READ_NS,
    THREAD_EFFICIENCY,
    euler_elements,
    linear_solve_bytes,
    linear_solve_seconds,
    linear_solve_words,
    policy_matrix_bytes,
    report_seconds,
)
from worker.drawnames import draw_count
from worker.horizon_costs import horizon_seconds
from worker.taste import SMOOTHED_PAIR_NS
from worker.threadpool import THREAD_MIN_STEP_POINTS, threads_for

__all__ = ["grid_seconds", "policy_solve_bytes", "policy_solve_seconds", "policy_solve_words"]

DRAW_FILL_NS = 16.0
"""The compiled fill of a model with draws after the choice (:mod:`worker.drawkernel`), per (pair, draw)
(nanoseconds; measured on the separation model of ``bench/bench_draws.py``: 0.6 ms for 38,400)."""
DRAW_STEP_POINT_NS = 2.2
"""An evaluation step of such a model (:mod:`worker.drawsteps`: each point's distinct nodes, the expectation once
per step under iid shocks), per point (nanoseconds; measured there: about 7 µs per step at 3,200 points)."""


def grid_seconds(doc: Any, plan: Any, steps: int, evaluation_steps: int) -> tuple[float, str]:
    """Warm solve time of a grid model without a continuous choice (seconds, kernels compiled) and how it was
    counted; ``plan`` is its :class:`worker.estimate.GridPlan`, ``steps`` and ``evaluation_steps`` from
    :func:`worker.costs.iteration_steps`."""
    model = doc.model
    # Large problems run their table fill and Bellman steps on several threads (worker.threadpool), and very
    # large ones their evaluation steps too.
    threads = threads_for(plan.n, plan.choices)
    speedup = 1.0 + THREAD_EFFICIENCY * (threads - 1)
    evaluation_speedup = speedup if plan.n >= THREAD_MIN_STEP_POINTS else 1.0
    entries = plan.n * plan.nodes * plan.shocks  # a policy's matrix: one evaluation step, one expectation
    draws = plan.nodes >> plan.interpolated  # node sets per entry: one per draw after the choice
    # The fill evaluates every pair at every draw, whether or not tomorrow's state moves with it
    # (worker.feasibility); without an interpolated state the draws leave no node sets to the steps.
    fill_draws = max(draw_count(model), 1)
    setup = GRID_FIXED_S * 1e9 + (DRAWS_FIXED_S * 1e9 if fill_draws > 1 else 0.0)
    # Draws after the choice with an interpolated state and no static choice: a compiled fill and draw steps.
    draw_kernel = draws > 1 and plan.interpolated and plan.table_entries == plan.pairs
    if plan.reward_storage == "tables":
        per_pair = DRAW_FILL_NS if draw_kernel else NUMPY_PAIR_NS + INTERPOLATED_PAIR_NS * plan.interpolated
        setup += plan.pairs * per_pair * fill_draws / speedup
        fill = f"evaluating {plan.pairs:,} pairs once with numpy ({per_pair:g} ns each)"
        if fill_draws > 1:
            fill += f" at each of {fill_draws:,} draws after the choice"
        if plan.table_entries < plan.pairs:
            # Static choices maximised out in compiled code: every pair, or a climb of a few per entry.
            evaluated = STATIC_CLIMB_POINTS * plan.table_entries if plan.static_concave else plan.pairs
            setup += (evaluated * POINT_NS - plan.pairs * per_pair * fill_draws) / speedup
            fill = f"evaluating about {evaluated:,} pairs once in compiled code ({POINT_NS:g} ns each)"
        from worker.document.horizon import varies_by_period  # here: worker.document reads the estimate's limits

        if model.horizon is not None and varies_by_period(model):
            fixed = GRID_FIXED_S * 1e9 + (DRAWS_FIXED_S * 1e9 if fill_draws > 1 else 0.0)
            setup = fixed + (setup - fixed) * model.horizon.periods  # refilled every period (worker.period_tables)
        step = draws * plan.table_entries * (SMOOTHED_PAIR_NS if model.taste_shocks is not None else TABLE_READ_NS)
        step_total = steps * step
        how = f"{fill}, then table scans ({TABLE_READ_NS:g} ns per entry, {plan.table_entries:,} entries)"
    else:
        setup += plan.n * FEASIBILITY_COLUMNS * NUMPY_PAIR_NS  # the feasibility scan's first passes
        blocks = 2 * max(1, math.ceil(math.log2(max(plan.choices / 16, 1.0)))) + 10
        exact = plan.n * blocks * EXACT_LEVEL_NS
        # Bounds through interpolated tomorrows are loose, and so are a period's, whose continuation is the next
        # period's value, not a fixed point the steps approach: the search comes near a scan of every choice
        # (a period's measured 2026-12-05 on the glassblower example at 150 and 600 savings points: 19 ns a pair
        # per thread while the machine was loaded; SCAN_NODE_NS is the quiet figure).
        scanning = bool(plan.interpolated) or model.horizon is not None
        if scanning:
            exact = plan.n * plan.choices * plan.nodes * SCAN_NODE_NS
        # A concave search stops at the first choice that does worse; a monotone one alone scans from its bound.
        looked_at = 1 if plan.concave else HINTED_POINTS
        hinted = plan.n * looked_at * POINT_NS
        how = (
            f"pointwise evaluation in compiled code ({POINT_NS:g} ns per point); "
            + (f"hinted steps look at about {looked_at} choices per state, exact ones" if plan.hints_active
               else "exact steps")
            + (f" come near a scan of all {plan.choices:,} choices through {plan.nodes} interpolation node"
               f"{'s' if plan.nodes > 1 else ''} ({SCAN_NODE_NS:g} ns each)" if scanning
               else f" search {blocks} levels of blocks per state ({EXACT_LEVEL_NS:g} ns each)")
        )
        if model.horizon is not None:
            step_total = steps * (hinted * plan.hints_active + exact)  # every period's exact step, after its hinted
        elif plan.hints_active:
            step_total = max(steps - 2, 0) * hinted + 2 * exact  # the last iterations and the verification exact
        else:
            step_total = steps * exact
    # Every Bellman and evaluation step forms the expected continuation; an evaluation step then reads the nodes.
    expectation = plan.grid_states * plan.shocks * plan.shocks * EXPECTATION_NS
    iterations = steps * (ITERATION_S * 1e9 + expectation / speedup)
    evaluation = evaluation_steps * (expectation + plan.n * plan.nodes * MATVEC_NS) / evaluation_speedup
    if draw_kernel:
        evaluation = evaluation_steps * plan.n * DRAW_STEP_POINT_NS
    first_axis = next(iter(model.states.values())).size
    euler = 0 if model.taste_shocks is not None else euler_elements(doc, first_axis, plan.shocks)
    seconds = (setup + step_total / speedup + iterations + evaluation) * 1e-9
    if threads > 1:
        how += f"; {threads} threads ({speedup:g}× on the table fill and the Bellman steps)"
    return seconds + report_seconds(doc, plan.n, entries, euler) + horizon_seconds(doc, plan.n), how


REDUCED_FIXED_S = 3e-5
"""The fixed cost of one reduced exact evaluation of draws after the choice (:func:`worker.drawsteps.
reduced_policy_value`): the compiled system, LAPACK's call, the value expanded — no sparse matrix is built
(seconds; measured 0.03 to 0.04 ms a solve on the bike shop's 31 grid states once its policy settled)."""
REDUCED_DENSE_MAX_GRID = 400
"""As :data:`worker.drawsteps.DENSE_SOLVE_MAX_GRID` (not imported: that module loads numba;
``tests/worker/test_estimates_accuracy.py`` checks they agree)."""


def _reduced(doc: Any, plan: Any) -> bool:
    """Whether policy iteration solves a system over the grid states only: draws after the choice with a chain of
    identical rows (iid shocks or none before the choice; :func:`worker.drawsteps.reduced_policy_value`)."""
    draws = plan.nodes >> plan.interpolated
    before = [spec for spec in doc.model.shocks.values() if not spec.after_choice]
    return draws > 1 and plan.interpolated > 0 and all(spec.iid is not None for spec in before) and (
        plan.grid_states <= DIRECT_SOLVE_MAX_POINTS)


def policy_solve_seconds(doc: Any, plan: Any) -> float:
    """One exact evaluation of policy iteration on a grid model (seconds): the reduced system of the grid states
    with draws after the choice and an iid chain (dense up to ``REDUCED_DENSE_MAX_GRID`` grid states: ``g³/3``
    operations at 1 ns, plus the nodes read), else the full system of :func:`worker.costs.linear_solve_seconds`."""
    entries = plan.n * plan.nodes * plan.shocks
    if _reduced(doc, plan):
        g = plan.grid_states
        nodes = plan.n * plan.nodes
        if g <= REDUCED_DENSE_MAX_GRID:
            return REDUCED_FIXED_S + g**3 / 3 * 1e-9 + nodes * MATVEC_NS * 1e-9
        return linear_solve_seconds(g, nodes, float(doc.discount), float(doc.solver.tolerance)) + nodes * 1e-9
    return linear_solve_seconds(plan.n, entries, float(doc.discount), float(doc.solver.tolerance))


def policy_solve_words(doc: Any, plan: Any) -> str:
    if _reduced(doc, plan):
        return (f"exact evaluations over the {plan.grid_states:,} grid states (draws after the choice with iid "
                "shocks: the expected value of each grid state solves a system of their size)")
    return linear_solve_words(plan.n)


def policy_solve_bytes(doc: Any, plan: Any) -> int:
    """Memory of one exact evaluation of policy iteration on a grid model (bytes).

    The reduced system (:func:`_reduced`, :func:`worker.drawsteps.reduced_policy_value`): the policy's nodes
    merged (CSR: 16 bytes a node, the row pointers), the value, and the system over the grid states, dense up to
    ``REDUCED_DENSE_MAX_GRID`` (the matrix and LAPACK's copy of it), else sparse (a row reaches at most the nodes
    of every shock, the node arrays it is built from, its LU).  Otherwise the policy's matrix over all points and
    :func:`worker.costs.linear_solve_bytes`.
    """
    entries = plan.n * plan.nodes * plan.shocks
    if not _reduced(doc, plan):
        return policy_matrix_bytes(plan.n, entries) + linear_solve_bytes(plan.n, entries)
    g = plan.grid_states
    nodes = plan.n * plan.nodes
    merged = 16 * nodes + 8 * (plan.n + 1) + 8 * plan.n
    if g <= REDUCED_DENSE_MAX_GRID:
        return merged + 2 * 8 * g * g
    reduced = g * min(g, plan.nodes * plan.shocks)
    return merged + 3 * 8 * nodes + policy_matrix_bytes(g, reduced) + linear_solve_bytes(g, reduced)
