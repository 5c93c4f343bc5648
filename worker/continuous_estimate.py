"""Size, memory and time of a grid model whose one choice is continuous, without building it (no numba).

A continuous choice keeps no reward tables: its memory is a fixed number of
arrays per point (the solver's vectors, the search's outputs, the state
values of every point, tomorrow's interpolation corners and the policy's
sparse matrix), whatever the interval.  Its time is the search's: about
``SEARCH_POINTS`` evaluations per point in a hinted step, the scan's points
in an unhinted one.
"""

from __future__ import annotations

import math
from typing import Any

from worker.coarse_start import COARSE_FINE_ITERATIONS, coarse_levels, starts_coarse
from worker.compile_seconds import compile_seconds, continuous_kernels
from worker.costs import (
    BASE_BYTES,
    CHUNK_ELEMENTS,
    CHUNK_TEMPORARIES,
    EXPECTATION_NS,
    GRID_FIXED_S,
    ITERATION_S,
    MATVEC_NS,
    NUMPY_PAIR_NS,
    POINT_NS,
    euler_elements,
    iteration_steps,
    report_bytes,
    report_seconds,
    solve_bytes,
)
from worker.drawnames import draw_count
from worker.horizon_costs import horizon_bytes, horizon_seconds
from worker.kernel_limits import compile_bytes as compile_memory

__all__ = ["PROOF_POINTS", "SCAN_POINT_NS", "SEARCH_POINTS", "continuous_estimate"]

SEARCH_POINTS = 20
"""Evaluations of the model per point in a hinted search of a continuous choice (count; a bracket and
Brent's method, measured at 15–40 on the accuracy benchmark; priced at ``POINT_NS`` each, a hinted Bellman step
took 660–970 ns a point, 1,140 under load, on the savings shapes of ``bench/bench_estimates.py --continuous``,
2026-12-05)."""
PROOF_POINTS = 40
"""Evaluations per point of the proof at the incumbent that verifies a hinted solve (count; measured
1,400–1,500 ns a point on the same shapes at 200, 1,000 and 5,000 points, about 37 at ``POINT_NS``)."""
SCAN_POINT_NS = 10.0
"""One point of an unhinted search's scan of a ``next_of`` choice, whose candidates are the grid's own points,
tomorrow's value read there without interpolating (nanoseconds; measured 5–15 on the savings shapes of
``bench/bench_estimates.py --continuous`` at 200, 1,000 and 3,000 points, from unhinted less hinted solves, and
up to 29 while the machine was loaded).  A choice of its own interval interpolates at every candidate: its scan
is priced at ``POINT_NS`` a candidate, as a search's evaluation."""
_SEARCH_BYTES_PER_POINT = 8 * 6
"""The search's outputs and scratch per point: value, choice, reward, order, previous point, guess (bytes)."""
_GRID_SCAN_MAX = 512
"""As :data:`worker.continuous.search.GRID_SCAN_MAX` (not imported: that package loads numba)."""


def continuous_estimate(doc: Any) -> dict[str, Any]:
    """The :func:`worker.estimate.estimate` dictionary for a model with a continuous choice."""
    model = doc.model
    name = model.continuous_choice()
    choice = model.choices[name]
    grid_states = math.prod(axis.size for axis in model.states.values())
    # Shocks drawn after the choice are no axis of the value: each multiplies the search's evaluations
    # and tomorrow's nodes of a point instead.
    shocks = math.prod(shock.size for shock in model.shocks.values() if not shock.after_choice)
    draws = max(1, draw_count(model))
    n = grid_states * shocks
    states = len(model.states)
    nodes = 2**states
    scan = min(choice.size, _GRID_SCAN_MAX) if choice.next_of is not None else choice.size
    method = doc.solver.method
    entries = n * nodes * shocks * draws
    # Euler errors: test points along the state the choice sets, at every grid point of the other states
    # (worker.euler_states), each a search of the choice again for a continuous one.
    tested = model.states[choice.next_of].size if choice.next_of in model.states else grid_states
    others = grid_states // tested
    euler = euler_elements(doc, tested, shocks) * others
    euler_searches = euler // max(shocks, 1) * combos_of(model, name) * draws
    # With draws the probabilities are checked at every point's scanned candidates, in numpy chunks of
    # whole rows (every candidate, every draw), before the solve (worker.continuous.drawnodes.check_at_scan).
    check = (CHUNK_TEMPORARIES * 8 * min(CHUNK_ELEMENTS, n * choice.size * combos_of(model, name) * draws)
             if draws > 1 else 0)
    memory = (BASE_BYTES + max(check, solve_bytes(n, entries, method)) + n * (_SEARCH_BYTES_PER_POINT + 8 * states)
              + report_bytes(doc, n, entries, euler) + horizon_bytes(doc, n))
    hinted = bool(model.hints.concave)
    combos = combos_of(model, name)  # searched for each
    scan_ns = SCAN_POINT_NS if choice.next_of is not None else POINT_NS
    per_point = combos * draws * (SEARCH_POINTS if hinted else scan + SEARCH_POINTS)
    # The unhinted verification of a hinted search, per point: a scan and a refinement, or, where the proof at the
    # incumbent applies (one state, set by the choice, no draws: worker.continuous.bound_proof), ``PROOF_POINTS``
    # evaluations (it held at 99.7-100 % of the points of the accuracy benchmark).
    proof = states == 1 and draws == 1 and choice.next_of is not None
    verify_ns = combos * draws * (PROOF_POINTS * POINT_NS if proof else SEARCH_POINTS * POINT_NS + scan * scan_ns)
    horizon = model.horizon
    # The policy of a continuous choice keeps moving a little until the end: every evaluation phase is full.
    steps, evaluation_steps, basis = iteration_steps(doc, scan, moving_divisor=1)

    def solve_ns(sizes: list[int], iterations: float, evaluations: float) -> float:
        """A solve on state grids of ``sizes`` points: ``iterations`` Bellman steps, ``evaluations`` evaluation
        steps (nanoseconds).  As a grid model's (worker.grid_seconds), every step forms the expected continuation
        (grid states × shocks × next shocks); a Bellman step searches every point, scanning the choice's grid
        first without the hint; an evaluation step reads each point's nodes for every draw."""
        grid = math.prod(sizes)
        points = grid * shocks
        scanned = 0 if hinted else (min(dict(zip(model.states, sizes))[choice.next_of], _GRID_SCAN_MAX)
                                    if choice.next_of is not None else choice.size)
        point_ns = combos * draws * (SEARCH_POINTS * POINT_NS + scanned * scan_ns)
        expectation = grid * shocks * shocks * EXPECTATION_NS
        return (iterations * (points * point_ns + ITERATION_S * 1e9 + expectation)
                + evaluations * (expectation + points * nodes * draws * MATVEC_NS))

    sizes = [axis.size for axis in model.states.values()]
    total_ns = solve_ns(sizes, steps, evaluation_steps)
    if starts_coarse(doc):
        # worker.coarse_start: the coarsest level from zeros as a whole solve, every finer level and
        # the fine solve seeded, at a few iterations each (value iteration: as from zeros, conservatively), with
        # the evaluation steps those iterations bring.
        levels = coarse_levels(sizes)
        seeded = steps if method == "value_iteration" else min(steps, COARSE_FINE_ITERATIONS)
        seeded_evaluations = evaluation_steps * seeded / max(steps, 1)
        # The coarsest level's iterations as a whole solve's with its own scan (the Howard count grows with it).
        coarsest_scan = min(dict(zip(model.states, levels[-1]))[choice.next_of], _GRID_SCAN_MAX) \
            if choice.next_of is not None else scan
        first_steps, first_evaluations, _ = iteration_steps(doc, coarsest_scan, moving_divisor=1)
        total_ns = solve_ns(levels[-1], first_steps, first_evaluations) + sum(
            solve_ns(level, seeded, seeded_evaluations) for level in [*levels[:-1], sizes])
        share = sum(math.prod(level) for level in levels) / grid_states
        basis += (f"; a coarse start on {len(levels)} level(s) of {share:.2g} of the points in all, the "
                  f"coarsest from zeros, then {seeded} iterations a level")
    seconds = (GRID_FIXED_S * 1e9 + total_ns) * 1e-9
    if hinted:
        # The unhinted verification, once after an infinite horizon's solve and after every period's hinted search
        # in a finite one (worker.solvers.backward.period_step).
        seconds += (horizon.periods if horizon is not None else 1) * n * verify_ns * 1e-9
    if horizon is not None and draws > 1:
        from worker.document.horizon import varies_by_period  # here: worker.document reads the estimate's limits

        # Every period checks the draws' probabilities at the policy it chose, and, when the model changes with the
        # period, first at every point's scanned candidates (worker.continuous.draw_periods), in numpy.
        checked = n * draws * (1 + (choice.size * combos if varies_by_period(model) else 0))
        seconds += horizon.periods * checked * NUMPY_PAIR_NS * 1e-9
    seconds += report_seconds(doc, n, entries, euler) + horizon_seconds(doc, n)
    seconds += euler_searches * SEARCH_POINTS * POINT_NS * 1e-9
    compile_bytes = compile_memory(model)
    compile_s, compile_basis = compile_seconds(model, continuous_kernels())
    notes = [
        f"continuous choice `{name}`: no reward tables; tomorrow's value read by {model.interpolation} "
        "interpolation",
        ("hinted searches evaluate about " f"{SEARCH_POINTS} points per state, and one unhinted step verifies them"
         if hinted else f"without the concave hint each search scans {scan:,} points, then refines"),
        "memory counts the arrays of the solve, not the Python interpreter and its libraries (about 200 MiB)",
        f"the first solve of a new model structure on a machine also compiles its kernels (about {compile_s:,.1f} s "
        f"and {compile_bytes / 2**20:,.0f} MiB, then cached)",
    ]
    return {
        "kind": "grid",
        "points": n,
        "grid_states": grid_states,
        "shocks": shocks,
        "choice_points": scan,
        "pairs": n * scan,
        "bytes": memory,
        "reward_storage": "on_the_fly",
        "compile_bytes": compile_bytes,
        "compile_seconds": compile_s,
        "compile_basis": compile_basis,
        "seconds": seconds,
        "basis": (f"{basis}; a search of about {per_point} points per state ({POINT_NS:g} ns each"
                  + ("" if hinted else f", {scan_ns:g} ns a scanned point") + ")"),
        "notes": notes,
    }


def combos_of(model: Any, name: str) -> int:
    """Combinations of the choices beside the continuous ``name`` (1 without others)."""
    return math.prod(other.size for key, other in model.choices.items() if key != name)
