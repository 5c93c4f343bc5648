"""Size, memory and time estimates of a validated problem document, without building it.

:func:`estimate` answers ``POST /v1/check`` and the size check of every solve:
it reads only the sizes the schema already knows (``GridAxis.size``,
``ShockSpec.size``, ``ChoiceSpec.size``, array shapes), never builds a grid,
a chain or a table, and so answers in microseconds even for a document of a
billion (state, choice) pairs.

It also makes the one decision the grid compiler follows, the *reward
storage* (:func:`grid_plan`), so that the memory the check reports is the
memory the worker will use:

``tables``
    The reward (``-inf`` where not allowed) and the interpolation nodes of
    tomorrow's state are evaluated once for every (point, choice) pair and
    kept; each Bellman step is then a scan over tables.  Chosen when the
    tables fit the precompute budget — ``PRECOMPUTE_CAP_SHARE`` of the
    memory cap and at most ``PRECOMPUTE_MAX_BYTES`` — and no hint can be used.
    With static choices (:mod:`worker.staticchoices`) the tables hold the
    best reward over them per (point, other choice), filled in compiled code
    (:mod:`worker.statickernel`), and are chosen whenever they fit, hints or
    not: the hints then apply to the one other choice (:mod:`worker.hintuse`).
``on_the_fly``
    Compiled code evaluates the model's expressions pointwise inside the
    search; nothing of size (points × choice points) is ever allocated.  Chosen
    when the tables would not fit, and whenever hints can be used on a model
    without static choices: a hinted search looks at a handful of choices per
    state, so evaluating every pair up front would cost more than all the
    searches together.

What the figures promise (measured by ``bench/bench_estimates.py``, memory also by
``tests/worker/test_estimates_accuracy.py``, within a factor of two on every bundled example and the
shapes listed there): ``bytes`` is the peak of the memory a solve allocates (numpy's arrays and Python
objects, as :mod:`tracemalloc` traces them) in a worker that has its kernels and libraries loaded, the
peak of building the reward storage or of iterating with the result and its reports, whichever is
larger; ``seconds`` is the wall time of such a warm solve, compiling not counted (``compile_seconds`` is
what the first solve of a structure on a machine adds).  Both are sums of counts (pairs, points, entries
of a policy's matrix, iterations, evaluation steps) times costs measured on a 2-core x86 machine
(:mod:`worker.costs`, each constant with its measurement); iterations and evaluation steps are guessed
from the discount, the tolerance and the choices, so time is the rougher of the two.  The returned
``basis`` says how the time was counted.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from worker.compile_seconds import compile_kernels, compile_seconds
from worker.costs import (
    BASE_BYTES,
    CHOICE_BYTES,
    CHUNK_ELEMENTS,
    CHUNK_TEMPORARIES,
    DIRECT_SOLVE_MAX_POINTS,
    FEASIBILITY_COLUMNS,
    ITERATION_S,
    MATVEC_NS,
    SOLVER_BYTES_PER_STATE,
    TABLE_READ_NS,
    TABULAR_STEP_S,
    euler_elements,
    iteration_steps,
    linear_solve_bytes,
    linear_solve_seconds,
    linear_solve_words,
    report_bytes,
    report_seconds,
    solve_bytes,
)
from worker.drawnames import draw_count, draw_table_bytes
from worker.grid_seconds import grid_seconds, policy_solve_bytes, policy_solve_seconds, policy_solve_words
from worker.hintuse import hint_use
from worker.horizon_costs import horizon_bytes, horizon_seconds
from worker.kernel_limits import compile_bytes as compile_memory
from worker.staticchoices import static_choices
from worker.taste import SMOOTHED_PAIR_NS, taste_storage_words, taste_table_bytes
from worker.threadpool import TABLE_CHUNKS_AT_ONCE, threads_for

__all__ = [
    "PRECOMPUTE_CAP_SHARE",
    "PRECOMPUTE_MAX_BYTES", "REWARD_STORAGES", "GridPlan", "estimate", "grid_plan", "precompute_budget",
]

REWARD_STORAGES = ("tables", "on_the_fly")
"""The two reward storages of a grid model; a tabular model's rewards are always ``tables``."""
PRECOMPUTE_MAX_BYTES = 1 << 30
"""Largest precomputed table set, in bytes (1 GiB)."""
PRECOMPUTE_CAP_SHARE = 0.25
"""Share of the memory cap (``limits["max_bytes"]``) precomputed tables may take (dimensionless)."""

TABULAR_ENTRY_NS = 10.0
"""Reading a tabular transition into a sparse matrix, per entry given (nanoseconds; measured 11 on the dense
document of ``bench/bench_estimates.py``)."""
DENSE_CONVERSION_BYTES = 24
"""Temporaries per entry of a dense tabular transition while it becomes a sparse matrix (bytes; measured on
``bench/bench_estimates.py``'s dense document: the traced peak is about 40 bytes per entry in all)."""

_MIB = 2**20


@dataclass(frozen=True)
class GridPlan:
    """Sizes of a grid model and the reward storage its compilation will use.

    Attributes
    ----------
    grid_states : int
        Points of the product grid of the endogenous states.
    shocks : int
        Points of the product chain of the shocks (1 without shocks).
    n : int
        Entries of the value function, ``grid_states · shocks``.
    choices : int
        Alternatives per state (C-order product of the choices).
    pairs : int
        ``n · choices``.
    interpolated : int
        States whose tomorrow comes from a ``next`` expression.
    nodes : int
        Interpolation nodes per (state, choice): ``2 ** interpolated``.
    monotone, concave : bool
        Hints that will be used.
    hint_note : str or None
        Why a requested hint will not be used.
    reward_storage : str
        ``tables`` or ``on_the_fly``.
    precompute_bytes, on_the_fly_bytes, budget : int
        Peak working memory of each reward storage and the precompute budget.
    reason : str
        The reward-storage decision in plain words.
    table_bytes, solve_extra_bytes : int
        Bytes of the tables alone (kept for the whole solve), and what the iterations add to the solver's
        vectors (with taste shocks: a policy's mixed matrix before its duplicates are summed).
    table_entries : int
        Entries of the reward tables: ``pairs``, or fewer when static
        choices are maximised out (:mod:`worker.staticchoices`).
    static_concave : bool
        The concave hint is also used along the single static choice while
        the tables are filled (:mod:`worker.statickernel`).
    """

    grid_states: int
    shocks: int
    n: int
    choices: int
    pairs: int
    interpolated: int
    nodes: int
    monotone: bool
    concave: bool
    hint_note: str | None
    reward_storage: str
    precompute_bytes: int
    on_the_fly_bytes: int
    budget: int
    reason: str
    table_entries: int = 0
    static_concave: bool = False
    table_bytes: int = 0
    solve_extra_bytes: int = 0

    @property
    def hints_active(self) -> bool:
        return self.monotone or self.concave

    @property
    def setup_bytes(self) -> int:
        """Peak of building the reward storage: the tables and their chunks' temporaries, or the feasibility
        scan's temporaries."""
        return self.precompute_bytes if self.reward_storage == "tables" else self.on_the_fly_bytes


def precompute_budget(limits: dict[str, Any] | None = None) -> int:
    """Bytes the precomputed tables may take under ``limits`` (default: the worker's memory cap)."""
    cap = (limits or {}).get("max_bytes")
    if not cap:
        from worker.environment import max_problem_bytes

        cap = max_problem_bytes()
    return int(min(PRECOMPUTE_MAX_BYTES, PRECOMPUTE_CAP_SHARE * int(cap)))


def grid_plan(model: Any, *, limits: dict[str, Any] | None = None, method: str = "howard") -> GridPlan:
    """Sizes and reward storage of a validated ``GridModel``, from sizes alone."""
    grid_states = math.prod(axis.size for axis in model.states.values())
    shocks = math.prod(shock.size for shock in model.shocks.values() if not shock.after_choice)
    choices = math.prod(choice.size for choice in model.choices.values())
    n = grid_states * shocks
    pairs = n * choices
    interpolated = sum(1 for name in model.states if name in model.next)
    draws = draw_count(model)  # after the choice: every draw's nodes, and tables the only storage (worker.draws)
    nodes = 2**interpolated * (draws if draws and interpolated else 1)
    taste = getattr(model, "taste_shocks", None) is not None
    # With taste shocks every combination of the choices carries its own shock: none is maximised out.
    static = () if taste else static_choices(model)
    # With static choices the tables run over the other choices only, plus the static choice that wins each entry.
    table_choices = math.prod(c.size for name, c in model.choices.items() if name not in static)

    # Per-choice work arrays (the feasibility scan's visiting order and marks, flat choice indices).
    common = CHOICE_BYTES * choices
    table_bytes = draw_table_bytes(pairs, draws, interpolated) if draws else n * table_choices * (
        8 + 12 * interpolated + (8 if static else 0))
    # Filling the tables evaluates chunks of whole rows (every choice, every draw) of about CHUNK_ELEMENTS.
    elements = pairs * max(draws, 1)
    chunk_elements = min(max(CHUNK_ELEMENTS, choices * max(draws, 1)), elements)
    # A threaded fill evaluates up to TABLE_CHUNKS_AT_ONCE chunks at once, one per thread (worker.threadpool).
    at_once = min(threads_for(n, choices), TABLE_CHUNKS_AT_ONCE, math.ceil(elements / max(chunk_elements, 1)))
    chunk = CHUNK_TEMPORARIES * 8 * chunk_elements * max(at_once, 1)
    if draws and interpolated and not static:
        chunk = 0  # filled in compiled code straight into the tables (worker.drawkernel): no numpy chunks
    precompute_bytes = common + table_bytes + chunk
    # Pointwise: the feasibility scan's first passes (a state leaves at its first allowed choice), and the exact
    # block search's dyadic maxima of the continuation (about 2n floats).
    scan = CHUNK_TEMPORARIES * 8 * min(CHUNK_ELEMENTS, n * FEASIBILITY_COLUMNS * max(draws, 1), elements)
    on_the_fly_bytes = common + scan

    budget = precompute_budget(limits)
    if taste:
        extra = taste_table_bytes(pairs, interpolated, nodes) - table_bytes
        table_bytes += extra
        precompute_bytes += extra
        reason, note = taste_storage_words(pairs, table_bytes, budget, model.hints.monotone or model.hints.concave)
        return GridPlan(
            grid_states=grid_states, shocks=shocks, n=n, choices=choices, pairs=pairs, interpolated=interpolated,
            nodes=nodes, monotone=False, concave=False, hint_note=note, reward_storage="tables",
            precompute_bytes=precompute_bytes, on_the_fly_bytes=on_the_fly_bytes, budget=budget, reason=reason,
            table_entries=pairs, table_bytes=common + table_bytes, solve_extra_bytes=12 * pairs * nodes * shocks,
        )
    fits = table_bytes <= budget
    use = hint_use(model, static, None if fits else (
        f"the table of the best reward per (point, remaining choice) would take {table_bytes / _MIB:,.0f} MiB, over "
        f"the precompute budget of {budget / _MIB:,.0f} MiB"
    ))
    monotone, concave, note = use.monotone, use.concave, use.note
    if (monotone or concave) and not static and not (draws and fits):
        reward_storage = "on_the_fly"
        reason = (
            "hinted searches evaluate a few choices per state, so the model is evaluated pointwise in compiled "
            "code rather than tabulated for all pairs"
        )
    elif fits and static:
        reward_storage = "tables"
        reason = (
            f"{', '.join(f'`{name}`' for name in static)} affect{'s' if len(static) == 1 else ''} nothing tomorrow, "
            f"so the model is evaluated once in compiled code with those choices maximised out, into tables of "
            f"{n * table_choices:,} entries ({table_bytes / _MIB:,.0f} MiB, within the precompute budget of "
            f"{budget / _MIB:,.0f} MiB), and every step scans them"
            + (f"; {use.used}" if use.used else "")
        )
    elif table_bytes <= budget:
        reward_storage = "tables"
        reason = (
            f"the tables of all {pairs:,} (state, choice) pairs take {table_bytes / _MIB:,.0f} MiB, within the "
            f"precompute budget of {budget / _MIB:,.0f} MiB, so they are evaluated once and every step scans them"
        )
    else:
        reward_storage = "on_the_fly"
        reason = (
            f"the tables of all {pairs:,} (state, choice) pairs would take {table_bytes / _MIB:,.0f} MiB, over "
            f"the precompute budget of {budget / _MIB:,.0f} MiB, so the model is evaluated pointwise in compiled "
            "code and exact steps skip blocks of choices that provably cannot win"
        )
    from worker.document.horizon import varies_by_period  # here: worker.document reads this module's limits

    if varies_by_period(model) and not draws:  # draws: tables only, refilled per period (worker.period_tables)
        reward_storage = "on_the_fly"
        reason = (
            "the model changes with the period (params given per period, or `period` in its expressions), so it is "
            "evaluated pointwise in compiled code with each period's params: tables would be filled again in every "
            "period"
        )
    return GridPlan(
        grid_states=grid_states, shocks=shocks,
        n=n,
        choices=choices,
        pairs=pairs,
        interpolated=interpolated,
        nodes=nodes,
        monotone=monotone,
        concave=concave,
        hint_note=note,
        reward_storage=reward_storage,
        precompute_bytes=precompute_bytes,
        on_the_fly_bytes=on_the_fly_bytes,
        budget=budget,
        reason=reason,
        table_entries=n * table_choices,
        static_concave=use.static_concave and reward_storage == "tables",
        table_bytes=common + (table_bytes if reward_storage == "tables" else 0),
        solve_extra_bytes=0 if reward_storage == "tables" else 2 * 8 * n,
    )


def grid_bytes(doc: Any, plan: GridPlan) -> int:
    """Peak memory of a grid model's solve: the larger of building its reward storage and the iterations with
    the result and its reports (the tables, when kept, under both), plus a finite horizon's periods."""
    entries = plan.n * plan.nodes * plan.shocks
    first_axis = next(iter(doc.model.states.values())).size
    euler = 0 if doc.model.taste_shocks is not None else euler_elements(doc, first_axis, plan.shocks)
    exact = policy_solve_bytes(doc, plan) if doc.solver.method == "policy_iteration" else None
    working = (solve_bytes(plan.n, entries, doc.solver.method, exact=exact) + plan.solve_extra_bytes
               + report_bytes(doc, plan.n, entries, euler))
    return BASE_BYTES + max(plan.setup_bytes, plan.table_bytes + working) + horizon_bytes(doc, plan.n)


def estimate(doc: Any, *, limits: dict[str, Any] | None = None, plan: GridPlan | None = None) -> dict[str, Any]:
    """Size, memory and time of a validated ``ProblemDocument``, without building it (``plan``: a grid model's
    :func:`grid_plan` under the same ``limits`` when the caller has it already).

    Returns
    -------
    dict
        ``kind``; ``points`` (points of the state space: entries of the
        value function), ``grid_states`` (points of the endogenous state
        grid; tabular: the states), ``shocks`` (points of the shock chain; 1
        without shocks, 0 for tabular), ``choice_points`` (alternatives per
        point), ``pairs`` (point × choice point); ``bytes`` (peak memory
        the solve allocates, with the reward storage that will be used and
        the reports asked for; interpreter, libraries and kernels not
        counted); ``reward_storage`` (``tables`` or
        ``on_the_fly``); ``compile_bytes`` and ``compile_seconds`` (what
        the first solve of a grid model's structure on a machine adds while
        its kernels compile; 0 for tabular); ``seconds`` (wall time of a warm
        solve, compiling not counted) with its ``basis``; ``notes``, plain
        words.  A grid model over the limits of :mod:`worker.kernel_limits`
        is sized all the same: its ``check_structure`` is what refuses it.
    """
    if doc.model.kind == "tabular":
        return _tabular_estimate(doc)
    if getattr(doc, "search", None) is not None:
        from worker.search_estimate import search_estimate

        return search_estimate(doc, lambda one: estimate(one, limits=limits, plan=plan))
    if doc.model.continuous_choice() is not None:
        from worker.continuous_estimate import continuous_estimate

        return continuous_estimate(doc)
    model = doc.model
    if plan is None:
        plan = grid_plan(model, limits=limits, method=doc.solver.method)
    steps, evaluation_steps, basis = iteration_steps(doc, plan.choices)
    seconds, how = grid_seconds(doc, plan, steps, evaluation_steps)
    if doc.solver.method == "policy_iteration" and model.horizon is None:
        # The last iteration's Bellman step meets the tolerance and stops before an evaluation: steps − 1 solves.
        seconds += max(steps - 1, 1) * policy_solve_seconds(doc, plan)
        basis += f"; {policy_solve_words(doc, plan)}"
    compile_bytes = compile_memory(model)
    compile_s, compile_basis = compile_seconds(model, compile_kernels(model, plan))
    notes = [f"reward storage {plan.reward_storage}: {plan.reason}"]
    if plan.hints_active:
        used = " and ".join(name for name, on in (("monotone", plan.monotone), ("concave", plan.concave)) if on)
        notes.append(
            f"the {used} hint{'s' if ' and ' in used else ''} will be used, and the final policy checked by one "
            "exact Bellman step (the verification, not an iteration)"
        )
    if plan.hint_note:
        notes.append(plan.hint_note)
    if plan.interpolated:
        notes.append(
            f"{plan.interpolated} state{'s' if plan.interpolated > 1 else ''} move by a next expression: "
            "tomorrow's value is "
            f"split over {plan.nodes} grid points, and points outside the grid are clamped and counted"
        )
    notes.append("memory counts the arrays of the solve, not the Python interpreter and its libraries (about 200 MiB)")
    notes.append(
        f"the first solve of a new model structure on a machine also compiles its kernels (about {compile_s:,.1f} s "
        f"and {compile_bytes / _MIB:,.0f} MiB, then cached)"
    )
    return {
        "kind": "grid",
        "points": plan.n,
        "grid_states": plan.grid_states,
        "shocks": plan.shocks,
        "choice_points": plan.choices,
        "pairs": plan.pairs,
        "bytes": grid_bytes(doc, plan),
        "reward_storage": plan.reward_storage,
        "compile_bytes": compile_bytes,
        "compile_seconds": compile_s,
        "compile_basis": compile_basis,
        "seconds": seconds,
        "basis": f"{basis}; {how}",
        "notes": notes,
    }


def _tabular_estimate(doc: Any) -> dict[str, Any]:
    model = doc.model
    n_states, n_actions = int(model.n_states), int(model.n_actions)
    pairs = n_states * n_actions
    transition = model.transition
    shape = getattr(transition, "shape", None)
    dense = shape is not None and len(shape) == 3
    entries = math.prod(shape) if dense else int(transition.entries.shape[0])
    # Dense input stays in memory as the parsed document; the compiled form is CSR (12 bytes per entry).
    stored = entries if not dense else min(entries, pairs * n_states)
    csr = stored * 12 + 8 * (pairs + 1)
    document = entries * 8 if dense else entries * 32
    # Building the CSR from entries: row and column columns, a contiguous copy of p, scipy's conversion copies.
    # Dense: the decoded array, its finite mask and the nonzero selection before the CSR is built.
    conversion = entries * (DENSE_CONVERSION_BYTES if dense else 32)
    common = n_states * SOLVER_BYTES_PER_STATE + 2 * 8 * pairs
    # A policy's matrix takes one action's rows per state: about a share 1/actions of the stored entries, at most n².
    policy_entries = min(math.ceil(stored / n_actions), n_states * n_states)
    if getattr(model, "taste_shocks", None) is not None:
        # The logit probabilities, their exponentials and the entropy terms are (S, A) arrays, and the mixed
        # matrix of a policy may hold every stored entry before its duplicates are summed.
        common += 3 * 8 * pairs
        policy_entries = stored
    matrix = policy_entries * 12 + 8 * (n_states + 1)
    mixing = None
    if doc.solver.method == "value_iteration" and model.horizon is None:
        from worker.mixing import value_iteration_mixing  # here: it reads the transitions (numpy, scipy)

        mixing = value_iteration_mixing(model)
    steps, evaluation_steps, basis = iteration_steps(doc, n_actions, mixing=mixing)
    step = stored * MATVEC_NS + pairs * (SMOOTHED_PAIR_NS if getattr(model, "taste_shocks", None) else TABLE_READ_NS)
    step += ITERATION_S * 1e9
    seconds = (steps * step + evaluation_steps * policy_entries * MATVEC_NS + entries * TABULAR_ENTRY_NS) * 1e-9
    seconds += evaluation_steps * TABULAR_STEP_S
    exact = doc.solver.method == "policy_iteration" and model.horizon is None
    # The band of the transitions bounds an LU's fill: policy iteration's (up to DIRECT_SOLVE_MAX_POINTS states)
    # and the stationary report's (worker.costs.stationary_lu_entries).
    banded = doc.report.stationary or (exact and n_states <= DIRECT_SOLVE_MAX_POINTS)
    bandwidth = transition_bandwidth(transition, dense) if banded else None
    seconds += (report_seconds(doc, n_states, policy_entries, grid=False, bandwidth=bandwidth)
                + horizon_seconds(doc, n_states))
    if exact:
        matrix += linear_solve_bytes(n_states, policy_entries,
                                     bandwidth if n_states <= DIRECT_SOLVE_MAX_POINTS else None)
        seconds += max(steps - 1, 1) * linear_solve_seconds(  # no evaluation after the last Bellman step
            n_states, policy_entries, float(doc.discount), float(doc.solver.tolerance), anywhere=True
        )
        basis += f"; {linear_solve_words(n_states)}"
    notes = [
        f"{'dense' if dense else 'sparse'} transition with {entries:,} entries, held as a sparse matrix of at most "
        f"{stored:,}",
        "memory counts the arrays of the solve, not the Python interpreter and its libraries (about 200 MiB)",
    ]
    return {
        "kind": "tabular",
        "points": n_states,
        "grid_states": n_states,
        "shocks": 0,
        "choice_points": n_actions,
        "pairs": pairs,
        "bytes": int(BASE_BYTES + common + csr + document + conversion + matrix)
        + report_bytes(doc, n_states, policy_entries, bandwidth=bandwidth) + horizon_bytes(doc, n_states),
        "reward_storage": "tables",
        "compile_bytes": 0,
        "compile_seconds": 0.0,
        "compile_basis": "nothing compiled: a tabular model runs sparse matrices",
        "seconds": seconds,
        "basis": f"{basis}; one sparse product of {stored:,} entries ({MATVEC_NS:g} ns each) per step",
        "notes": notes,
    }


def transition_bandwidth(transition: Any, dense: bool) -> int:
    """The largest ``|s − s'|`` of a tabular model's transitions with a positive probability, every action's
    (a policy's rows come from them; taste shocks mix them all): the bandwidth of its policy systems in the states'
    order.  One pass over the document's entries, run for policy iteration's direct solves only (at most
    ``DIRECT_SOLVE_MAX_POINTS`` states)."""
    import numpy as np  # here: the rest of the estimate works from sizes alone

    if dense:
        reached = np.asarray(transition).any(axis=1)  # (s, s') reached by some action
        rows, columns = np.nonzero(reached)
    else:
        entries = np.asarray(transition.entries)
        positive = entries[:, 3] > 0
        rows, columns = entries[positive, 0], entries[positive, 2]
    return int(np.abs(rows.astype(np.int64) - columns.astype(np.int64)).max(initial=0))
