"""Grid documents (``kind: grid``) compiled to fast Bellman operators.

Semantics
---------
* The value array has shape ``(state sizes..., shock sizes...)`` in document
  order; flat point ``i = x · n_shocks + z`` with ``x`` the C-order index over
  the state grids and ``z`` over the product chain of the shocks (first shock
  slowest).  The choice space is the C-order product of the choices.
* A ``next_of`` choice picks tomorrow's grid point of its state directly.  A
  state with a ``next`` expression moves to a value split between the two
  neighbouring grid points by linear interpolation (several such states: the
  product of the per-state weights over the corners); a value outside the grid
  is moved to its nearer end and *counted* (``clamped_next`` in the
  diagnostics).
* Shocks evolve by their chain whatever is chosen, so the continuation is
  ``EV(x', z) = Σ_z' P[z, z'] V(x', z')``, one matrix product per Bellman step.
* A shock drawn after the choice (``"timing": "after_choice"``) is no axis:
  the reward is its expectation over the draws and tomorrow's state the
  mixture over them (see :mod:`worker.draws`); such a model is solved from
  reward tables only, and neither bridged nor maximised within the period.
* ``define`` is evaluated in order; ``feasible`` holds when every expression
  is nonzero (NaN counts as nonzero, as everywhere in the expression
  language); ``reward`` is one expression.

Rewards that are not finite
---------------------------
A choice is *allowed* at a state when every feasibility expression holds, its
reward is a finite number and every ``next`` value is a number (not NaN).

* ``-inf`` is a legitimate way to write "not allowed" (``log(0)``, say); such
  pairs are excluded silently.
* NaN or ``+inf`` at a feasible point, or a NaN ``next`` value, almost always
  means an expression left its domain (a power or log of a negative number).
  Such pairs are excluded too — they never enter the value function — and
  the diagnostics warn, with their count and one example state and choice.
  With reward tables the count covers every pair; on the fly it covers the
  pairs the last exact step evaluated (skipped blocks are not evaluated).

A point with no allowed choice makes the document infeasible:
:class:`~worker.errors.InfeasibleModel` names the first few such points by
their grid values, at ``model.feasible`` (or ``model.reward`` when choices
are feasible but none has a finite reward).  :func:`check_feasibility` (from
:mod:`worker.feasibility`, which imports no numba) runs the same check
cheaply, without compiling anything, for the service's door.

Reward storage and hints
------------------------
:func:`worker.estimate.grid_plan` picks the reward storage (``tables`` of
every pair, or ``on_the_fly`` pointwise evaluation); both run the same
generated search code (:mod:`worker._codegen`), in a
:class:`worker.gridproblem.GridProblem`.  Hints are used along one choice (monotone: that
choice is ``next_of`` a state): the model's only choice, or the one left when
the others affect nothing tomorrow and are maximised out into tables
(:mod:`worker.hintuse` says which hint applies to which choice, and notes every
one that cannot be used); ``restricted=False``
always searches every allowed choice exactly — on the fly by a
branch-and-bound over blocks of choices whose bounds are sound, so its
answer equals the exhaustive search bit for bit.  With reward tables, choices
that affect nothing tomorrow are maximised out within the period first
(:mod:`worker.staticchoices`, in compiled code: :mod:`worker.statickernel`);
the kernels see the other choices only.

When the structure's kernels are not compiled on this machine yet and the
problem is small, :func:`compile_grid` returns a
:class:`worker.reference.ReferenceProblem` instead (the plain numpy reference
step on the reward tables, nothing compiled) and starts the compile in the
background; see :mod:`worker.bridge`.
"""

from __future__ import annotations

import dataclasses
import time
from types import ModuleType
from typing import Any

import numpy as np

from worker import _codegen, bridge, threadpool
from worker.document import SUBMISSION_KEYS
from worker.document.horizon import varies_by_period
from worker.drawcheck import check_draw_tables
from worker.drawkernel import draw_tables
from worker.drawsteps import DrawGridProblem
from worker.estimate import REWARD_STORAGES, GridPlan, grid_plan
from worker.feasibility import ModelData, feasibility_scan, infeasible, model_data
from worker.gridproblem import GridProblem
from worker.gridtables import RewardTables, precompute_tables, reduce_static
from worker.reference import ReferenceProblem
from worker.staticchoices import static_choices
from worker.statickernel import static_tables

__all__ = ["compile_grid"]


def compile_grid(doc: Any, *, limits: dict[str, Any] | None = None, reward_storage: str | None = None) -> GridProblem:
    """Compile a validated grid ``ProblemDocument`` into a :class:`~worker.gridproblem.GridProblem`.

    Parameters
    ----------
    doc : ProblemDocument
    limits : dict, optional
        ``{"max_bytes": int}``: the memory cap the precompute budget derives
        from (default: the worker's cap).
    reward_storage : str, optional
        Force ``tables`` or ``on_the_fly`` (tests and benchmarks); default:
        :func:`worker.estimate.grid_plan`'s choice.  A forced storage never
        takes the cold-start bridge.

    Raises
    ------
    InvalidDocument
        A state variable without a law of motion, or a grid or chain the
        schema let through but that cannot be built.
    TooLarge
        With taste shocks, or with draws after the choice, tables over the precompute budget (see
        :mod:`worker.tastegrid`, :mod:`worker.drawcheck`).
    InfeasibleModel
        Some point has no allowed choice.
    """
    if doc.model.continuous_choice() is not None:
        from worker.continuous import compile_continuous

        return compile_continuous(doc)
    if getattr(doc.model, "taste_shocks", None) is not None:
        # The smoothed maximum needs every choice's value: full table scans, whatever storage was asked for.
        from worker.tastegrid import compile_taste_grid

        return compile_taste_grid(doc, limits=limits)
    started = time.perf_counter()
    plan = grid_plan(doc.model, limits=limits, method=doc.solver.method)
    check_draw_tables(doc, limits=limits, plan=plan)
    chosen = reward_storage or plan.reward_storage
    if chosen not in REWARD_STORAGES:
        raise ValueError(f"unknown reward storage {chosen!r}; expected one of {', '.join(REWARD_STORAGES)}")
    full = model_data(doc)
    if full.draws is not None and chosen != "tables":
        raise ValueError("a model with draws after the choice is solved from reward tables only")
    backend = "table" if chosen == "tables" else "expr"
    static = static_choices(doc.model) if backend == "table" else ()
    data = reduce_static(full, static) if static else full
    draws = data.draws.size if data.draws is not None else 0
    layout = _codegen.layout_for(data.setter, len(data.shocks), len(data.choices), backend, plan.hints_active,
                                 draws=draws)
    if plan.hints_active and (layout.hinted_axis is None or (backend == "expr" and static_choices(doc.model))):
        # The plan's hints are for the choices left once the static ones are maximised out, which this storage
        # does not do: its kernels would search along another choice.
        plan = _hints_dropped(plan, chosen)
        layout = _codegen.layout_for(data.setter, len(data.shocks), len(data.choices), backend, False, draws=draws)
    # The expressions' numbers go to the kernels as params, so they never name a new module.
    kernel_model, literals = _codegen.lift_literals(data.source)
    source = _codegen.module_source(layout, kernel_model)
    # The bridge's numpy reference step reads tables without draws, and a model that changes with the period
    # swaps its params in the on_the_fly kernels, which the bridge's tables cannot: both wait for their kernels.
    if (reward_storage is None and full.draws is None and not varies_by_period(doc.model)
            and _bridge_applies(plan, source)):
        return _bridged(doc, full, static, plan, source, chosen, limits, started)
    counts: dict[str, Any]
    tables: RewardTables | None
    if backend == "table":
        tables, counts = _tables(full, static, compiled=True, climb=plan.static_concave)
        if counts.get("static_note"):
            note = counts["static_note"]
            plan = dataclasses.replace(plan, hint_note=f"{plan.hint_note}; {note}" if plan.hint_note else note)
    else:
        tables = None
        counts = {"feasibility": feasibility_scan(data, None)}
    prepared = time.perf_counter()
    first_load = not _codegen.is_held(source)
    module = _codegen.load(source)
    params = _codegen.kernel_params(data.param_values, literals)
    ctx = _codegen.context(params, data.state_grids, data.shock_table, data.choice_grids, tables)
    kind = DrawGridProblem if layout.draws else GridProblem  # draws after the choice: merged nodes (worker.drawsteps)
    problem = kind(doc, data, plan, layout, module, ctx, chosen, counts, full=full, static=static)
    problem.kernel_literals = literals
    _warm_up_once(problem, module)
    bridge.mark_warm(module.__name__)
    if first_load:
        # Numba has written this structure's machine code by now: bring the folder back within its limit.
        # (Only on a first load in this process: a scan of the folder costs more than a small solve.)
        _codegen.trim()
    problem.timings = {
        "prepare_s": prepared - started,
        "compile_s": time.perf_counter() - prepared,
    }
    return problem


def _warm_up_once(problem: GridProblem, module: ModuleType) -> None:
    """``problem._warm_up()``, unless a problem of the same class and kernel configuration warmed up this module
    object in this process already: its dispatchers then hold the machine code for exactly these argument types
    (a module loaded again is a new object, warmed up again).  Calling every kernel once cost 70 µs a solve."""
    threaded = problem.threads > 1 and problem.n >= threadpool.THREAD_MIN_STEP_POINTS
    key = (type(problem).__qualname__, problem.hints_active, problem.reward_storage, threaded)
    warmed = module.__dict__.setdefault("_fixq_warmed", set())
    if key not in warmed:
        with _codegen.warming(module):  # another process compiling the same kernels: wait, then load them
            problem._warm_up()
        warmed.add(key)


def _tables(
    data: ModelData, static: tuple[str, ...], *, compiled: bool = False, climb: bool = False
) -> tuple[RewardTables, dict[str, Any]]:
    """The reward tables (``static`` choices maximised out), or the error naming the points with no allowed choice.

    ``compiled`` fills the tables of static choices in compiled code (:mod:`worker.statickernel`; ``climb``:
    with the concave hint along the static choice); otherwise, and without static choices, numpy evaluates them.
    """
    if compiled and static:
        tables, counts = static_tables(data, static, climb=climb)
    elif compiled and data.draws is not None and None in data.setter:
        tables, counts = draw_tables(data)  # draws after the choice, filled in compiled code (worker.drawkernel)
    else:
        tables, counts = precompute_tables(data, static)
    stuck = np.flatnonzero(~counts["any_allowed"])
    if stuck.size:
        raise infeasible(data, stuck, counts["any_feasible"])
    return tables, counts


def _bridge_applies(plan: GridPlan, source: str) -> bool:
    """Whether to solve by the numpy reference step while the kernels compile (see :mod:`worker.bridge`)."""
    return (
        bridge.enabled()
        and plan.pairs <= bridge.BRIDGE_MAX_PAIRS
        and plan.precompute_bytes <= min(plan.budget, bridge.BRIDGE_MAX_BYTES)
        and not bridge.is_warm(_codegen.module_name(source))
    )


def _bridged(
    doc: Any, full: ModelData, static: tuple[str, ...], plan: GridPlan, source: str, reward_storage: str,
    limits: dict[str, Any] | None, started: float,
) -> ReferenceProblem:
    if reward_storage != "tables":
        static = static_choices(doc.model)
    tables, counts = _tables(full, static)
    data = reduce_static(full, static) if static else full
    layout = _codegen.layout_for(data.setter, len(data.shocks), len(data.choices), "table", False)
    ctx = _codegen.context(data.param_values, data.state_grids, data.shock_table, data.choice_grids, tables)
    problem = ReferenceProblem(doc, data, plan, layout, None, ctx, "tables", counts, full=full, static=static)
    # The document as validated, in its own order: the order of params and defines is part of the
    # generated source (sorted keys, as in the canonical form, would name another module).
    text = doc.model_dump(mode="json", exclude_none=True, exclude=set(SUBMISSION_KEYS))
    started_compile = bridge.compile_later(
        text, _codegen.module_name(source), reward_storage=reward_storage, limits=limits
    )
    problem.bridge_note = (
        "this model structure's compiled kernels were not in the cache yet: solved by exact numpy scans of the "
        "tables of all (point, choice) pairs"
        + (", while they compile in the background for the next solve" if started_compile else
           "; another background compile is running, so a later solve starts this structure's")
        + " (hints, if any, were not needed)"
    )
    problem.timings = {"prepare_s": time.perf_counter() - started, "compile_s": 0.0}
    return problem


def _hints_dropped(plan: GridPlan, reward_storage: str) -> GridPlan:
    """``plan`` with its hints off, and a note saying so, when the forced ``reward_storage`` does not maximise
    out the static choices the plan's hints were worked out without."""
    used = " and ".join(name for name, on in (("monotone", plan.monotone), ("concave", plan.concave)) if on)
    note = (
        f"the {used} hint{'s were' if ' and ' in used else ' was'} not used: reward storage `{reward_storage}` was "
        "forced, where the choices that affect nothing tomorrow are not maximised out, so several choices remain "
        "to be searched together; every step searched all combinations"
    )
    return dataclasses.replace(
        plan, monotone=False, concave=False, static_concave=False,
        hint_note=f"{plan.hint_note}; {note}" if plan.hint_note else note,
    )
