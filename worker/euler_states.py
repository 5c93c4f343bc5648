"""Euler-equation errors of a model with several states (the equation: :mod:`worker.euler`).

The choice sets tomorrow's value of one state ``k``; every other state ``y`` moves by its own law
``y' = g(y, z)``, free of ``k`` and of the choice (:mod:`worker.euler_setup` refuses the model with a note
otherwise), so the envelope condition ``∂V/∂k = ∂r/∂k`` still closes the first-order condition with
tomorrow's policy alone.

Where the errors are measured
-----------------------------
Along ``k`` at the test points of a one-state model (:func:`worker.euler.between_points`: at least ten
per grid point, strictly between grid points), at *every grid point* of every other state, and at every
shock point: so there are at least ten times as many test points as grid points in all.  The other
states' test values are their grid points rather than points between them because tomorrow's ``y'`` of a
law such as ``y' = ρ y`` already falls between them, where tomorrow's policy is read (and a test point
between them too would multiply the cost, a search per point for a continuous choice, by about two per
state for little news).  Tomorrow's ``y'`` outside its grid is moved to the nearer end, as the solve
moves it.

The policy at a point off the grid is read as the solve reads it:

* a choice restricted to the grid: the grid policy interpolated multilinearly over the product grid
  (:func:`grid_rule`: along ``k`` the end intervals' lines are extended, as for one state; along the
  other states it is held at the end values outside the grid);
* a continuous choice: the fitted problem's own search at that point (:func:`search_rule`), seeded by
  the grid policy interpolated multilinearly.

``weighted_mean_log10`` weights each test point by the stationary distribution interpolated linearly
along ``k`` (the other states are at grid points).  ``profile`` stays a profile along ``k``, one column
per shock point: each entry is the worst error over the other states' grid points (and, past
``PROFILE_POINTS`` test values of ``k``, over consecutive ones, as for one state), so its largest entry is
``max_log10``; its ``over`` names the states it takes the worst over.  The dashboard's plot of it needs
nothing more.
"""

from __future__ import annotations

import itertools
from typing import Any

import numpy as np

from worker.euler import between_points, chunk_rows, error_profile, weigh
from worker.euler_laws import SlopeParts
from worker.euler_points import Companions, PointsRule, ValueParts, ValueReader, errors_at
from worker.euler_setup import EulerSetup
from worker.feasibility import ModelData

__all__ = ["grid_rule", "search_rule", "solve_value", "states_errors", "states_report", "test_points",
           "value_reader"]


def test_points(data: ModelData, found: EulerSetup) -> tuple[np.ndarray, tuple[int, ...]]:
    """``(points (m, states), layout)``: the test points in C order over ``layout``, the state sizes with the
    chosen state's replaced by its number of test values."""
    axis = data.states.index(found.state)
    values = [between_points(grid) if t == axis else grid for t, grid in enumerate(data.state_grids)]
    mesh = np.meshgrid(*values, indexing="ij")
    layout = tuple(v.size for v in values)
    return np.column_stack([m.reshape(-1) for m in mesh]), layout


def grid_rule(data: ModelData, values: np.ndarray, extend: int | None = None) -> PointsRule:
    """The grid policy ``values`` (grid points, shock points) interpolated multilinearly over the product grid.

    Outside a state's grid the values at its ends are held, but along the state ``extend`` (a position,
    the chosen state), whose end intervals' lines are extended, as :func:`worker.euler.grid_policy` does.
    """
    table = np.asarray(values, dtype=np.float64).reshape(*data.state_sizes, data.n_shocks)
    grids = [np.asarray(grid, dtype=np.float64) for grid in data.state_grids]

    def rule(points: np.ndarray) -> np.ndarray:
        lower, upper, weight = [], [], []
        for t, grid in enumerate(grids):
            x = points[:, t]
            if grid.size < 2:
                lower.append(np.zeros(x.size, dtype=np.int64))
                upper.append(lower[-1])
                weight.append(np.zeros(x.size))
                continue
            i = np.clip(np.searchsorted(grid, x, side="right") - 1, 0, grid.size - 2)
            w = (x - grid[i]) / (grid[i + 1] - grid[i])
            lower.append(i)
            upper.append(i + 1)
            weight.append(w if t == extend else np.clip(w, 0.0, 1.0))
        out = np.zeros((points.shape[0], table.shape[-1]))
        for corner in itertools.product((False, True), repeat=len(grids)):
            index = tuple(up if high else low for low, up, high in zip(lower, upper, corner))
            share = np.prod([w if high else 1.0 - w for w, high in zip(weight, corner)], axis=0)
            out += share[:, None] * table[index]
        return out

    return rule


def search_rule(problem: Any, v: np.ndarray, policy: np.ndarray) -> PointsRule:
    """The fitted continuous problem's own search at any points, with the value ``v`` it was chosen against,
    seeded by the grid ``policy`` interpolated multilinearly (held inside the grid)."""
    data = problem.model_data
    n_z = data.n_shocks
    guess_at = grid_rule(data, np.asarray(policy, dtype=np.float64).reshape(data.n_grid, n_z))
    v = np.asarray(v, dtype=np.float64)

    def rule(points: np.ndarray) -> np.ndarray:
        count = points.shape[0]
        states = np.repeat(np.asarray(points, dtype=np.float64), n_z, axis=0)
        rows = np.tile(np.arange(n_z, dtype=np.int64), count)
        _, chosen = problem.choose_at(v, states, rows, guess_at(points).reshape(-1))
        return np.asarray(chosen, dtype=np.float64).reshape(count, n_z)

    return rule


def states_errors(
    data: ModelData,
    found: EulerSetup,
    discount: float,
    policy: PointsRule,
    distribution: np.ndarray | None = None,
    at_end: np.ndarray | None = None,
    *,
    tomorrow: tuple[ModelData, PointsRule] | None = None,
    values: ValueParts | None = None,
    pooling: bool = False,
    companions: tuple[Companions, Companions] | None = None,
    slopes: SlopeParts | None = None,
) -> dict[str, Any]:
    """Euler-equation errors of ``policy`` at the test points of a model with several states.

    As :func:`worker.euler.euler_errors` (``pooling`` too), with rules that take points (m, states);
    ``distribution`` and ``at_end`` are over the flat grid points, (grid points, shock points); with several
    ``next_of`` choices ``companions`` gives the others' values today and tomorrow, and with laws moving with
    the chosen state or the choice ``slopes`` the value's slopes (:func:`worker.euler_points.errors_at`).
    """
    n_z = data.n_shocks
    axis = data.states.index(found.state)
    points, layout = test_points(data, found)
    rows = chunk_rows(n_z)
    parts = [errors_at(data, found, discount, policy, points[start:start + rows], tomorrow or (data, policy), values,
                       companions, slopes) for start in range(0, points.shape[0], rows)]
    log_error = np.concatenate([part[0] for part in parts])
    constrained = np.concatenate([part[1] for part in parts])
    grid = data.state_grids[axis]
    k_values = between_points(grid)
    interval = np.clip(np.searchsorted(grid, k_values, side="right") - 1, 0, grid.size - 2)
    if at_end is not None:
        ends = np.asarray(at_end, dtype=bool).reshape(*data.state_sizes, n_z)
        constrained |= (np.take(ends, interval, axis=axis) | np.take(ends, interval + 1, axis=axis)).reshape(-1, n_z)
    measured = ~constrained & np.isfinite(log_error)
    undefined = ~constrained & ~measured
    worst = np.where(measured, log_error, -np.inf).reshape(*layout, n_z)
    worst = np.moveaxis(worst, axis, 0).reshape(layout[axis], -1, n_z).max(axis=1)
    profile = error_profile(found.state, k_values, worst, worst > -np.inf)
    profile["over"] = [name for name in data.states if name != found.state]
    result: dict[str, Any] = {
        "max_log10": float(log_error[measured].max()) if measured.any() else None,
        "mean_log10": float(log_error[measured].mean()) if measured.any() else None,
        "points": int(measured.sum()),
        "constrained": int(constrained.sum()),
        "undefined": int(undefined.sum()),
        "define": found.define,
        "profile": profile,
    }
    if distribution is not None:
        table = np.asarray(distribution, dtype=np.float64).reshape(*data.state_sizes, n_z)
        share = (k_values - grid[interval]) / (grid[interval + 1] - grid[interval])
        shape = [1] * table.ndim
        shape[axis] = share.size
        share = share.reshape(shape)
        weights = (np.take(table, interval, axis=axis) * (1.0 - share)
                   + np.take(table, interval + 1, axis=axis) * share).reshape(-1, n_z)
        weigh(result, weights, log_error, measured, pooling=pooling)
    return result


def states_report(data: ModelData, found: EulerSetup, discount: float, policy_values: np.ndarray,
                  distribution: np.ndarray | None = None, *, rule: PointsRule | None = None,
                  values: ValueParts | None = None, slopes: SlopeParts | None = None) -> dict[str, Any]:
    """``diagnostics.euler_errors`` of a solved model with several states (see :func:`worker.euler.euler_report`).

    ``policy_values`` is the chosen value at every flat point, (n,); without ``rule`` (a choice restricted
    to the grid) the policy between grid points is :func:`grid_rule`'s, and test points next to a grid
    point whose choice is at an end of its grid count as ``constrained``.
    """
    chosen = np.asarray(policy_values, dtype=np.float64).reshape(data.n_grid, data.n_shocks)
    axis = data.states.index(found.state)
    at_end = None
    if rule is None:
        rule = grid_rule(data, chosen, extend=axis)
        grid = data.state_grids[axis]
        at_end = (chosen <= grid[0]) | (chosen >= grid[-1])
    return states_errors(data, found, discount, rule, distribution, at_end, values=values, slopes=slopes)


def value_reader(data: ModelData, value: np.ndarray) -> ValueReader:
    """The continuation of ``value`` (flat points) at any points (:data:`~worker.euler_points.ValueReader`), the
    value read multilinearly over the product grid, held at the grid's ends, then weighted by the row of today's
    shock point: as a solve with ``linear`` interpolation (or a choice restricted to the grid) reads it (the
    reading is linear in the value, so this is the continuation read multilinearly too)."""
    read = grid_rule(data, np.asarray(value, dtype=np.float64).reshape(data.n_grid, data.n_shocks))
    transition = np.asarray(data.transition, dtype=np.float64)

    def continuation(points: np.ndarray, rows: np.ndarray) -> np.ndarray:
        return np.einsum("aw,aw->a", read(points), transition[np.asarray(rows, dtype=np.int64)])

    return continuation


def solve_value(problem: Any, data: ModelData, value: np.ndarray) -> ValueReader:
    """The continuation of ``value`` (flat points) as ``problem``'s solve reads it: the monotone cubic's tensor
    product of ``EV`` where it interpolates so (``problem.cubic``;
    :func:`worker.continuous.cubic_slope.cubic_continuation` — the cubic of the expectation, not the expectation
    of cubic readings of ``V``, the reading not being linear), else multilinearly (:func:`value_reader`)."""
    if not getattr(problem, "cubic", False):
        return value_reader(data, value)
    from worker.continuous.cubic_slope import cubic_continuation

    read = cubic_continuation(data, value)
    return lambda points, rows: read(points, rows, 0)[0]
