"""Euler-equation errors of a continuous choice beside discrete choices that set states too.

An invented workshop choosing tomorrow's machines ``k`` anywhere in their interval (``k_next``, continuous,
``next_of`` ``k``) and tomorrow's tools ``h`` on the grid of ``h`` (``h_next``, ``next_of`` ``h``): every choice
sets a state, one of them continuous (:func:`setters_setup`), or, beside them, discrete choices that set no
state (its daily effort, say), maximised out within the period (:mod:`worker.euler_within`: where no law of
motion and no draw's probability uses them; a note says which does otherwise).  Each choice that sets a state
has its own Euler equation (Judd 1992), as in :mod:`worker.euler_choices`; a choice that sets none has no
equation of its own and is held at its value in the others'.

The continuous choice's equation
--------------------------------
Today's tools ``h'`` are a grid point of ``h``; tomorrow's state is ``s' = (k', h', y', z')`` (``y`` the states
no choice sets, by their laws).  With ``h'`` held, the first-order condition in ``k'`` and the envelope
condition in ``k`` read as for one choice,

    ∂r/∂c(c) · ∂c/∂k'  =  −β E[ ∂r/∂k (s', k'', h'') ],

because ``V(k, h, z) = max_{h'} max_{k'} [r + β E V(k', h', z')]`` and ``k`` enters only the reward: where the
best ``h'`` does not switch near ``k``, ``∂V/∂k = ∂r/∂k`` at the chosen ``(k', h')``.  Every choice is read as
the solve reads it off the grid: today's ``(k', h')`` at a test point and tomorrow's ``(k'', h'')`` at ``s'``
(``k'`` off the grid of ``k``) are the fitted problem's own search there, ``h''`` the maximising combination
of the discrete choices at that point (:func:`worker.continuous.mixed_euler.searcher`), not a grid policy
rounded.  The test points are :mod:`worker.euler_states`'s along ``k``, at every grid point of the others.

A test point is skipped and counted as ``constrained`` where the equation need not hold with equality:

* ``k'`` within one local grid step of an end of the grid of ``k``, or moving it by that step either way not
  allowed with ``h'`` held (:func:`worker.euler_points.binding`, as for one choice);
* at a state ``s'`` tomorrow (any draw, any shock point), the best combination of the discrete choices at
  ``k'`` differs from the one at ``k'`` minus or plus the test points' spacing there (the local grid step of
  ``k`` over the test points per interval; ``h'``, ``y'`` held): the value has a kink in ``k`` between (the
  best ``h''`` switches), where ``∂V/∂k`` is not ``∂r/∂k`` at one choice.  The test points' spacing is the
  resolution the measurement has along ``k``; a point farther from the switch is measured, the fitted
  value's smoothing of the kink over its grid interval showing in its error.

A switch of today's combination between test points does not skip a point: the first-order condition in
``k'`` holds at the combination chosen, and today's kink in ``V`` is not in the equation.

The discrete choices' equations
-------------------------------
Each discrete choice's own equation is measured as :mod:`worker.euler_choices` measures a choice restricted
to its grid: along its own state between grid points, every choice's policy read multilinearly from the
solved grid policy (:func:`worker.euler_choices.grid_rules`), the continuous one's too — the search cannot
be asked for an ``h'`` between grid points, and the error so measured shows how coarse the grid of ``h`` is.
A choice that sets no state is there the value of its grid with the best expected reward today, the setting
choices at their values read so (:func:`worker.euler_within.maximised`), today and tomorrow; in the continuous
choice's equation it is the search's, part of the combination whose switches skip a point.

Reported: the pool of :func:`worker.euler_choices.pool_choices` (``by_choice`` each choice's own).  A finite
horizon measures each period against the next (:func:`worker.horizon_euler.euler_by_period` passes ``tomorrow``).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from worker.continuous.mixed_euler import Search, searcher
from worker.euler import between_points
from worker.euler_choices import grid_rules, pool_choices, setting_setups
from worker.euler_laws import SlopeParts
from worker.euler_points import PointsRule, ValueParts, combinations, environment, next_points
from worker.euler_setup import EulerSetup
from worker.euler_states import states_errors
from worker.euler_within import maximised, no_state_choices, within_note, within_reason
from worker.feasibility import ModelData

__all__ = ["continuous_part", "setters_errors", "setters_report", "setters_setup"]


def setters_setup(problem: Any, data: ModelData) -> list[EulerSetup] | str | None:
    """Every ``next_of`` choice's :class:`~worker.euler_setup.EulerSetup` (the model's order) of a continuous
    choice beside discrete ones of which one sets a state (the others setting none, maximised out within the
    period: :mod:`worker.euler_within`); a note why the errors are not measured; None when no other choice sets a
    state (:mod:`worker.continuous.mixed_euler`'s case)."""
    if not any(data.setter.count(data.choices.index(name)) for name in problem.others):
        return None
    continuous = next(name for name in data.choices if name not in problem.others)
    if not data.setter.count(data.choices.index(continuous)):
        return (f"Euler-equation errors were not measured: the continuous choice `{continuous}` sets no state "
                "beside a discrete choice that sets one; a continuous choice that sets no state is not maximised "
                "out within the period")
    free = no_state_choices(data)
    reason = within_reason(data, free)
    if reason:
        return f"Euler-equation errors were not measured: {reason}"
    founds = setting_setups(data)
    if isinstance(founds, list):
        return founds
    return founds or ("Euler-equation errors were not measured: beside a continuous choice, the other choices that "
                      "set states need grids of two points or more, not menus")


def _values_of(others: tuple[str, ...], combos: np.ndarray, search: Search) -> Any:
    """The discrete choices' values at points, (m, shock points) each: the combination the search chose."""
    def beside(points: np.ndarray) -> dict[str, np.ndarray]:
        chosen = search(points)[1]
        return {name: combos[chosen, column] for column, name in enumerate(others)}

    return beside


def continuous_part(data: ModelData, found: EulerSetup, discount: float, search: Search,
                    combined: tuple[tuple[str, ...], np.ndarray], distribution: np.ndarray | None = None, *,
                    tomorrow: tuple[ModelData, Search] | None = None,
                    slopes: SlopeParts | None = None, values: ValueParts | None = None) -> dict[str, Any]:
    """The continuous choice's errors (see the module's docstring), :func:`worker.euler_states.states_errors`'s
    keys; ``search`` is today's (points -> (choice, combination index)), ``combined`` the discrete choices' names
    and their combinations (rows, names), ``tomorrow`` the next period's model and search (default today's)."""
    data_next, search_next = tomorrow or (data, search)
    others, combos = combined
    position = data.states.index(found.state)
    grid = data.state_grids[position]
    shocks = data.shock_table[None, :, :]
    beside, beside_next = _values_of(others, combos, search), _values_of(others, combos, search_next)

    spacing = (grid.size - 1) / between_points(grid).size  # the test points', as a share of a local grid step

    def smooth(points: np.ndarray) -> np.ndarray:
        """Whether tomorrow's best combination at ``points`` (rows) is the one a test points' spacing below and
        above along the state, at every shock point: no kink between (rows,)."""
        chosen = search_next(points)[1]
        k = points[:, position]
        apart = spacing * np.interp(k, 0.5 * (grid[1:] + grid[:-1]), np.diff(grid))
        same = np.ones(points.shape[0], dtype=bool)
        for moved_k in (k - apart, k + apart):
            moved = points.copy()
            moved[:, position] = np.clip(moved_k, grid[0], grid[-1])
            same &= (search_next(moved)[1] == chosen).all(axis=1)
        return same

    def today(points: np.ndarray) -> np.ndarray:
        x = search(points)[0]
        k = points[:, position:position + 1]
        columns = {name: points[:, t:t + 1] for t, name in enumerate(data.states) if t != position}
        columns.update(beside(points))
        keep = np.ones(x.shape, dtype=bool)
        for drawn in combinations(data):
            env = environment(data, found, k, shocks, x, {**columns, **drawn})
            keep &= smooth(next_points(data, found, env, x)).reshape(x.shape)
        return np.where(keep, x, grid[0])  # the grid's lower end: counted as constrained

    return states_errors(data, found, discount, today, distribution, None,
                         tomorrow=(data_next, lambda points: search_next(points)[0]),
                         pooling=distribution is not None, companions=(beside, beside_next), slopes=slopes,
                         values=values)


def setters_errors(data: ModelData, founds: list[EulerSetup], discount: float, search: Search,
                   combined: tuple[tuple[str, ...], np.ndarray], rules: dict[str, PointsRule],
                   distribution: np.ndarray | None = None, at_end: dict[str, np.ndarray] | None = None, *,
                   tomorrow: tuple[ModelData, Search, dict[str, PointsRule]] | None = None,
                   slopes: SlopeParts | None = None, values: ValueParts | None = None) -> dict[str, Any]:
    """Every choice's errors and their pool: the continuous choice (the one not in ``combined``'s names) by
    :func:`continuous_part`, each discrete one along its state with every choice's grid ``rules`` (and
    ``at_end``, per choice, where its solved value is at an end of its state's grid), as
    :func:`worker.euler_choices.choices_errors` measures it."""
    data_next, search_next, rules_next = tomorrow or (data, search, rules)
    weighted = distribution is not None
    parts = []
    for found in founds:
        if found.choice not in combined[0]:
            part = continuous_part(data, found, discount, search, combined, distribution,
                                   tomorrow=(data_next, search_next), slopes=slopes, values=values)
        else:
            part = states_errors(
                data, found, discount, rules[found.choice], distribution,
                None if at_end is None else at_end[found.choice], tomorrow=(data_next, rules_next[found.choice]),
                pooling=weighted, companions=(maximised(data, found, rules), maximised(data_next, found, rules_next)),
                slopes=slopes, values=values)
        part["state"] = found.state
        parts.append(part)
    return pool_choices(founds, parts, weighted)


def setters_report(problem: Any, founds: list[EulerSetup], v: np.ndarray, policy: np.ndarray, discount: float,
                   distribution: np.ndarray | None = None,
                   slopes: SlopeParts | None = None, values: ValueParts | None = None) -> tuple[dict[str, Any], str]:
    """``(diagnostics.euler_errors, note)`` of a solved continuous choice beside discrete choices that set states
    (``founds`` from :func:`setters_setup`), ``v`` and ``policy`` the solve's; ``distribution`` the stationary one
    over the flat points, (n,)."""
    data = problem.model_data
    rules, at_end = grid_rules(data, founds, problem.choice_values(policy))
    combined = (tuple(problem.others), np.asarray(problem.combos, dtype=np.float64))
    errors = setters_errors(data, founds, discount, searcher(problem, v), combined, rules, distribution, at_end,
                            slopes=slopes, values=values)
    own = errors["by_choice"][problem.choice]
    note = (f"Euler-equation errors of the continuous choice `{problem.choice}` read by the fitted problem's own "
            f"search: {own['constrained']:,} test points skipped (where a limit may bind, or tomorrow's best "
            f"combination of "
            f"{', '.join(f'`{name}`' for name in problem.others)} switches next to tomorrow's state, where the value "
            "function has a kink); the other choices' own errors read every policy linearly between grid points"
            + within_note(data))
    return errors, note
