"""A finite horizon's periods: each period's params and discount, the terminal value, and the result by period.

:func:`period_plan` turns ``model.horizon`` of a validated document and its compiled problem into the
:class:`~worker.solvers.backward.PeriodPlan` backward induction runs on; :func:`horizon_result` builds the
result document, whose value and policy have the axis ``period`` first.

Reward storage
--------------
A grid model whose expressions use ``period`` or whose params are given per period evaluates a
different model in each period.  The ``on_the_fly`` storage reads its params from ``ctx`` as it runs,
so a period is one swap of the params vector (:meth:`worker.gridproblem.GridProblem.use_params`) and
one compiled module serves every period.  Reward tables would have to be filled again each period
(``T`` times the precompute, or ``T`` times its memory kept), so such a model always uses
``on_the_fly`` (:func:`worker.estimate.grid_plan`); a horizon whose periods differ only in the discount or in
nothing keeps whichever storage the plan picks, tables included.  The exceptions are taste shocks and
draws after the choice, which tables alone solve: their tables are filled again in each period
(:mod:`worker.period_tables`).

With taste shocks the result adds the choice probabilities by period (:mod:`worker.taste_horizon`);
with ``solver.method: endogenous_grid`` each period's policy is a round of that method
(:mod:`worker.egm_horizon`); the Euler-equation errors by period are :mod:`worker.horizon_euler`'s.
"""

from __future__ import annotations

import gc
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import numpy as np

from worker.axis_order import PERIOD_AXIS, apply_axis_order, cohort_in_internal_layout, model_axis_order
from worker.document.horizon import DISCOUNT_NAME, PERIOD_NAME, varies_by_period
from worker.errors import InvalidDocument, join_path
from worker.expressions import evaluate, parse
from worker.problem import CompiledProblem
from worker.report import shock_chains
from worker.solvers.backward import METHOD, HorizonOutcome, PeriodPlan

__all__ = ["PERIOD_AXIS", "horizon_result", "period_plan"]



def period_plan(doc: Any, problem: CompiledProblem, *, terminal: np.ndarray | None = None) -> PeriodPlan:
    """The periods, discounts, terminal value and period switch of a document with ``model.horizon``.

    ``terminal`` ((n,) float64), when given, replaces ``model.horizon.terminal_value`` (from ``solver.initial``).
    """
    plan = _tabular_plan(doc, problem) if doc.model.kind == "tabular" else _grid_plan(doc, problem)
    if terminal is not None:
        plan.terminal = np.asarray(terminal, dtype=np.float64).reshape(problem.n)
    if doc.model.kind == "grid":
        from worker.egm_horizon import egm_stepper

        plan.stepper = egm_stepper(doc, problem, plan, terminal is not None)
    return plan


def _tabular_plan(doc: Any, problem: Any) -> PeriodPlan:
    horizon = doc.model.horizon
    periods = int(horizon.periods)
    discounts = np.full(periods, float(doc.discount)) if horizon.discount is None else np.array(horizon.discount)
    terminal = np.broadcast_to(np.asarray(horizon.terminal_value, dtype=np.float64), (problem.n,)).copy()
    labels = doc.model.state_labels()

    def enter(t: int) -> None:
        problem.discount = float(discounts[t])

    return PeriodPlan(periods, discounts, terminal, enter, lambda i: f"state {labels[i]!r}")


def _grid_plan(doc: Any, problem: Any) -> PeriodPlan:
    from worker._codegen import kernel_params
    from worker.feasibility import period_params
    from worker.period_tables import enter_period_tables

    model, horizon = doc.model, doc.model.horizon
    periods = int(horizon.periods)
    data = problem.model_data
    discounts = _discounts(doc, data.params)
    terminal = _terminal_value(doc, data)
    varying = varies_by_period(model)

    if varying and data.span is not None:
        _check_bounds_by_period(model, data)

    continuous = getattr(problem, "choose_at", None) is not None  # a continuous choice
    if varying and continuous:
        from worker.continuous.draw_periods import PeriodEntry

        enter_continuous = PeriodEntry(problem, model)

    def enter(t: int) -> None:
        if varying and continuous:  # its params, and the draws' probabilities at its scanned candidates
            enter_continuous(t)
        elif varying and getattr(problem, "reward_storage", None) == "tables":
            # Taste shocks and draws after the choice are solved from tables only: refilled per period.
            enter_period_tables(problem, model, t)
        elif varying:
            problem.use_params(kernel_params(period_params(model, t), problem.kernel_literals))
        problem.discount = float(discounts[t])

    plan = PeriodPlan(periods, discounts, terminal, enter, data.describe_state)
    if continuous and data.draws is not None:
        from worker.continuous.draw_periods import check_period_policy

        plan.check_policy = lambda t, policy: check_period_policy(problem, t, policy)
    return plan


def _check_bounds_by_period(model: Any, data: Any) -> None:
    """A continuous choice's min and max checked in every period (the compiler checked period 0's params)."""
    import dataclasses

    from worker.continuous import check_bounds
    from worker.feasibility import period_params

    for t in range(1, int(model.horizon.periods)):
        try:
            check_bounds(dataclasses.replace(data, param_values=period_params(model, t)))
        except InvalidDocument as exc:
            raise InvalidDocument([{**error, "message": f"in period {t}: {error['message']}"}
                                   for error in exc.errors]) from None


def _discounts(doc: Any, names: tuple[str, ...]) -> np.ndarray:
    """``β_t`` for every period, each checked finite and positive or 0 (the path names the period)."""
    from worker.feasibility import period_params

    horizon = doc.model.horizon
    where = join_path("model", "horizon", "discount")
    if horizon.discount is None:
        return np.full(horizon.periods, float(doc.discount))
    if not isinstance(horizon.discount, str):
        return np.full(horizon.periods, float(horizon.discount))
    expression = parse(horizon.discount, path=where)
    discounts = np.empty(horizon.periods)
    with np.errstate(all="ignore"):
        for t in range(horizon.periods):
            env = dict(zip(names, period_params(doc.model, t).tolist()))
            env[DISCOUNT_NAME] = float(doc.discount)
            discounts[t] = float(np.asarray(evaluate(expression, env), dtype=np.float64).reshape(-1)[0])
    bad = np.flatnonzero(~(np.isfinite(discounts) & (discounts >= 0)))
    if bad.size:
        t = int(bad[0])
        raise InvalidDocument.at(
            where, f"gives {float(discounts[t])!r} in period {t}: the discount must be a positive number in every "
            "period, or 0 (the next period's value not counted: a survival probability of 0)"
            + (f" ({bad.size} periods fail)" if bad.size > 1 else ""),
        )
    return discounts


def _terminal_value(doc: Any, data: Any) -> np.ndarray:
    """``V_T`` at every flat point, (n,) float64, checked finite."""
    from worker.feasibility import period_params

    horizon = doc.model.horizon
    where = join_path("model", "horizon", "terminal_value")
    if not isinstance(horizon.terminal_value, str):
        return np.full(data.n, float(horizon.terminal_value))
    expression = parse(horizon.terminal_value, path=where)
    env: dict[str, Any] = {
        name: value
        for name, value, raw in zip(data.params, period_params(doc.model, 0).tolist(),
                                    [*doc.model.params.values(), None])
        if not isinstance(raw, list)
    }
    env[PERIOD_NAME] = float(horizon.periods)
    env.update(data.state_env(np.arange(data.n, dtype=np.int64)))
    with np.errstate(all="ignore"):
        terminal = np.broadcast_to(np.asarray(evaluate(expression, env), dtype=np.float64), (data.n, 1)).reshape(-1)
    bad = np.flatnonzero(~np.isfinite(terminal))
    if bad.size:
        raise InvalidDocument.at(
            where, f"is {float(terminal[bad[0]])!r} at {data.describe_state(int(bad[0]))}: the terminal value must "
            f"be a finite number at every point ({bad.size:,} points fail)",
        )
    return terminal.copy()


def horizon_result(doc: Any, problem: CompiledProblem, plan: PeriodPlan, outcome: HorizonOutcome,
                   plain: Any) -> dict[str, Any]:
    """The result document of a finite-horizon solve: value and policy with ``period`` first.

    ``plain`` turns numpy scalars and arrays into Python numbers and lists (``worker.solve._plain``).
    """
    from worker.convergence_log import dropped

    periods = list(range(outcome.first_period, plan.periods))
    shape = (len(periods), *problem.shape)
    with _collector_paused():
        # Millions of list and number objects, none in a cycle: a collection pass in the middle of
        # building them only walks them (it took 40% of this function at 61 x 1,000 x 7 points).
        value = np.asarray(outcome.values, dtype=np.float64).reshape(shape).tolist()
        policy: dict[str, list[Any]] = {}
        policy_index: dict[str, list[Any]] = {}
        for row in outcome.policies:
            values, indices = problem.describe_policy(row)
            for name in values:
                policy.setdefault(name, []).append(values[name])
                if indices is not None and name in indices:  # a continuous choice has no grid index
                    policy_index.setdefault(name, []).append(indices[name])
    taste: dict[str, Any] = {}
    probabilities: dict[str, Any] = {}
    if getattr(problem, "taste_scale", None) is not None:
        probabilities = {"choice_probabilities": []}  # no period solved (a time limit): none
    if getattr(problem, "taste_scale", None) is not None and periods:
        from worker.taste_horizon import probabilities_by_period, with_probabilities

        plan = with_probabilities(plan, problem, outcome)  # entering a period retakes its smoothed step
        notes_of_taste, by_period = probabilities_by_period(problem, plan, outcome)
        taste = {"taste_shocks": notes_of_taste}
        probabilities = {"choice_probabilities": by_period.tolist()}
    if plan.stepper is not None:
        problem.egm_report = plan.stepper.report(outcome.first_period)
    problem_diagnostics = plain(_diagnostics_by_period(doc, problem, plan, outcome)) if periods else {}
    warnings = list(outcome.warnings) + list(problem_diagnostics.pop("warnings", []))
    if plan.stepper is not None:
        warnings += plan.stepper.warnings(outcome.first_period)
    notes = problem_diagnostics.setdefault("notes", [])
    continuous = getattr(problem, "choose_at", None) is not None
    notes.append(
        f"solved by backward induction: one exact Bellman step per period from the terminal value, "
        f"{len(periods)} of {plan.periods} periods; the value is exact up to rounding, and the error bound is the "
        "rounding allowance accumulated over the periods"
        + ("; with a continuous choice, exact for the fitted problem (tomorrow's value interpolated), each "
           "period's maximum found by its search" if continuous else "")
    )
    if outcome.status == "time_limit":
        notes.append(f"the time limit stopped the solve after {len(periods)} of {plan.periods} periods: the value and "
                     f"policy cover periods {outcome.first_period} to {plan.periods - 1}")
    method = doc.solver.method
    if plan.stepper is not None:
        notes.append("solver.method endogenous_grid: each period's policy is one round of the endogenous grid method "
                     "from the next period's, and each period's value the fitted Bellman step's, its search seeded by "
                     "that policy (diagnostics.continuous_choice.endogenous_grid gives the gaps between them)")
    elif "method" in doc.solver.model_fields_set and method != METHOD:
        notes.append(f"solver.method {method} was not used: a model with a finite horizon is solved by backward "
                     "induction")
    unused = [key for key in ("tolerance", "max_iterations", "evaluation_steps") if key in doc.solver.model_fields_set]
    if unused:
        notes.append(f"{', '.join(f'solver.{key}' for key in unused)} not used: backward induction takes exactly one "
                     f"step per period ({plan.periods}), with no fixed point to approach; solver.time_limit_s "
                     "stops between periods")
    if doc.solver.initial not in (None, "zeros"):
        notes.append("the value after the last period is solver.initial's (it replaces model.horizon.terminal_value)")
    report = doc.report
    cohort = simulation = None
    if (report.cohort is not None or report.simulation is not None) and outcome.first_period > 0:
        notes.append("no cohort and no simulation: they start in period 0, which the solve did not reach")
    elif report.cohort is not None or report.simulation is not None:
        from worker.cohort import cohort_report, horizon_simulation

        start = cohort_in_internal_layout(report.cohort, doc.model, problem)
        if start is not None:
            cohort = cohort_report(problem, plan, outcome, start)
        if report.simulation is not None:
            simulate = horizon_simulation
            if taste:  # each period's choice is drawn from its probabilities, then tomorrow's point
                from worker.taste_horizon import taste_horizon_simulation as simulate
            simulation = simulate(problem, plan, outcome, report.simulation, start,
                                  f"report.{report.simulation_key}")
            warnings += simulation.pop("warnings")
    euler = {}
    if report.euler_errors and taste:
        notes.append("Euler-equation errors were not measured: with taste shocks the choice is random, not a policy "
                     "rule")
    elif report.euler_errors:
        from worker.horizon_euler import euler_by_period

        euler, note = euler_by_period(doc, problem, plan, outcome)
        if note:
            notes.append(note)
    bound = outcome.error_bound
    diagnostics = {
        **problem_diagnostics,
        **plain(taste),
        **euler,
        "observed_rate": None,
        "warnings": warnings,
        "resumed_from_iteration": outcome.resumed_from_iteration,
        "verification": outcome.verification,
        "bracket": {"lower": 0.0, "upper": 0.0, "shift": 0.0, "standard_bound": bound, "rounding_allowance": bound},
        "log_dropped": dropped(outcome.log),
        "horizon": {"periods": plan.periods, "discount": plan.discounts.tolist(),
                    "rounding_allowance": outcome.bounds.tolist()},
    }
    head = plain({
        "status": outcome.status, "method": METHOD, "error_bound": bound, "iterations": len(periods),
        "evaluation_steps": 0, "linear_solves": 0, "seconds": outcome.seconds,
        "axes": {PERIOD_AXIS: periods, **problem.axes},
    })
    tail = plain({"log": outcome.log, "diagnostics": diagnostics, "stationary": None, "simulation": simulation,
                  "cohort": cohort, "chains": shock_chains(doc)})
    result = {**head, "value": value, "policy": policy, "policy_index": policy_index or None, **probabilities,
              **tail}
    return apply_axis_order(result, model_axis_order(doc.model))


WARNED_PERIODS = 3
"""Later periods whose own diagnostics warnings are listed word for word; the rest are counted in one more."""


def _diagnostics_by_period(doc: Any, problem: CompiledProblem, plan: PeriodPlan,
                           outcome: HorizonOutcome) -> dict[str, Any]:
    """The problem's diagnostics over every period's policy, not the first period's alone.

    A life cycle's policy reaches a grid's end in some periods only (wealth peaks near retirement): edge hits,
    clamped next values and a continuous choice's ends are counted over every (period, point) pair, and a later
    period's own warnings are added, naming it.  Each period is entered (its params) before its policy is
    read, unless the model would refill its reward tables to do so: then only the edge hits, which depend on
    the policy alone, are taken from the later periods.
    """
    first = outcome.first_period
    merged = problem.diagnostics(outcome.policies[0])
    later = list(enumerate(outcome.policies[1:], start=first + 1))
    if doc.model.kind != "grid" or not later:
        return merged
    varying = varies_by_period(doc.model)
    refills = (varying and getattr(problem, "choose_at", None) is None
               and getattr(problem, "reward_storage", None) == "tables")
    entered = varying and not refills
    count = len(later) + 1
    edges = {name: dict(hits) for name, hits in merged.get("edge_hits", {}).items()}
    clamped = merged.get("clamped_next")
    clamped = {**clamped, "policy": dict(clamped["policy"])} if clamped and not refills else None
    continuous = merged.get("continuous_choice")
    seen = set(merged.get("warnings", []))
    warned: list[str] = []
    warned_periods = 0
    for t, policy in later:
        if entered:
            plan.enter(t)
        own = problem.diagnostics(policy, all_pairs=False) if clamped is not None else problem.diagnostics(policy)
        for name, hits in own.get("edge_hits", {}).items():
            for end in ("lowest", "highest"):
                edges[name][end] += hits[end]
        if clamped is not None and own.get("clamped_next"):
            clamped["policy"]["count"] += own["clamped_next"]["policy"]["count"]
        if continuous is not None and not refills:
            for key in ("clamped_next", "at_lower_end", "at_upper_end"):
                if key in continuous:
                    continuous[key] += own["continuous_choice"][key]
        # A later period at the lowest point is mostly a borrowing limit binding (the last period spends all):
        # counted in edge_hits, not warned again; the top of a grid and clamped values are.
        news = [w for w in own.get("warnings", []) if w not in seen and "the lowest point of" not in w]
        news = news if not refills else []
        if news:
            seen.update(news)
            warned_periods += 1
            if warned_periods <= WARNED_PERIODS:
                warned += [f"period {t}: {w}" for w in news]
    if entered:
        plan.enter(first)
    if warned_periods > WARNED_PERIODS:
        warned.append(f"and in {warned_periods - WARNED_PERIODS} more periods (diagnostics count every period)")
    for name, hits in edges.items():
        merged["edge_hits"][name] = {end: share / count for end, share in hits.items()}
    if clamped is not None:
        clamped["policy"]["share"] = clamped["policy"]["count"] / (count * problem.n)
        merged["clamped_next"] = clamped
    merged["warnings"] = list(merged.get("warnings", [])) + warned
    merged.setdefault("notes", []).append(
        f"edge hits, clamped next values under the policy and a continuous choice's ends are counted over every "
        f"period's points ({count} periods)"
        + (f"; clamped_next.all_pairs is period {first}'s" if clamped is not None else "")
        + ("; only the edge hits are taken from later periods (their reward tables are not refilled for this)"
           if refills else "")
    )
    return merged


@contextmanager
def _collector_paused() -> Iterator[None]:
    """Pause Python's cyclic garbage collector inside the block (when it was running)."""
    running = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if running:
            gc.enable()
