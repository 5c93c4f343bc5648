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
from worker.euler_laws import SlopeParts, SlopeReader, law_term
from worker.euler_setup import EulerSetup, needs_value
from worker.expressions import Node
from worker.expressions.evaluator import evaluate_tree
from worker.feasibility import ModelData

__all__ = ["ERROR_FLOOR", "Companions", "PointsRule", "ValueParts", "ValueReader", "binding", "chance_slopes",
           "combinations", "draw_weights", "environment", "errors_at", "invert", "marginal_at", "next_points",
           "slope_at", "subset"]

ERROR_FLOOR = 2.0**-56
"""The smallest error reported, a little below the rounding of one float64 operation."""
_NEWTON_STEPS = 40
_BISECTION_STEPS = 200

PointsRule = Callable[[np.ndarray], np.ndarray]
"""``policy(points) -> x``: at points (m, states) of the state space, the choice at every shock point,
(m, shock points)."""
ValueReader = Callable[[np.ndarray, np.ndarray], np.ndarray]
"""``read(points, rows) -> EV``: at points (m, states) and today's shock points ``rows`` (m,), the continuation
``EV(·, z) = Σ_z' P[z, z'] V(·, z')`` as the solve reads it, (m,) (:func:`worker.euler_states.solve_value`)."""
Companions = Callable[[np.ndarray], dict[str, np.ndarray]]
"""``beside(points) -> {choice: x_j}``: at points (m, states), the values of the other ``next_of`` choices (the
:attr:`~worker.euler_setup.EulerSetup.companions`) at every shock point, each (m, shock points)."""
ValueParts = tuple[ValueReader, ValueReader, float]
"""What draws moving with ``x`` or ``k`` need: the continuation of the value tomorrow read today (``V_{t+1}``'s),
of the value the day after read tomorrow (``V_{t+2}``'s; the same in an infinite horizon) and tomorrow's
discount."""


def errors_at(
    data: ModelData, found: EulerSetup, discount: float, policy: PointsRule, points: np.ndarray,
    tomorrow: tuple[ModelData, PointsRule], values: ValueParts | None = None,
    companions: tuple[Companions, Companions] | None = None, slopes: SlopeParts | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """log10 errors and the constrained mask at test ``points`` (m, states), both (m, shock points);
    ``tomorrow`` is the model and policy of the next period; ``companions`` today's and tomorrow's values of
    the other ``next_of`` choices, when the model has several (held there, their states moving to them);
    ``slopes`` the value's slopes, when another state's law moves with ``k`` or ``x``
    (:mod:`worker.euler_laws`: each such law adds ``∂EV/∂y(s') ∂g/∂x`` today and ``β' ∂EV/∂y(s'') ∂g/∂k``
    tomorrow, ``EV`` the continuation).

    With shocks drawn after the choice (:func:`worker.euler_setup.setup` has checked that ``c`` and its
    marginal reward do not move with them), tomorrow's marginal value is the expectation over today's draws
    (each with its next state and probability) and, tomorrow, over tomorrow's draws of the reward's slope
    in ``k``: ``β Σ_d p_d Σ_z' P[z, z'] Σ_d' p_d'(s') ∂r/∂k(s', x(s'), d')``, ``s' = (x, g(y, z, d), z')``.
    Where the probabilities move with ``x`` the first-order condition adds ``Σ_d ∂p_d/∂x · W_d`` and where
    they move with ``k`` the envelope condition tomorrow adds ``Σ_d' ∂p_d'/∂k · W_d'``, with
    ``W_d = r_d + β EV(next_d)`` read by ``values`` (:data:`ValueParts`, the continuation as the solve reads
    it; needed then).
    """
    n_z = data.n_shocks
    columns = {name: points[:, t:t + 1] for t, name in enumerate(data.states)}
    k = columns.pop(found.state)
    beside_next = None
    if companions is not None:
        columns.update(companions[0](points))
        beside_next = companions[1]
    shocks = data.shock_table[None, :, :]
    data_next, policy_next = tomorrow
    draws = combinations(data)
    if needs_value(found) and values is None:
        raise ValueError("draws whose probabilities move with the choice or the state need the value")
    if found.laws and slopes is None:
        raise ValueError("a law of motion that moves with the chosen state or the choice needs the value's slopes")
    later_slope = None if slopes is None else (slopes[1], slopes[2])
    later = None if values is None else (values[1], values[2])
    with np.errstate(all="ignore"):
        x = policy(points)
        grid = data.state_grids[data.states.index(found.state)]
        constrained = binding(data, found, grid, k, shocks, x, columns)
        env = environment(data, found, k, shocks, x, {**columns, **draws[0]})
        c = np.broadcast_to(env[found.define], x.shape)
        c_slope = slope_at(found.define_slope, env, x.shape)
        chances = draw_weights(data, env, x.shape)
        moving = chance_slopes(data, found, env, x.shape, 0)
        expected, extra = np.zeros(x.shape), np.zeros(x.shape)
        last: tuple[np.ndarray, np.ndarray] | None = None
        for d, drawn in enumerate(draws):
            here = env if d == 0 else environment(data, found, k, shocks, x, {**columns, **drawn})
            tomorrows = next_points(data, found, here, x)
            if last is None or not np.array_equal(tomorrows, last[0], equal_nan=True):
                last = (tomorrows, _marginal_value(data_next, found, policy_next, tomorrows, shocks, later,
                                                   beside_next, later_slope))
            slope_next = last[1].reshape(x.shape[0], n_z, n_z)
            expected += chances[d] * np.einsum("azw,zw->az", slope_next, data.transition)
            if found.laws and slopes is not None:
                expected += chances[d] * law_term(data, found.laws, 0, found.define_slope, here, x.shape,
                                                  tomorrows, slopes[0])
            if moving is not None and values is not None:
                extra += moving[d] * _worth(data, here, tomorrows, values[0], discount, x.shape)
        target = -(discount * expected + extra) / c_slope
        c_tilde = invert(found, env, c, target)
        error = np.abs(1.0 - c_tilde / c)
        return np.log10(np.maximum(error, ERROR_FLOOR)), constrained


def next_points(data: ModelData, found: EulerSetup, env: dict[str, Any], x: np.ndarray) -> np.ndarray:
    """Tomorrow's states, rows (test point, z): ``k' = x``, each companion's state its choice's value in ``env``,
    the others by their laws (moved into their grids)."""
    out = np.empty((x.size, len(data.states)))
    out[:, data.states.index(found.state)] = x.reshape(-1)
    for state, choice in found.companions:
        t = data.states.index(state)
        out[:, t] = np.broadcast_to(env[choice], x.shape).reshape(-1)
    for t, law in data.source.next:
        grid = data.state_grids[t]
        out[:, t] = np.clip(np.broadcast_to(evaluate_tree(law.tree, env), x.shape), grid[0], grid[-1]).reshape(-1)
    return out


def _worth(data: ModelData, env: dict[str, Any], tomorrows: np.ndarray, read: ValueReader, discount: float,
           shape: tuple[int, ...]) -> np.ndarray:
    """``W = r + β EV(next, z)``, ``EV(·, z) = Σ_z' P[z, z'] V(·, z')``, of one draw at its ``env`` (rows, shock
    points); ``tomorrows`` its next states (rows × shock points in C order, states), each read at its own ``z``."""
    reward = np.broadcast_to(evaluate_tree(data.source.reward.tree, env), shape)
    rows = np.tile(np.arange(shape[1], dtype=np.int64), shape[0])
    return reward + discount * read(tomorrows, rows).reshape(shape)


def _marginal_value(data: ModelData, found: EulerSetup, policy: PointsRule, points: np.ndarray,
                    shocks: np.ndarray, later: tuple[ValueReader, float] | None = None,
                    beside: Companions | None = None,
                    later_slope: tuple[SlopeReader, float] | None = None) -> np.ndarray:
    """∂V/∂k at states ``points`` (rows) and every shock point: the reward's slope in ``k`` at the policy there
    (the companions' choices at theirs, ``beside``), its expectation over the draws after the choice, (rows,
    shock points); with ``later`` (the value the day after and tomorrow's discount) and probabilities moving
    with ``k``, plus ``Σ_d ∂p_d/∂k · W_d``; with ``later_slope`` (the day after's value slopes and tomorrow's
    discount) and laws moving with ``k``, plus ``β' Σ_y ∂g_y/∂k · E ∂V/∂y`` (:mod:`worker.euler_laws`)."""
    k = points[:, [data.states.index(found.state)]]
    others = {name: points[:, t:t + 1] for t, name in enumerate(data.states) if name != found.state}
    if beside is not None:
        others.update(beside(points))
    x = policy(points)
    draws = combinations(data)
    env = environment(data, found, k, shocks, x, {**others, **draws[0]})
    chances = draw_weights(data, env, x.shape)
    moving = None if later is None else chance_slopes(data, found, env, x.shape, 1)
    total = np.zeros(x.shape)
    for d, drawn in enumerate(draws):
        here = env if d == 0 else environment(data, found, k, shocks, x, {**others, **drawn})
        total = total + chances[d] * slope_at(found.state_slope, here, x.shape)
        if found.laws and later_slope is not None:
            total = total + chances[d] * later_slope[1] * law_term(
                data, found.laws, 1, found.state_slope, here, x.shape, next_points(data, found, here, x),
                later_slope[0])
        if moving is not None and later is not None:
            total = total + moving[d] * _worth(data, here, next_points(data, found, here, x), later[0], later[1],
                                               x.shape)
    return total


def combinations(data: ModelData) -> list[dict[str, float]]:
    """The draws after the choice, one dict of values per combination (C order); ``[{}]`` without draws."""
    draws = data.draws
    return [{}] if draws is None else [draws.combination(d) for d in range(draws.size)]


def draw_weights(data: ModelData, env: dict[str, Any], shape: tuple[int, ...]) -> np.ndarray:
    """The probability of every combination of the draws, (combinations, *shape); ones without draws.

    Each draw's probabilities at ``env`` (negative roundings counted as 0, as the solve counts them), their
    products in C order of the draws, as :func:`worker.draws.draw_probabilities` combines them.
    """
    draws = data.draws
    if draws is None:
        return np.ones((1, *shape))
    out = np.ones((1, *shape))
    for entries in draws.probs:
        table = np.stack([np.broadcast_to(np.asarray(entry if isinstance(entry, float) else
                                                     evaluate_tree(entry.tree, env), dtype=np.float64), shape)
                          for entry in entries])
        out = (out[:, None] * np.maximum(table, 0.0)[None, :]).reshape(-1, *shape)
    return out


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


def chance_slopes(data: ModelData, found: EulerSetup, env: dict[str, Any], shape: tuple[int, ...],
                  which: int) -> np.ndarray | None:
    """The slope of every combination's probability in ``x`` (``which`` 0) or ``k`` (1), (combinations, *shape),
    by the product rule over the draws; None when no probability moves with it."""
    if found.chance_slopes is None or all(entry[which] is None for row in found.chance_slopes for entry in row):
        return None
    draws = data.draws
    assert draws is not None
    defines = (found.define_slope if which == 0 else found.state_slope)[1]
    level, slope = np.ones((1, *shape)), np.zeros((1, *shape))
    for entries, trees in zip(draws.probs, found.chance_slopes):
        table = np.stack([np.broadcast_to(np.asarray(entry if isinstance(entry, float) else
                                                     evaluate_tree(entry.tree, env), dtype=np.float64), shape)
                          for entry in entries])
        moved = np.stack([np.zeros(shape) if tree[which] is None else slope_at((tree[which], defines), env, shape)
                          for tree in trees])
        slope = (slope[:, None] * table[None, :] + level[:, None] * moved[None, :]).reshape(-1, *shape)
        level = (level[:, None] * table[None, :]).reshape(-1, *shape)
    return slope


def binding(
    data: ModelData, found: EulerSetup, grid: np.ndarray, k: np.ndarray, shocks: np.ndarray, x: np.ndarray,
    others: dict[str, np.ndarray] | None = None,
) -> np.ndarray:
    """Test points where the choice is within one local grid step of a grid end or of a disallowed choice."""
    step = np.interp(x, 0.5 * (grid[1:] + grid[:-1]), np.diff(grid))
    binding = ~((x - step >= grid[0]) & (x + step <= grid[-1]))
    for moved in (x - step, x + step):
        allowed = np.ones(x.shape, dtype=bool)
        for d, drawn in enumerate(combinations(data)):
            env = environment(data, found, k, shocks, moved, {**(others or {}), **drawn})
            if d == 0:
                chances = draw_weights(data, env, x.shape)
                for expr in data.source.feasible:
                    allowed &= np.broadcast_to(evaluate_tree(expr.tree, env), x.shape) != 0.0
            reward = np.broadcast_to(evaluate_tree(data.source.reward.tree, env), x.shape)
            allowed &= np.isfinite(reward) | (chances[d] <= 0.0)
        binding |= ~allowed
    return binding
