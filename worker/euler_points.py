"""The Euler-equation errors at given test points: the numerics behind :mod:`worker.euler`.

:func:`errors_at` measures ``log10 |1 − c̃/c|`` at points of the state space (every state, in the
model's order) and every shock point; the rest evaluates the model and its derivative trees with numpy
(:func:`environment`, :func:`slope_at`, :func:`marginal_at`) and inverts the marginal reward
(:func:`invert`: Newton steps, bisection where they do not settle).

Tomorrow's state at a test point ``(k, y)`` and shock point ``z`` is ``k' = x(k, y, z)`` for the chosen
state and ``y' = g(y, z)`` for every other (its law of motion, evaluated today), moved to the nearer end
of its grid when it falls outside, as the solve moves it (``diagnostics.clamped_next``); tomorrow's policy
is read there at every shock point ``z'``.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from worker import _slopes
from worker.euler_setup import EulerSetup
from worker.expressions import Node
from worker.expressions.evaluator import evaluate_tree
from worker.feasibility import ModelData

__all__ = ["ERROR_FLOOR", "PointsRule", "binding", "environment", "errors_at", "invert", "marginal_at",
           "slope_at", "subset"]

ERROR_FLOOR = 2.0**-56
"""The smallest error reported, a little below the rounding of one float64 operation."""
_NEWTON_STEPS = 40
_BISECTION_STEPS = 200

PointsRule = Callable[[np.ndarray], np.ndarray]
"""``policy(points) -> x``: at points (m, states) of the state space, the choice at every shock point,
(m, shock points)."""


def errors_at(
    data: ModelData, found: EulerSetup, discount: float, policy: PointsRule, points: np.ndarray,
    tomorrow: tuple[ModelData, PointsRule],
) -> tuple[np.ndarray, np.ndarray]:
    """log10 errors and the constrained mask at test ``points`` (m, states), both (m, shock points);
    ``tomorrow`` is the model and policy of the next period."""
    n_z = data.n_shocks
    columns = {name: points[:, t:t + 1] for t, name in enumerate(data.states)}
    k = columns.pop(found.state)
    shocks = data.shock_table[None, :, :]
    with np.errstate(all="ignore"):
        x = policy(points)
        constrained = binding(data, found, data.state_grids[data.states.index(found.state)], k, shocks, x, columns)
        env = environment(data, found, k, shocks, x, columns)
        c = np.broadcast_to(env[found.define], x.shape)
        c_slope = slope_at(found.define_slope, env, x.shape)
        # Tomorrow: rows are (test point, z); k' = x, the other states by their laws, at every shock point z'.
        data_next, policy_next = tomorrow
        next_points = np.empty((x.size, len(data.states)))
        for t, name in enumerate(data.states):
            if name == found.state:
                next_points[:, t] = x.reshape(-1)
        for t, law in data.source.next:
            grid = data.state_grids[t]
            moved = np.broadcast_to(evaluate_tree(law.tree, env), x.shape)
            next_points[:, t] = np.clip(moved, grid[0], grid[-1]).reshape(-1)
        k_next = next_points[:, [data.states.index(found.state)]]
        others_next = {name: next_points[:, t:t + 1] for t, name in enumerate(data.states) if name != found.state}
        env_next = environment(data_next, found, k_next, shocks, policy_next(next_points), others_next)
        state_slope = slope_at(found.state_slope, env_next, (x.size, n_z)).reshape(x.shape[0], n_z, n_z)
        expected = np.einsum("azw,zw->az", state_slope, data.transition)
        target = -discount * expected / c_slope
        c_tilde = invert(found, env, c, target)
        error = np.abs(1.0 - c_tilde / c)
        return np.log10(np.maximum(error, ERROR_FLOOR)), constrained


def environment(
    data: ModelData, found: EulerSetup, k: np.ndarray, shocks: np.ndarray, x: np.ndarray,
    others: dict[str, np.ndarray] | None = None,
) -> dict[str, Any]:
    """Params, states, shocks, choice and every define, broadcasting ``k`` (m, 1) and ``x`` (m, shock points).

    ``others`` holds the values of the other states (each (m, 1) or (m, shock points)), when there are any.
    """
    env: dict[str, Any] = dict(zip(data.params, data.param_values.tolist()))
    env[found.state] = k
    env.update(others or {})
    for t, name in enumerate(data.shocks):
        env[name] = shocks[0, :, t][None, :]
    env[found.choice] = x
    for name, expr in data.source.defines:
        env[name] = evaluate_tree(expr.tree, env)
    return env


def slope_at(slope: tuple[Node, dict[str, Node]], env: dict[str, Any], shape: tuple[int, ...]) -> np.ndarray:
    """Evaluate a derivative tree, with the defines' derivatives it names evaluated first, in order."""
    tree, defines = slope
    local = dict(env)
    for name, derived in defines.items():
        local[_slopes.prime(name)] = evaluate_tree(derived, local)
    return np.broadcast_to(evaluate_tree(tree, local), shape)


def marginal_at(found: EulerSetup, env: dict[str, Any], c: np.ndarray, *, slope: bool) -> np.ndarray:
    """∂r/∂c (and with ``slope`` also ∂²r/∂c²) with the define set to ``c`` and the defines after it recomputed."""
    local = dict(env)
    local[found.define] = c
    for name, (tree, derived) in found.after.items():
        local[name] = evaluate_tree(tree, local)
        local[_slopes.prime(name)] = evaluate_tree(derived, local)
    tree = found.marginal_slope if slope else found.marginal
    return np.broadcast_to(evaluate_tree(tree, local), c.shape).astype(np.float64)


def invert(found: EulerSetup, env: dict[str, Any], c: np.ndarray, target: np.ndarray) -> np.ndarray:
    """The ``c̃`` with ``∂r/∂c(c̃) = target``: Newton steps from ``c``, bisection where they do not settle."""
    guess = c.copy()
    done = np.zeros(c.shape, dtype=bool)
    for _ in range(_NEWTON_STEPS):
        gap = marginal_at(found, env, guess, slope=False) - target
        step = gap / marginal_at(found, env, guess, slope=True)
        moved = guess - step
        ok = np.isfinite(moved)
        settled = ok & (np.abs(step) <= 4 * np.finfo(float).eps * np.abs(moved))
        guess = np.where(ok & ~done, moved, guess)
        done |= settled
        if done.all():
            break
    if not done.all():
        rest = ~done
        guess[rest] = bisect(found, subset(env, rest), c[rest], target[rest])
    return guess


def subset(env: dict[str, Any], rows: np.ndarray) -> dict[str, Any]:
    return {name: (np.broadcast_to(value, rows.shape)[rows] if isinstance(value, np.ndarray) else value)
            for name, value in env.items()}


def bisect(found: EulerSetup, env: dict[str, Any], c: np.ndarray, target: np.ndarray) -> np.ndarray:
    """Bracket the root around ``c`` by widening steps, then halve the bracket; nan where no bracket is found.

    Around a positive ``c`` the bracket widens by factors (``c/f``, ``c·f``), so that it never reaches 0,
    where marginal rewards such as ``1/c`` change sign through a pole; elsewhere by doubling distances.
    """
    def gap(values: np.ndarray) -> np.ndarray:
        return marginal_at(found, env, values, slope=False) - target

    def ends(spread: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        width = spread * (np.abs(c) + 1e-12)
        return np.where(c > 0, c / (1 + spread), c - width), np.where(c > 0, c * (1 + spread), c + width)

    spread = np.full(c.shape, 1e-3)
    low, high = ends(spread)
    g_low, g_high = gap(low), gap(high)
    for _ in range(_BISECTION_STEPS):
        open_ = ~(np.sign(g_low) * np.sign(g_high) <= 0)
        if not open_.any():
            break
        spread = np.where(open_, 2 * spread, spread)
        low, high = ends(spread)
        g_low, g_high = gap(low), gap(high)
    bracketed = np.sign(g_low) * np.sign(g_high) <= 0
    for _ in range(_BISECTION_STEPS):
        middle = 0.5 * (low + high)
        g_middle = gap(middle)
        left = np.sign(g_middle) == np.sign(g_low)
        low, g_low = np.where(left, middle, low), np.where(left, g_middle, g_low)
        high = np.where(left, high, middle)
        if np.all((high - low) <= 4 * np.finfo(float).eps * np.abs(middle)):
            break
    return np.where(bracketed, 0.5 * (low + high), np.nan)


def binding(
    data: ModelData, found: EulerSetup, grid: np.ndarray, k: np.ndarray, shocks: np.ndarray, x: np.ndarray,
    others: dict[str, np.ndarray] | None = None,
) -> np.ndarray:
    """Test points where the choice is within one local grid step of a grid end or of a disallowed choice."""
    step = np.interp(x, 0.5 * (grid[1:] + grid[:-1]), np.diff(grid))
    binding = ~((x - step >= grid[0]) & (x + step <= grid[-1]))
    for moved in (x - step, x + step):
        env = environment(data, found, k, shocks, moved, others)
        allowed = np.isfinite(np.broadcast_to(evaluate_tree(data.source.reward.tree, env), x.shape))
        for expr in data.source.feasible:
            allowed &= np.broadcast_to(evaluate_tree(expr.tree, env), x.shape) != 0.0
        binding |= ~allowed
    return binding
