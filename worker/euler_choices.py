"""Euler-equation errors of a model with several choices that each set tomorrow's value of a state.

A household with a liquid account ``b`` and an illiquid one ``h``, say, choosing both for tomorrow
(``b_next`` ``next_of`` ``b``, ``h_next`` ``next_of`` ``h``), its reward through one define
``c = cash − b_next − h_next``.  Each choice ``x_i`` sets its own state ``k_i`` and has its own Euler
equation (Judd 1992), the one of :mod:`worker.euler` with the other choices held at the policy's:

    ∂r/∂c_i(c_i) · ∂c_i/∂x_i  =  −β E[ ∂r/∂k_i (s') ],   s' = (x_1, …, x_n, y', z'),

with ``c_i`` the define through which ``x_i`` enters the reward (the same define for every choice in the
household).  The first-order condition is the partial derivative of ``r(s, x) + β E V(s')`` in ``x_i``,
and the envelope condition the total derivative of ``V(s) = r(s, x(s)) + β E V(s')`` in ``k_i``: every
choice's own first-order condition cancels the terms in ``∂x_j/∂k_i``, and what is left is the reward's
slope in ``k_i`` at the chosen choices, ``∂V/∂k_i = ∂r/∂k_i`` — plus, where another state's law of motion
moves with ``k_i`` or ``x_i``, that law's terms in the value's slopes (:mod:`worker.euler_laws`, ``slopes``).
Choices on grids or menus that set no state may stand beside them (one ``next_of`` choice is then enough):
they are maximised out within the period (:mod:`worker.euler_within`) and have no equation of their own.  A
choice at a limit (the illiquid account empty) has no equation of its own, but leaves the others': at a
corner that binds nearby ``∂x_j/∂k_i = 0``.  ``c̃_i`` solves the equation of choice ``i`` and its error
at a point is ``|1 − c̃_i/c_i|``.

Where the errors are measured
-----------------------------
For each choice, at the test points of :mod:`worker.euler_states` along its own state (at least ten per
grid point, strictly between grid points) at every grid point of the other states, the other chosen states
included, and every shock point.  Tomorrow's state moves to every choice's value; the policies between
grid points are read multilinearly over the product grid (:func:`worker.euler_states.grid_rule`: the
choices are restricted to their grids, the model having at most one continuous choice).  A test point is
``constrained`` for a choice as for one choice alone: its own choice within one local grid step of an end
of its state's grid, at either grid end of its interval along its state, or where moving it by that step
either way is not allowed with the others held.

Reported: ``diagnostics.euler_errors`` pools every choice's errors (``max_log10`` the largest,
``mean_log10`` the mean over every point measured, ``points``, ``constrained``, ``undefined`` the sums;
``weighted_mean_log10`` weights every point measured by the stationary distribution read along the
choice's state, renormalised over all of them); ``define`` and ``profile`` are those of the choice with the
largest error, so the profile's largest entry is still ``max_log10``; ``by_choice`` holds each choice's
own errors (:func:`choices_errors`).  One of the choices may be continuous: its own equation is then read by
the fitted problem's search (:mod:`worker.continuous.setters_euler`), the others' as here.  Draws whose
probabilities move with a choice or its state add their terms in the value's level to that choice's equation
(:func:`worker.euler_points.errors_at`, ``values``).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from worker.euler import pooled_weighted_mean
from worker.euler_laws import SlopeParts
from worker.euler_points import PointsRule, ValueParts
from worker.euler_setup import EulerSetup, choice_setup
from worker.euler_states import grid_rule, states_errors
from worker.euler_within import maximised, no_state_choices, within_reason
from worker.feasibility import ModelData

__all__ = ["choices_errors", "choices_report", "choices_setup", "grid_rules", "pool_choices", "pool_periods",
           "setting_setups", "choices_model"]

_PER_CHOICE = ("state", "define", "max_log10", "mean_log10", "points", "constrained", "undefined", "profile",
               "weighted_mean_log10")
"""The keys of each entry of ``by_choice``."""


def choices_model(data: ModelData) -> bool:
    """Whether ``data`` has several choices of which at least one is ``next_of`` a state: this module's model
    when none is continuous (the others set no state: :mod:`worker.euler_within`)."""
    return len(data.choices) >= 2 and any(j is not None for j in data.setter)


def choices_setup(data: ModelData) -> list[EulerSetup] | str | None:
    """Each ``next_of`` choice's :class:`~worker.euler_setup.EulerSetup` in the order of the choices, a note why
    the errors are not measured, or None when the model is not one of several choices of which one is
    ``next_of`` (or one is a menu, or its state's grid has one point)."""
    if not choices_model(data):
        return None
    reason = within_reason(data, no_state_choices(data))
    if reason:
        return f"Euler-equation errors were not measured: {reason}"
    return setting_setups(data)


def setting_setups(data: ModelData) -> list[EulerSetup] | str | None:
    """Each ``next_of`` choice's :class:`~worker.euler_setup.EulerSetup` in the order of the choices (the others,
    companions), a note why the errors are not measured, or None when one is a menu or its state's grid has one
    point."""
    found: list[tuple[int, EulerSetup]] = []
    for position, j in enumerate(data.setter):
        if j is None:
            continue
        if data.choice_is_menu[j] or data.state_grids[position].size < 2:
            return None
        one = choice_setup(data, position)
        if isinstance(one, str):
            return one.replace("were not measured:", f"were not measured (choice `{data.choices[j]}`):", 1)
        found.append((j, one))
    return [one for _, one in sorted(found, key=lambda pair: pair[0])]


def choices_errors(
    data: ModelData,
    founds: list[EulerSetup],
    discount: float,
    rules: dict[str, PointsRule],
    distribution: np.ndarray | None = None,
    at_end: dict[str, np.ndarray] | None = None,
    *,
    tomorrow: tuple[ModelData, dict[str, PointsRule]] | None = None,
    slopes: SlopeParts | None = None,
    values: ValueParts | None = None,
) -> dict[str, Any]:
    """Every choice's Euler-equation errors and their pool (see the module's docstring).

    Parameters
    ----------
    data : ModelData
    founds : list of EulerSetup
        From :func:`choices_setup`.
    discount : float
        β.
    rules : dict
        Each choice's policy at points (m, states), (m, shock points).
    distribution : ndarray, optional
        The stationary distribution over the flat points, for ``weighted_mean_log10``.
    at_end : dict, optional
        Per choice, (grid points, shock points): where the solved choice is at an end of its state's grid.
    tomorrow : (ModelData, rules), optional
        The next period's model and rules; default ``data`` and ``rules``.
    slopes : SlopeParts, optional
        The value's slopes, where a law of motion moves with a chosen state or a choice (:mod:`worker.euler_laws`).
    values : ValueParts, optional
        The value read at points, where a draw's probability moves with a choice or its state
        (:func:`worker.euler_points.errors_at`).

    Returns
    -------
    dict
        The keys of :func:`worker.euler.euler_errors` pooled over the choices, and ``by_choice``.
    """
    data_next, rules_next = tomorrow or (data, rules)
    parts = []
    for found in founds:
        own = found.choice
        parts.append(states_errors(
            data, found, discount, rules[own], distribution, None if at_end is None else at_end[own],
            tomorrow=(data_next, rules_next[own]), pooling=distribution is not None,
            companions=(maximised(data, found, rules), maximised(data_next, found, rules_next)),
            slopes=slopes, values=values,
        ))
        parts[-1]["state"] = found.state
    return pool_choices(founds, parts, distribution is not None)


def pool_choices(founds: list[EulerSetup], parts: list[dict[str, Any]], weighted: bool) -> dict[str, Any]:
    """Each choice's errors (``parts``, in the order of ``founds``, each with its ``state``) and their pool (see
    the module's docstring); ``weighted``: each part has its ``weighted_mean_log10`` and weight to pool."""
    measured = [part for part in parts if part["points"]]
    points = sum(part["points"] for part in parts)
    worst = max(measured, key=lambda part: part["max_log10"], default=parts[0])
    result: dict[str, Any] = {
        "max_log10": worst["max_log10"],
        "mean_log10": sum(part["mean_log10"] * part["points"] for part in measured) / points if points else None,
        "points": points,
        "constrained": sum(part["constrained"] for part in parts),
        "undefined": sum(part["undefined"] for part in parts),
        "define": worst["define"],
        "profile": worst["profile"],
    }
    if weighted:
        result["weighted_mean_log10"] = pooled_weighted_mean(parts)
    result["by_choice"] = {found.choice: {key: part[key] for key in _PER_CHOICE if key in part}
                           for found, part in zip(founds, parts)}
    return result


def grid_rules(data: ModelData, founds: list[EulerSetup],
               chosen: dict[str, np.ndarray]) -> tuple[dict[str, PointsRule], dict[str, np.ndarray]]:
    """``(rules, at_end)`` of choices restricted to their grids, each choice's values at every flat point in
    ``chosen``: each read multilinearly over the product grid (its own state's end intervals extended), and
    where it is at an end of its state's grid."""
    rules: dict[str, PointsRule] = {}
    at_end: dict[str, np.ndarray] = {}
    for found in founds:
        values = np.asarray(chosen[found.choice], dtype=np.float64).reshape(data.n_grid, data.n_shocks)
        axis = data.states.index(found.state)
        grid = data.state_grids[axis]
        rules[found.choice] = grid_rule(data, values, extend=axis)
        at_end[found.choice] = (values <= grid[0]) | (values >= grid[-1])
    return rules, at_end


def choices_report(data: ModelData, founds: list[EulerSetup], discount: float, chosen: dict[str, np.ndarray],
                   distribution: np.ndarray | None = None, slopes: SlopeParts | None = None,
                   values: ValueParts | None = None) -> dict[str, Any]:
    """``diagnostics.euler_errors`` of a solved model with several ``next_of`` choices (restricted to their
    grids); ``chosen`` holds each choice's values at every flat point, (n,); ``slopes`` the value's, where a law
    moves with a chosen state or a choice."""
    rules, at_end = grid_rules(data, founds, chosen)
    return choices_errors(data, founds, discount, rules, distribution, at_end, slopes=slopes, values=values)


def pool_periods(periods: list[dict[str, Any]]) -> dict[str, Any]:
    """``by_choice`` over the periods of a finite horizon, from each period's: per choice the largest error,
    the mean over every point measured, the sums, the first period's profile."""
    out: dict[str, Any] = {}
    for choice, first in periods[0].items():
        parts = [period[choice] for period in periods]
        points = sum(part["points"] for part in parts)
        measured = [part for part in parts if part["points"]]
        out[choice] = {
            "state": first["state"], "define": first["define"],
            "max_log10": max((part["max_log10"] for part in measured), default=None),
            "mean_log10": sum(part["mean_log10"] * part["points"] for part in measured) / points if points else None,
            "points": points,
            "constrained": sum(part["constrained"] for part in parts),
            "undefined": sum(part["undefined"] for part in parts),
            "profile": first["profile"],
        }
    return out
