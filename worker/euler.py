"""Euler-equation errors of a solved grid model, the unit-free accuracy measure of Judd (1992).

A model qualifies when its one choice ``x`` sets tomorrow's value of its one
state ``k`` (a ``next_of`` choice; shocks as many as it likes) and its reward
depends on the choice only through one define ``c``, through which it is
differentiable.  With ``r`` the reward, the first-order condition of an
interior choice and the envelope condition read

    ∂r/∂c(c) · ∂c/∂x  =  −β E_z'[ ∂r/∂k (k', z', x'') ],   k' = x(k, z),  x'' = x(k', z'),

where ``∂r/∂k`` is the total derivative of the reward with respect to the
state at a fixed choice (through every define that depends on it; for
``r = u(c(k, x))`` it is ``u'(c) ∂c/∂k``).  The Euler value ``c̃`` is the
``c`` that makes the left side equal to the right side, found by inverting
the marginal reward ``∂r/∂c`` numerically (vectorised Newton steps on its
derivative tree, with bisection where Newton does not settle), and the error
at a point is ``|1 − c̃/c|``, reported as its log10.  Every derivative is a
tree of :func:`worker._slopes.derivative`, evaluated with numpy: the reward
is differentiated in one name at a time (the choice, the state, or the
define ``c`` held as a leaf).

Where the errors are measured
-----------------------------
At test points strictly between the grid points of ``k`` (the midpoints of
``q`` equal parts of every grid interval, ``q`` the least whole number that
gives at least ten times as many test points as grid points), at every shock
point.  The policy at a test point, and tomorrow's policy at ``k'``, is the
solved policy interpolated linearly along ``k`` — for a continuous choice,
the solved problem's own search there (``rule`` of :func:`euler_report`), and
for the endogenous grid method its own rule.  For a choice restricted to
the grid, the solved policy is a step function on the grid; interpolating it
is what the trade does to measure how coarse the grid is, and the error so
measured falls like the grid step.

A test point is skipped and counted as ``constrained`` when the choice there
is within one local grid step of an end of the grid of ``k`` (for a policy
read linearly from the grid, also when the choice at either end of its grid
interval is at an end of the grid: the limit may bind there), or when moving
the choice by that step either way is not allowed (a feasibility expression
fails or the reward is not finite): there the first-order condition need not
hold with equality.  Points where a derivative or ``c̃`` is not a finite
number are skipped and counted as ``undefined``.

``mean_log10`` is the mean of the log10 errors; ``weighted_mean_log10`` (with
``report.stationary``) weights them by the stationary distribution
interpolated linearly along ``k`` to the test points, renormalised over the
points measured.  Errors below ``2**-56`` are counted as ``2**-56``, so
log10 stays finite.

``profile`` lays the errors out across the state for a plot: the test points
in order, and the log10 error at every shock point, None where the point was
constrained or undefined.  With more than ``PROFILE_POINTS`` test points,
consecutive test points are pooled (equal numbers per pool, the last pool
possibly smaller) and each pool keeps, per shock point, the worst error
measured in it, at the middle of the pool's range of the state: a peak is
never smoothed away, so the profile's largest value is ``max_log10``.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from worker import _slopes
from worker.expressions import Node, Number, names_in
from worker.expressions.evaluator import evaluate_tree
from worker.feasibility import ModelData

__all__ = [
    "PROFILE_POINTS", "TEST_POINTS_PER_GRID_POINT", "EulerSetup", "between_points", "error_profile", "euler_errors",
    "euler_report", "grid_policy", "setup",
]

TEST_POINTS_PER_GRID_POINT = 10
"""Test points per grid point of the chosen state, at the least (count)."""
PROFILE_POINTS = 1000
"""Most state values in ``profile``; more test points are pooled, keeping each pool's worst (count).

About one per pixel column of a picture: more would not show, and a profile
is stored with every result that asks for the errors.
"""
_ERROR_FLOOR = 2.0**-56
"""The smallest error reported, a little below the rounding of one float64 operation."""
_CHUNK_ELEMENTS = 2**18
"""Tomorrow's (test point, shock, next shock) triples evaluated at once: bounds the temporaries (count)."""
_NEWTON_STEPS = 40
_BISECTION_STEPS = 200

PolicyRule = Callable[[np.ndarray], np.ndarray]
"""``policy(k) -> x``: at states ``k`` (m,), the choice at every shock point, (m, shock points)."""


@dataclass(frozen=True)
class EulerSetup:
    """What the errors of one model need: names and derivative trees."""

    state: str
    choice: str
    define: str
    marginal: Node
    """∂r/∂c, with ``c`` a leaf and the defines after it that depend on it as primed names."""
    marginal_slope: Node
    """∂²r/∂c², for the Newton steps."""
    after: dict[str, tuple[Node, Node]]
    """The defines after ``c`` that depend on it, in order: their trees and their derivatives in ``c``."""
    define_slope: tuple[Node, dict[str, Node]]
    """∂c/∂x: the tree and the defines' derivatives in ``x`` it uses."""
    state_slope: tuple[Node, dict[str, Node]]
    """∂r/∂k at a fixed choice: the tree and the defines' derivatives in ``k`` it uses."""


def setup(data: ModelData) -> EulerSetup | str | None:
    """The derivative trees of ``data``'s Euler equation; a note why not; None when it does not apply.

    It applies to models with one choice that is ``next_of`` a state; the
    note explains what else is missing (one state only, one define carrying
    the choice, a differentiable reward).
    """
    if not any(j is not None for j in data.setter):
        return None
    if len(data.choices) != 1 or len(data.states) != 1:
        return ("Euler-equation errors not computed: they are measured for models with one state and one choice "
                "that sets tomorrow's value of it")
    if data.choice_is_menu[0] or data.state_grids[0].size < 2:
        return None
    state, choice = data.states[0], data.choices[0]
    src = data.source
    defines = {name: expr.tree for name, expr in src.defines}
    reward = src.reward.tree
    moving = _depends(defines, choice)
    define, reason = _carrier(defines, reward, choice, moving)
    if define is None:
        return f"Euler-equation errors not computed: {reason}"
    try:
        after = _slope_trees(defines, define, skip_own=True)
        marginal = _slopes.derivative(reward, define, after)
        marginal_slope = _slopes.derivative(marginal, define, after)
        if isinstance(marginal, Number):
            return (f"Euler-equation errors not computed: the marginal reward of `{define}` is constant, so it "
                    "cannot be inverted")
        in_choice = _slope_trees(defines, choice)
        define_slope = _slopes.derivative(defines[define], choice, in_choice)
        in_state = _slope_trees(defines, state)
        state_slope = _slopes.derivative(reward, state, in_state)
    except _slopes.NotSmooth as error:
        return f"Euler-equation errors not computed: the reward is not differentiable ({error})"
    later = {name: (defines[name], derived) for name, derived in after.items()}
    return EulerSetup(state, choice, define, marginal, marginal_slope, later, (define_slope, in_choice),
                      (state_slope, in_state))


def _depends(defines: dict[str, Node], variable: str) -> dict[str, bool]:
    """The defines that depend on ``variable``, directly or through earlier defines (in order)."""
    moving: dict[str, bool] = {}
    for name, tree in defines.items():
        if any(used == variable or used in moving for used in names_in(tree)):
            moving[name] = True
    return moving


def _carrier(
    defines: dict[str, Node], reward: Node, choice: str, moving: dict[str, bool]
) -> tuple[str | None, str]:
    """The one define through which the choice enters the reward, or None and why.

    A define whose only role is to rename another (``u = log(c)``, reward
    ``u``: a marginal reward that is a constant) is looked through, down to
    the define nearest the choice that still carries it alone.
    """
    carried = sorted(name for name in names_in(reward) if name == choice or name in moving)
    if choice in carried:
        return None, f"the reward uses the choice `{choice}` directly, not through one define"
    if not carried:
        return None, f"the reward does not depend on the choice `{choice}`"
    if len(carried) > 1:
        return None, (f"the choice `{choice}` enters the reward through several defines "
                      f"({', '.join(f'`{name}`' for name in carried)}), not one")
    define = carried[0]
    while True:
        inner = sorted(name for name in names_in(defines[define]) if name == choice or name in moving)
        try:
            constant = isinstance(_slopes.derivative(reward, define, _slope_trees(defines, define, skip_own=True)),
                                  Number)
        except _slopes.NotSmooth:
            constant = False
        if not constant or len(inner) != 1 or inner[0] == choice:
            return define, ""
        define = inner[0]


def _slope_trees(defines: dict[str, Node], variable: str, *, skip_own: bool = False) -> dict[str, Node]:
    """Derivatives in ``variable`` of the defines that depend on it, in order.

    With ``skip_own`` the variable is itself a define, held as a leaf.
    """
    moving = _depends({name: tree for name, tree in defines.items() if not (skip_own and name == variable)}, variable)
    if skip_own:
        names = list(defines)
        later = set(names[names.index(variable) + 1:])
        moving = {name: True for name in moving if name in later}
    return {name: _slopes.derivative(defines[name], variable, moving) for name in moving}


def grid_policy(grid: np.ndarray, values: np.ndarray) -> PolicyRule:
    """The policy ``values`` (grid points × shock points) interpolated linearly along ``grid``.

    The policy of a choice restricted to the grid is a step function on the
    grid; interpolating it between grid points is what the trade does to
    measure how coarse the grid is.  Outside the grid the end intervals'
    lines are extended.
    """
    grid = np.asarray(grid, dtype=np.float64)
    values = np.asarray(values, dtype=np.float64)
    slopes = np.diff(values, axis=0) / np.diff(grid)[:, None]
    last = grid.size - 2

    def policy(k: np.ndarray) -> np.ndarray:
        left = np.clip(np.searchsorted(grid, k, side="right") - 1, 0, last)
        return values[left] + (k - grid[left])[:, None] * slopes[left]

    return policy


def between_points(grid: np.ndarray) -> np.ndarray:
    """Points strictly between the grid points, at least ``TEST_POINTS_PER_GRID_POINT`` per grid point."""
    parts = math.ceil(TEST_POINTS_PER_GRID_POINT * grid.size / (grid.size - 1))
    shares = (np.arange(parts) + 0.5) / parts
    return (grid[:-1, None] + shares[None, :] * np.diff(grid)[:, None]).ravel()


def euler_errors(
    data: ModelData,
    found: EulerSetup,
    discount: float,
    policy: PolicyRule,
    distribution: np.ndarray | None = None,
    at_end: np.ndarray | None = None,
    *,
    tomorrow: tuple[ModelData, PolicyRule] | None = None,
) -> dict[str, Any]:
    """Euler-equation errors of ``policy`` at the test points of ``data``'s state grid.

    Parameters
    ----------
    data : ModelData
    found : EulerSetup
        From :func:`setup`.
    discount : float
        β.
    policy : callable
        ``policy(k) -> x``: at states ``k`` (m,), the choice at every shock point, (m, shock points);
        :func:`grid_policy` for a solved model.
    distribution : ndarray, optional
        The stationary distribution, (grid points, shock points), for ``weighted_mean_log10``.
    at_end : ndarray, optional
        (grid points, shock points): where the solved choice is at an end of its grid; test points in a
        grid interval with such an end are counted as ``constrained`` (for a policy read linearly).
    tomorrow : (ModelData, policy), optional
        Tomorrow's model (its params) and policy, when they differ from today's (a finite horizon's
        next period); default: ``data`` and ``policy``.

    Returns
    -------
    dict
        ``max_log10``, ``mean_log10`` (None when no point was measured),
        ``points`` (test points measured), ``constrained``, ``undefined``,
        ``define``, ``profile`` (see :func:`error_profile`) and, with
        ``distribution``, ``weighted_mean_log10``.
    """
    grid = data.state_grids[0]
    n_z = data.n_shocks
    k_all = between_points(grid)
    rows = max(1, _CHUNK_ELEMENTS // (n_z * n_z))
    parts = [_errors_at(data, found, discount, policy, k_all[start:start + rows], tomorrow or (data, policy))
             for start in range(0, k_all.size, rows)]
    log_error = np.concatenate([part[0] for part in parts])
    constrained = np.concatenate([part[1] for part in parts])
    if at_end is not None:
        # A test point between a grid point whose choice is at an end of its grid and one whose choice is not:
        # the limit may bind there, where the policy read linearly says it does not.
        interval = np.clip(np.searchsorted(grid, k_all, side="right") - 1, 0, grid.size - 2)
        constrained |= at_end[interval] | at_end[interval + 1]
    measured = ~constrained & np.isfinite(log_error)
    undefined = ~constrained & ~measured
    result: dict[str, Any] = {
        "max_log10": float(log_error[measured].max()) if measured.any() else None,
        "mean_log10": float(log_error[measured].mean()) if measured.any() else None,
        "points": int(measured.sum()),
        "constrained": int(constrained.sum()),
        "undefined": int(undefined.sum()),
        "define": found.define,
        "profile": error_profile(found.state, k_all, log_error, measured),
    }
    if distribution is not None:
        weights = grid_policy(grid, np.asarray(distribution, dtype=np.float64).reshape(grid.size, n_z))(k_all)
        total = weights[measured].sum()
        result["weighted_mean_log10"] = (
            float(weights[measured] @ log_error[measured] / total) if measured.any() and total > 0 else None
        )
    return result


def error_profile(state: str, k_points: np.ndarray, log_error: np.ndarray, measured: np.ndarray) -> dict[str, Any]:
    """The errors across the state, at most ``PROFILE_POINTS`` values of it, for a plot.

    Parameters
    ----------
    state : str
        The state's name.
    k_points : ndarray
        The test points, increasing, (m,).
    log_error, measured : ndarray
        log10 errors and where they were measured, (m, shock points).

    Returns
    -------
    dict
        ``state``; ``at``, the values of the state, (p,); ``log10_error``,
        (p, shock points), shock points in flat (C) order, None where nothing
        was measured; ``pooled``, test points per entry (1: no pooling).
        With ``m > PROFILE_POINTS``, ``pooled = ceil(m / PROFILE_POINTS)``
        consecutive test points make one entry: its worst measured error per
        shock point, at the middle of its first and last test point.
    """
    size = max(1, math.ceil(k_points.size / PROFILE_POINTS))
    count = math.ceil(k_points.size / size)
    padding = count * size - k_points.size
    worst = np.pad(np.where(measured, log_error, -np.inf), ((0, padding), (0, 0)), constant_values=-np.inf)
    worst = worst.reshape(count, size, -1).max(axis=1)
    starts = np.arange(count) * size
    at = 0.5 * (k_points[starts] + k_points[np.minimum(starts + size - 1, k_points.size - 1)])
    return {
        "state": state,
        "at": at.tolist(),
        "log10_error": [[value if value > -np.inf else None for value in row] for row in worst.tolist()],
        "pooled": size,
    }


def _errors_at(
    data: ModelData, found: EulerSetup, discount: float, policy: PolicyRule, k_points: np.ndarray,
    tomorrow: tuple[ModelData, PolicyRule],
) -> tuple[np.ndarray, np.ndarray]:
    """log10 errors and the constrained mask at test points ``k_points``, both (points, shock points);
    ``tomorrow`` is the model and policy of the next period."""
    n_z = data.n_shocks
    k = k_points[:, None]
    shocks = data.shock_table[None, :, :]
    with np.errstate(all="ignore"):
        x = policy(k_points)
        constrained = _binding(data, found, data.state_grids[0], k, shocks, x)
        env = _environment(data, found, k, shocks, x)
        c = np.broadcast_to(env[found.define], x.shape)
        c_slope = _slope(found.define_slope, env, x.shape)
        # Tomorrow: k' = x at every shock point z', with tomorrow's policy there; rows are (test point, z).
        k_next = x.reshape(-1, 1)
        data_next, policy_next = tomorrow
        env_next = _environment(data_next, found, k_next, shocks, policy_next(k_next[:, 0]))
        state_slope = _slope(found.state_slope, env_next, (k_next.size, n_z)).reshape(x.shape[0], n_z, n_z)
        expected = np.einsum("azw,zw->az", state_slope, data.transition)
        target = -discount * expected / c_slope
        c_tilde = _invert(found, env, c, target)
        error = np.abs(1.0 - c_tilde / c)
        return np.log10(np.maximum(error, _ERROR_FLOOR)), constrained


def _environment(
    data: ModelData, found: EulerSetup, k: np.ndarray, shocks: np.ndarray, x: np.ndarray
) -> dict[str, Any]:
    """Params, state, shocks, choice and every define, broadcasting ``k`` (m, 1) and ``x`` (m, shock points)."""
    env: dict[str, Any] = dict(zip(data.params, data.param_values.tolist()))
    env[found.state] = k
    for t, name in enumerate(data.shocks):
        env[name] = shocks[0, :, t][None, :]
    env[found.choice] = x
    for name, expr in data.source.defines:
        env[name] = evaluate_tree(expr.tree, env)
    return env


def _slope(slope: tuple[Node, dict[str, Node]], env: dict[str, Any], shape: tuple[int, ...]) -> np.ndarray:
    """Evaluate a derivative tree, with the defines' derivatives it names evaluated first, in order."""
    tree, defines = slope
    local = dict(env)
    for name, derived in defines.items():
        local[_slopes.prime(name)] = evaluate_tree(derived, local)
    return np.broadcast_to(evaluate_tree(tree, local), shape)


def _marginal(found: EulerSetup, env: dict[str, Any], c: np.ndarray, *, slope: bool) -> np.ndarray:
    """∂r/∂c (and with ``slope`` also ∂²r/∂c²) with the define set to ``c`` and the defines after it recomputed."""
    local = dict(env)
    local[found.define] = c
    for name, (tree, derived) in found.after.items():
        local[name] = evaluate_tree(tree, local)
        local[_slopes.prime(name)] = evaluate_tree(derived, local)
    tree = found.marginal_slope if slope else found.marginal
    return np.broadcast_to(evaluate_tree(tree, local), c.shape).astype(np.float64)


def _invert(found: EulerSetup, env: dict[str, Any], c: np.ndarray, target: np.ndarray) -> np.ndarray:
    """The ``c̃`` with ``∂r/∂c(c̃) = target``: Newton steps from ``c``, bisection where they do not settle."""
    guess = c.copy()
    done = np.zeros(c.shape, dtype=bool)
    for _ in range(_NEWTON_STEPS):
        gap = _marginal(found, env, guess, slope=False) - target
        step = gap / _marginal(found, env, guess, slope=True)
        moved = guess - step
        ok = np.isfinite(moved)
        settled = ok & (np.abs(step) <= 4 * np.finfo(float).eps * np.abs(moved))
        guess = np.where(ok & ~done, moved, guess)
        done |= settled
        if done.all():
            break
    if not done.all():
        rest = ~done
        guess[rest] = _bisect(found, _subset(env, rest), c[rest], target[rest])
    return guess


def _subset(env: dict[str, Any], rows: np.ndarray) -> dict[str, Any]:
    return {name: (np.broadcast_to(value, rows.shape)[rows] if isinstance(value, np.ndarray) else value)
            for name, value in env.items()}


def _bisect(found: EulerSetup, env: dict[str, Any], c: np.ndarray, target: np.ndarray) -> np.ndarray:
    """Bracket the root around ``c`` by widening steps, then halve the bracket; nan where no bracket is found.

    Around a positive ``c`` the bracket widens by factors (``c/f``, ``c·f``), so that it never reaches 0,
    where marginal rewards such as ``1/c`` change sign through a pole; elsewhere by doubling distances.
    """
    def gap(values: np.ndarray) -> np.ndarray:
        return _marginal(found, env, values, slope=False) - target

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


def _binding(
    data: ModelData, found: EulerSetup, grid: np.ndarray, k: np.ndarray, shocks: np.ndarray, x: np.ndarray
) -> np.ndarray:
    """Test points where the choice is within one local grid step of a grid end or of a disallowed choice."""
    step = np.interp(x, 0.5 * (grid[1:] + grid[:-1]), np.diff(grid))
    binding = ~((x - step >= grid[0]) & (x + step <= grid[-1]))
    for moved in (x - step, x + step):
        env = _environment(data, found, k, shocks, moved)
        allowed = np.isfinite(np.broadcast_to(evaluate_tree(data.source.reward.tree, env), x.shape))
        for expr in data.source.feasible:
            allowed &= np.broadcast_to(evaluate_tree(expr.tree, env), x.shape) != 0.0
        binding |= ~allowed
    return binding


def euler_report(data: ModelData, discount: float, policy_values: np.ndarray,
                 distribution: np.ndarray | None = None, *,
                 rule: PolicyRule | None = None) -> tuple[dict[str, Any] | None, str | None]:
    """``(diagnostics.euler_errors, note)`` of a solved grid model: the errors, or None and why (or no note).

    ``policy_values`` is the chosen value at every flat point, (n,); ``distribution`` the stationary one, (n,).
    ``rule`` gives the policy between grid points (a continuous choice: the solved problem's own search
    there); by default the grid policy interpolated linearly (:func:`grid_policy`).
    """
    found = setup(data)
    if not isinstance(found, EulerSetup):
        return None, found
    values = np.asarray(policy_values, dtype=np.float64).reshape(data.state_grids[0].size, data.n_shocks)
    at_end = None
    if rule is None:
        rule = grid_policy(data.state_grids[0], values)
        grid = data.state_grids[0]
        at_end = (values <= grid[0]) | (values >= grid[-1])
    return euler_errors(data, found, discount, rule, distribution, at_end), None
