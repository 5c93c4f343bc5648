"""Euler-equation errors through a finite horizon: each period against the next, the last left out.

Period ``t``'s first-order condition links its choice today (its params, discount and policy) with
period ``t + 1``'s policy tomorrow, so the errors of :mod:`worker.euler` are measured for every
period but the last, whose tomorrow is the terminal value: it has no policy and so no Euler
equation.  Today's and tomorrow's policies between grid points are

* for a choice restricted to the grid, each period's grid policy read linearly along the state;
* for a continuous choice, each period's own search (:meth:`policy_rule` of the compiled problem at
  the value it was chosen against, ``V_{t+1}``), run with that period's params and discount: the rule
  enters its period before every search, since today's and tomorrow's are called in turn.

With several states the rules read points (m, states) and the test points are
:mod:`worker.euler_states`'s (the grid policy multilinear over the product grid, or the search at the
point).
"""

from __future__ import annotations

import dataclasses
from typing import Any, Callable

import numpy as np

from worker.problem import CompiledProblem
from worker.solvers.backward import HorizonOutcome, PeriodPlan

__all__ = ["euler_by_period"]


def euler_by_period(doc: Any, problem: CompiledProblem, plan: PeriodPlan,
                    outcome: HorizonOutcome) -> tuple[dict[str, Any], str | None]:
    """``({"euler_errors": ...}, note)``: Euler-equation errors of every period but the last, pooled.

    The result has the keys of :func:`worker.euler.euler_errors` over all periods measured (``profile``:
    the first period's) and ``by_period``: ``period``, ``max_log10`` and ``mean_log10`` lists.
    """
    from worker.euler import EulerSetup, euler_errors, grid_policy, setup
    from worker.euler_setup import needs_value
    from worker.euler_states import solve_value
    from worker.euler_within import within_note
    from worker.feasibility import period_params

    data = getattr(problem, "model_data", None)
    if data is None:
        return {}, "Euler-equation errors were not measured: they apply to grid models"
    continuous = getattr(problem, "choose_at", None) is not None
    mixed = bool(getattr(problem, "others", ()))
    from worker.euler_choices import choices_errors, choices_model, choices_setup, grid_rules, pool_periods

    several_choices = not mixed and choices_model(data)  # the next_of choices each with its own equation
    founds = choices_setup(data) if several_choices else None
    setters = None  # beside discrete choices that set states too: each choice's own equation
    if mixed:  # a continuous choice beside discrete ones: at the chosen combination of the others
        from worker.continuous.mixed_euler import mixed_errors, mixed_setup, searcher
        from worker.continuous.setters_euler import setters_errors, setters_setup

        setters = setters_setup(problem, data)
        if isinstance(setters, str):
            return {}, setters
        found = setters[0] if setters is not None else mixed_setup(problem, data)
    else:
        found = founds[0] if isinstance(founds, list) else founds if several_choices else setup(data)
    if not isinstance(found, EulerSetup):
        return {}, found or ("Euler-equation errors were not measured: they need a choice that sets tomorrow's "
                             "value of a state (next_of)")
    first, periods = outcome.first_period, plan.periods
    if periods - first < 2:
        return {}, "Euler-equation errors were not measured: they need two periods solved, today's and tomorrow's"
    moving = any(needs_value(one) for one in (founds if several_choices else setters) or [found])

    def after(t: int) -> np.ndarray:
        """``V_{t+1}``, the value period ``t`` was chosen against."""
        return np.asarray(plan.terminal if t == periods - 1 else outcome.values[t + 1 - first], dtype=np.float64)

    def values_at(t: int) -> Any:
        """Period ``t``'s value parts (:data:`worker.euler_points.ValueParts`, the continuations as the solve reads
        them) when the draws need them."""
        if not moving:
            return None
        return (solve_value(problem, data, after(t)), solve_value(problem, data, after(t + 1)),
                float(plan.discounts[t + 1]))
    choice = data.choices[0]
    grid = data.state_grids[0]
    several = len(data.states) > 1
    measure = euler_errors
    if several:  # rules over points (m, states), and the test points at every grid point of the other states
        from worker.euler_states import grid_rule, search_rule, states_errors

        measure = states_errors

    def model_and_rule(t: int) -> tuple[Any, Callable[[np.ndarray], np.ndarray]]:
        period_data = dataclasses.replace(data, param_values=period_params(doc.model, t))
        policy = outcome.policies[t - first]
        own = None if plan.stepper is None else plan.stepper.rule(t)
        if own is not None:  # the endogenous grid method's own rule (linear along its endogenous grid)
            return period_data, own
        if continuous:
            rule = search_rule(problem, after(t), policy) if several else problem.policy_rule(after(t), policy)
            return period_data, _in_period(plan, t, rule)
        values = np.asarray(problem.choice_values(policy)[choice], dtype=np.float64).reshape(-1, data.n_shocks)
        if several:
            return period_data, grid_rule(data, values, extend=data.states.index(found.state))
        return period_data, grid_policy(grid, values)

    searches: dict[int, Any] = {}

    def model_and_search(t: int) -> tuple[Any, Any]:
        """Period ``t``'s params and its search against ``V_{t+1}`` (the combination chosen beside)."""
        if t not in searches:
            searches[t] = (dataclasses.replace(data, param_values=period_params(doc.model, t)),
                           searcher(problem, after(t), enter=lambda t=t: plan.enter(t)))
        return searches[t]

    def choices_at(t: int, setups: Any = None) -> tuple[Any, Any, Any]:
        """Period ``t``'s params, and every choice's grid rules and where they are at a grid end (several choices
        that set states: ``setups``, by default the model's own next_of choices)."""
        setups = founds if setups is None else setups
        assert isinstance(setups, list)
        chosen = problem.choice_values(outcome.policies[t - first])
        return (dataclasses.replace(data, param_values=period_params(doc.model, t)),
                *grid_rules(data, setups, chosen))

    def measured(t: int) -> dict[str, Any]:
        extra = {}
        if any(one.laws for one in (founds if several_choices else setters) or [found]):
            # laws moving with k or x: the slopes of V_{t+1} read today and of V_{t+2} tomorrow
            from worker.euler_laws import solve_slope

            extra["slopes"] = (solve_slope(problem, data, after(t)), solve_slope(problem, data, after(t + 1)),
                               float(plan.discounts[t + 1]))
        if several_choices:
            assert isinstance(founds, list)
            today, rules, at_end = choices_at(t)
            data_next, rules_next, _ = choices_at(t + 1)
            return choices_errors(today, founds, float(plan.discounts[t]), rules, None, at_end,
                                  tomorrow=(data_next, rules_next), values=values_at(t), **extra)
        if setters is not None:
            today, search = model_and_search(t)
            data_next, search_next = model_and_search(t + 1)
            searches.pop(t - 1, None)
            _, rules, at_end = choices_at(t, setters)
            _, rules_next, _ = choices_at(t + 1, setters)
            combined = (tuple(problem.others), np.asarray(problem.combos, dtype=np.float64))
            return setters_errors(today, setters, float(plan.discounts[t]), search, combined, rules, None, at_end,
                                  tomorrow=(data_next, search_next, rules_next), values=values_at(t), **extra)
        if mixed:
            today, search = model_and_search(t)
            searches.pop(t - 1, None)
            return mixed_errors(problem, today, float(plan.discounts[t]), search, model_and_search(t + 1),
                                values_at(t), **extra)[0]
        today, rule = model_and_rule(t)
        return measure(today, found, float(plan.discounts[t]), rule, tomorrow=model_and_rule(t + 1),
                       values=values_at(t), **extra)

    by_period: dict[str, list[Any]] = {"period": [], "max_log10": [], "mean_log10": []}
    pooled = {"points": 0, "constrained": 0, "undefined": 0}
    worst, total, profile, choices, defined = None, 0.0, None, [], None
    for t in range(first, periods - 1):
        errors = measured(t)
        if "by_choice" in errors:  # define and profile: those of the first period's choice with the largest error
            choices.append(errors["by_choice"])
            defined = defined or errors["define"]
        profile = profile or errors["profile"]
        by_period["period"].append(t)
        by_period["max_log10"].append(errors["max_log10"])
        by_period["mean_log10"].append(errors["mean_log10"])
        for key in pooled:
            pooled[key] += errors[key]
        if errors["max_log10"] is not None:
            worst = errors["max_log10"] if worst is None else max(worst, errors["max_log10"])
            total += errors["mean_log10"] * errors["points"]
    plan.enter(first)  # the rules entered other periods; leave the problem in the first, as the result describes
    result = {
        "max_log10": worst,
        "mean_log10": total / pooled["points"] if pooled["points"] else None,
        **pooled,
        "define": defined or found.define,
        "profile": profile,
        "by_period": by_period,
    }
    if choices:
        result["by_choice"] = pool_periods(choices)
    note = (f"Euler-equation errors: periods {first} to {periods - 2} (the last period's tomorrow is the terminal "
            "value, with no Euler equation)"
            + (f"; the continuous choice at the chosen combination of the others: {pooled['constrained']:,} test "
               "points skipped (where a limit may bind, or the best combination differs today or at a state "
               "tomorrow, where the value function has a kink)" if mixed and setters is None else
               f"; the continuous choice `{problem.choice}` read by each period's own search: "
               f"{result.get('by_choice', {}).get(problem.choice, {}).get('constrained', 0):,} test points "
               "skipped in all periods (where a limit may bind, or tomorrow's best "
               "combination of the others switches next to tomorrow's state, where the value function has a kink); "
               "the other choices' own errors read every policy linearly between grid points"
               + within_note(data) if mixed else
               "; the policy between grid points is the endogenous grid method's own (linear along its grid)"
               if plan.stepper is not None else
               "; the policy between grid points is each period's own search" if continuous else within_note(data)))
    return {"euler_errors": result}, note


def _in_period(plan: PeriodPlan, t: int, rule: Any) -> Callable[[np.ndarray], np.ndarray]:
    """``rule`` run in period ``t`` (its params and discount), whichever period the problem was left in."""
    if rule is None:
        raise ValueError("a continuous choice's rule between grid points needs one state variable")

    def in_period(k: np.ndarray) -> np.ndarray:
        plan.enter(t)
        return rule(k)

    return in_period
