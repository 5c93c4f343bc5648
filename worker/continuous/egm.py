"""The endogenous grid method (Carroll 2006, "The method of endogenous gridpoints for solving dynamic
stochastic optimization problems", Economics Letters 91(3)), certified by the fitted Bellman operator.

Where it applies
----------------
One state ``k``, one continuous choice ``x`` that is ``next_of`` it (shocks as
many as the model likes), and a reward that depends on the choice only
through one define ``c`` whose marginal reward ``∂r/∂c`` can be inverted —
the form of :func:`worker.euler.setup`, plus: ``∂c/∂x`` and ``∂r/∂c`` must not
depend on today's state (tomorrow's choice then fixes ``c`` without knowing
today's state), and ``c`` must move with ``k`` (so that today's state can be
recovered from ``c``).  :func:`conditions` says which condition fails.

The iteration
-------------
With tomorrow's policy ``x(k', z')`` known on the grid, for every grid point
``k'_j`` (a value of today's choice) and shock point ``z``:

1. the expected marginal value ``E_z[∂r/∂k(k'_j, z', x(k'_j, z'))]`` (the
   envelope condition);
2. ``c*`` from the first-order condition ``∂r/∂c(c*)·∂c/∂x = −β·E``, by
   Newton steps on ``∂r/∂c`` (bisection where they do not settle);
3. today's state ``k*_j`` with ``c(k*_j, z, k'_j) = c*``, by Newton steps in ``k``;

and the new policy on the grid interpolates ``k'_j`` linearly against
``k*_j``; below ``k*_0`` the choice is the grid's lower end (the constraint
binds), above ``k*_last`` its upper end.  It stops when no choice moves by
more than ``POLICY_TOLERANCE`` of the grid's width, or after ``MAX_ROUNDS``.

Certification
-------------
The policy's value ``v_σ`` is computed under the model's interpolation
(Howard evaluation steps to a span far below the tolerance), and then the
ordinary solver (Howard's method) runs from it: a Bellman step of the fitted
operator at ``v_σ`` gives the error bound (MacQueen–Porteus), as for every
method, and when it does not meet the tolerance yet (the method's policy
solves the first-order conditions on its own endogenous grid, which is not
exactly the fitted problem's maximum) the solver goes on, usually for a few
iterations.  The result's value and error bound are the solver's; its policy
is the endogenous grid method's, and
``diagnostics.continuous_choice.endogenous_grid.greedy_gap`` is the largest
distance between it and the fitted problem's own policy.  Euler errors are
measured with the method's own rule between grid points (linear along the
endogenous grid).
"""

from __future__ import annotations

import time
from typing import Any, Callable

import numpy as np

from worker import _slopes
from worker.errors import InvalidDocument
from worker.euler import EulerSetup, _environment, _invert, _slope, _slope_trees, setup
from worker.expressions import names_in
from worker.feasibility import ModelData

__all__ = ["MAX_ROUNDS", "POLICY_TOLERANCE", "conditions", "endogenous_grid"]

POLICY_TOLERANCE = 1e-11
"""The iteration stops when no choice moves by more than this share of the grid's width."""
MAX_ROUNDS = 20_000
"""Most rounds of the iteration (count)."""
_NEWTON_STEPS = 60


def conditions(data: ModelData) -> tuple[EulerSetup | None, tuple[Any, dict] | None, str | None]:
    """``(setup, ∂c/∂k, None)`` when the method applies; else ``(None, None, reason)`` naming the failing condition."""
    if not any(j is not None for j in data.setter) or data.span is not None:
        return None, None, "it needs a continuous choice that is next_of the state (tomorrow's value of it)"
    found = setup(data)
    if not isinstance(found, EulerSetup):
        reason = found or "it needs one state and one choice that sets tomorrow's value of it"
        return None, None, reason.replace("Euler-equation errors not computed: ", "")
    state = found.state
    defines = {name: expr.tree for name, expr in data.source.defines}
    moving = set(_slope_trees(defines, state))
    trees = [found.marginal, found.define_slope[0], *found.define_slope[1].values(),
             *(tree for pair in found.after.values() for tree in pair)]
    if any(names_in(tree) & (moving | {state}) - {found.define} for tree in trees):
        return None, None, (
            f"the marginal reward of `{found.define}` or its slope in the choice depends on today's state "
            f"`{state}`, so tomorrow's choice alone does not fix `{found.define}`")
    try:
        in_state = _slope_trees(defines, state)
        c_slope = (_slopes.derivative(defines[found.define], state, in_state), in_state)
    except _slopes.NotSmooth as error:
        return None, None, f"`{found.define}` is not differentiable in the state ({error})"
    return found, c_slope, None


def endogenous_grid(problem: Any, found: EulerSetup, c_slope: tuple[Any, dict], solve_from: Callable[..., Any],
                    *, tolerance: float, max_iterations: int, **options: Any) -> Any:
    """Solve ``problem`` (a :class:`~worker.continuous.ContinuousProblem`) by the method; a certified outcome.

    ``solve_from(problem, v, **options)`` is the ordinary solver that certifies (Howard's method).
    """
    data = problem.model_data
    started = time.perf_counter()
    grid = data.state_grids[0]
    n_k, n_z = grid.size, data.n_shocks
    shocks = data.shock_table[None, :, :]
    beta = problem.discount
    policy = np.full((n_k, n_z), grid[0])
    c_star = None
    width = float(grid[-1] - grid[0])
    rounds, change = 0, np.inf
    k_today = np.empty((n_k, n_z))
    with np.errstate(all="ignore"):
        x_today = np.broadcast_to(grid[:, None], (n_k, n_z))
        env_today = _environment(data, found, grid[:, None], shocks, x_today)
        c_x = _slope(found.define_slope, env_today, (n_k, n_z))
        while rounds < min(max_iterations, MAX_ROUNDS) and change > POLICY_TOLERANCE * width:
            env_next = _environment(data, found, grid[:, None], shocks, policy)
            marginal_next = _slope(found.state_slope, env_next, (n_k, n_z))
            expected = marginal_next @ data.transition.T
            target = -beta * expected / c_x
            guess = np.broadcast_to(env_today[found.define], (n_k, n_z)).astype(np.float64) if c_star is None \
                else c_star
            guess = np.where(np.isfinite(guess) & (guess > 0), guess, 1.0)
            c_star = _invert(found, env_today, guess, target)
            k_today = _state_for(data, found, c_slope, grid, shocks, c_star, k_today if rounds else None)
            new = _policy_on_grid(grid, k_today)
            change = float(np.nanmax(np.abs(new - policy))) if np.isfinite(new).all() else np.inf
            if not np.isfinite(new).all():
                raise InvalidDocument.at("solver.method", "the endogenous grid method broke down: the first-order "
                                         "condition has no solution at some grid points; use howard")
            policy = new
            rounds += 1
    egm_seconds = time.perf_counter() - started
    flat = np.ascontiguousarray(policy.reshape(-1))
    try:
        value = _policy_value(problem, flat, tolerance)
    except ValueError as error:
        raise InvalidDocument.at("solver.method", f"the endogenous grid method's policy is not allowed by the "
                                 f"model ({error}); use howard") from error
    outcome = solve_from(problem, value, tolerance=tolerance, max_iterations=max_iterations, **options)
    greedy = np.asarray(outcome.policy, dtype=np.float64)
    problem.egm_report = {"rounds": rounds, "last_change": change, "seconds": egm_seconds,
                          "greedy_gap": float(np.abs(greedy - flat).max())}
    outcome.policy = flat
    problem.egm_rule = _endogenous_rule(grid, k_today)
    return outcome


def _state_for(data: ModelData, found: EulerSetup, c_slope: tuple[Any, dict], grid: np.ndarray,
               shocks: np.ndarray, c_star: np.ndarray, start: np.ndarray | None) -> np.ndarray:
    """Today's state ``k*`` (n_k, n_z) at which the define equals ``c_star`` with the choice at each grid point."""
    k = np.broadcast_to(grid[:, None], c_star.shape).copy() if start is None else start.copy()
    x = np.broadcast_to(grid[:, None], c_star.shape)
    scale = float(np.abs(grid).max())
    for _ in range(_NEWTON_STEPS):
        env = _environment(data, found, k, shocks, x)
        gap = np.broadcast_to(env[found.define], c_star.shape) - c_star
        slope = _slope(c_slope, env, c_star.shape)
        step = gap / slope
        k = k - step
        if np.all(np.abs(step) <= 4 * np.finfo(float).eps * (np.abs(k) + scale)):
            break
    return k


def _policy_on_grid(grid: np.ndarray, k_today: np.ndarray) -> np.ndarray:
    """The choice at each grid point: tomorrow's grid against today's endogenous states, linearly."""
    out = np.empty_like(k_today)
    for z in range(k_today.shape[1]):
        points = k_today[:, z]
        if not np.all(np.diff(points) > 0):
            order = np.argsort(points, kind="stable")
            points, values = points[order], grid[order]
        else:
            values = grid
        out[:, z] = np.interp(grid, points, values, left=grid[0], right=grid[-1])
    return np.clip(out, grid[0], grid[-1])


def _endogenous_rule(grid: np.ndarray, k_today: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    """``rule(k) -> x`` (m, n_z): the method's own policy between grid points (linear along the endogenous grid)."""
    def rule(k: np.ndarray) -> np.ndarray:
        return _policy_on_grid_at(grid, k_today, np.asarray(k, dtype=np.float64).reshape(-1))

    return rule


def _policy_on_grid_at(grid: np.ndarray, k_today: np.ndarray, k: np.ndarray) -> np.ndarray:
    out = np.empty((k.size, k_today.shape[1]))
    for z in range(k_today.shape[1]):
        out[:, z] = np.interp(k, k_today[:, z], grid, left=grid[0], right=grid[-1])
    return out


def _policy_value(problem: Any, policy: np.ndarray, tolerance: float) -> np.ndarray:
    """``v_σ`` under the model's interpolation: evaluation steps until their span is far below the tolerance."""
    beta = problem.discount
    stop = 0.01 * tolerance * (1.0 - beta) / beta
    value = np.zeros(problem.n)
    total = 0
    while total < 1_000_000:
        value, done, span = problem.policy_steps(value, policy, 1000, stop)
        total += done
        if span <= stop:
            break
    return value
