"""The endogenous grid method through a finite horizon: one step of it per period, each period certified.

With ``solver.method: endogenous_grid`` and ``model.horizon`` (a model of the method's form, see
:func:`worker.continuous.egm.conditions`), each period ``t`` of backward induction takes one round of
the method (Carroll 2006) instead of a search:

1. tomorrow's marginal value of the state at each choice point ``k'_j`` and shock point ``z'``: by the
   envelope condition ``∂r_{t+1}/∂k(k'_j, z', x_{t+1}(k'_j, z'))`` with period ``t + 1``'s params and
   policy; after the last period, the slope of the terminal value in the state (its expression
   differentiated; a terminal value that is not an expression of the state, or not differentiable in
   it, makes the last period a plain search step, and the method starts in the period before);
2. ``c*`` from the first-order condition ``∂r_t/∂c(c*) · ∂c/∂x = −β_t E_z[…]`` with period ``t``'s params
   and discount; where the expected marginal value is not positive, keeping more is worth nothing and
   the choice point is never an interior choice;
3. today's state ``k*_j`` with ``c(k*_j, z, k'_j) = c*``.

Period ``t``'s policy reads ``k'_j`` against ``k*_j`` linearly (the lower end below the first point:
the constraint binds); the choice points are the grid plus the bends of tomorrow's policy (where its
constraint starts to bind, and their images down to a strength of ``KINK_STRENGTH``), as in the
infinite-horizon method.

Certification: each period's value is the exact step of the fitted Bellman operator at ``V_{t+1}``
(:func:`worker.solvers.backward.period_step`, its search seeded by the method's policy), so the value
is exact for the fitted problem as with every horizon; the policy reported is the method's own.  Per
period ``greedy_gap`` is the largest distance between the two policies and ``value_gap`` the most the
method's policy loses against the fitted maximum in that period (``V_t − (r + β_t E V_{t+1})`` at the
method's choice, never negative beyond rounding).  The endogenous grids of every period are kept (and
saved with each checkpoint, so a resumed solve reads tomorrow's policy as an uninterrupted one does);
the Euler-equation errors use them.
"""

from __future__ import annotations

import dataclasses
import time
from typing import Any

import numpy as np

from worker import _slopes
from worker.continuous.egm import KINK_STRENGTH, _inverse_marginal, _kinks, _most_bends, _state_for
from worker.continuous.egm_rounds import first_disorder
from worker.errors import InvalidDocument
from worker.euler_points import environment, slope_at
from worker.expressions import parse
from worker.expressions.evaluator import evaluate_tree
from worker.expressions.nodes import Compare, children, names_in
from worker.solvers.backward import PeriodPlan, period_step

__all__ = ["EgmStepper", "KINK_STRENGTH", "egm_stepper"]


def egm_stepper(doc: Any, problem: Any, plan: PeriodPlan, terminal_given: bool) -> EgmStepper | None:
    """The stepper of a document with ``solver.method: endogenous_grid`` and a horizon, else None.

    ``terminal_given``: the value after the last period comes from ``solver.initial`` (numbers, whose slope
    is not known), not from ``model.horizon.terminal_value``.
    """
    if doc.solver.method != "endogenous_grid" or getattr(problem, "egm_form", None) is None:
        return None
    slope = None if terminal_given else _terminal_slope(doc, problem)
    stepper = EgmStepper(doc, problem, plan, None if slope is _KINKED else slope)
    stepper.terminal_kink = slope is _KINKED
    return stepper


_KINKED = np.zeros(0)
""":func:`_terminal_slope` of a terminal value with a kink in the state (no slope there)."""


def _terminal_slope(doc: Any, problem: Any) -> np.ndarray | None:
    """``∂V_T/∂k`` at every grid point and shock point, (grid, shocks); None when it cannot be differentiated."""
    from worker.document.horizon import PERIOD_NAME
    from worker.feasibility import period_params

    data = problem.model_data
    text = doc.model.horizon.terminal_value
    grid = data.state_grids[0]
    shape = (grid.size, data.n_shocks)
    if not isinstance(text, str):
        return np.zeros(shape)
    tree = parse(text, path="model.horizon.terminal_value").tree
    try:
        slope = _slopes.derivative(tree, data.states[0], {})
    except _slopes.NotSmooth:
        return None
    if _tests_state(slope, data.states[0]):
        return _KINKED  # a kink in the state (abs, min, max, clip): no slope there, and the method needs one
    env: dict[str, Any] = {name: value for name, value, raw in zip(
        data.params, period_params(doc.model, 0).tolist(), [*doc.model.params.values(), None])
        if not isinstance(raw, list)}
    env[PERIOD_NAME] = float(doc.model.horizon.periods)
    env[data.states[0]] = grid[:, None]
    env.update((name, data.shock_table[None, :, t]) for t, name in enumerate(data.shocks))
    with np.errstate(all="ignore"):
        values = np.broadcast_to(np.asarray(evaluate_tree(slope, env), dtype=np.float64), shape).copy()
    return values if np.isfinite(values).all() else None


def _tests_state(node: Any, state: str) -> bool:
    """Whether the tree ``node`` compares something that depends on ``state`` (the derivative of ``abs``,
    ``min``, ``max`` or ``clip`` of the state does: the value has a kink there)."""
    if isinstance(node, Compare) and state in names_in(node):
        return True
    return any(_tests_state(child, state) for child in children(node))


class EgmStepper:
    """Takes each period's step by one round of the method; see the module."""

    def __init__(self, doc: Any, problem: Any, plan: PeriodPlan, terminal_slope: np.ndarray | None) -> None:
        self.doc, self.problem, self.plan = doc, problem, plan
        self.found, self.c_slope = problem.egm_form
        self.data = problem.model_data
        self.grid = self.data.state_grids[0]
        self.terminal_slope = terminal_slope
        T, n_z = plan.periods, self.data.n_shocks
        # The most choice points a round has: the grid and the most bends kept.
        self.width = self.grid.size + _most_bends(self.grid)
        self.states = np.full((T, self.width, n_z), np.nan)  # k*_j per period (NaN: no point)
        self.points = np.full((T, self.width), np.nan)  # k'_j per period
        self.kinks: list[tuple[np.ndarray, np.ndarray, np.ndarray] | None] = [None] * T
        self.searched = np.zeros(T, dtype=bool)  # periods whose policy is the search's (no round possible)
        self.greedy_gap = np.zeros(T)
        self.value_gap = np.zeros(T)
        self.seconds = 0.0
        self.searched_policy = np.full(self.data.n, np.nan)  # the last period's policy when it was searched
        self.disorder = np.full(T, -1, dtype=np.int64)  # the shock point whose round failed the check (-1: none)
        self.disorder_reason: list[str] = [""] * T
        self.terminal_kink = False  # the terminal value has a kink in the state (the last period searched)

    def _period_data(self, t: int) -> Any:
        from worker.feasibility import period_params

        return dataclasses.replace(self.data, param_values=period_params(self.doc.model, t))

    def _pairs(self, t: int) -> tuple[np.ndarray, np.ndarray]:
        used = np.isfinite(self.points[t])
        return self.states[t][used], self.points[t][used]

    def rule(self, t: int) -> Any:
        """Period ``t``'s policy between grid points, ``rule(k) -> (m, shocks)`` (None: the period was searched)."""
        if self.searched[t]:
            return None
        pairs = self._pairs(t)
        return lambda k: _rule_at(self.grid, pairs, np.asarray(k, dtype=np.float64).reshape(-1))

    def step(self, t: int, after: np.ndarray, verification: Any, warnings: list[str]) -> tuple[np.ndarray, np.ndarray]:
        started = time.perf_counter()
        T, n_z = self.plan.periods, self.data.n_shocks
        grid = self.grid
        last = t == T - 1
        if (last and self.terminal_slope is None) or (not last and self.searched[t + 1] and t + 1 < T - 1):
            # No slope of the terminal value, or a later period fell back to the search (the round needs
            # tomorrow's policy from a round, or from the last period's search): this period is searched.
            tv, policy = period_step(self.problem, self.plan, t, after, None, verification, warnings)
            self.searched[t] = True
            if last:
                self.searched_policy = np.asarray(policy, dtype=np.float64).copy()
            self.seconds += time.perf_counter() - started
            return tv, np.asarray(policy, dtype=np.float64)
        today = self._period_data(t)
        kinks = None
        if not last and not self.searched[t + 1]:
            kinks = _kinks(grid, self._pairs(t + 1), self.kinks[t + 1], today.transition)
            self.kinks[t] = kinks
        points = grid if kinks is None else np.union1d(grid, kinks[0])
        shocks = today.shock_table[None, :, :]
        shape = (points.size, n_z)
        with np.errstate(all="ignore"):
            if last:
                marginal = np.column_stack([np.interp(points, grid, self.terminal_slope[:, z]) for z in range(n_z)])
            else:
                tomorrow = self._tomorrow(t + 1, points)
                env_next = environment(self._period_data(t + 1), self.found, points[:, None], shocks, tomorrow)
                marginal = slope_at(self.found.state_slope, env_next, shape)
            expected = marginal @ today.transition.T
            chosen = np.broadcast_to(points[:, None], shape)
            env_today = environment(today, self.found, points[:, None], shocks, chosen)
            target = -float(self.plan.discounts[t]) * expected / slope_at(self.found.define_slope, env_today, shape)
            interior = np.isfinite(target) & (target > 0)
            c_star = np.full(shape, np.nan)
            if interior.any():
                guess = np.broadcast_to(env_today[self.found.define], shape)
                c_star = _inverse_marginal(self.found, env_today, np.where(interior, guess, 1.0),
                                           np.where(interior, target, 1.0))
            c_star[~interior] = np.nan
            k_today = _state_for(today, self.found, self.c_slope, points, shocks, np.where(interior, c_star, 1.0))
        k_today[~interior] = np.nan
        disorder = first_disorder(k_today, expected)
        if disorder is not None:
            # The continuation is not concave here (a kink or a dip): the first-order condition has several
            # solutions, and the round's policy would not be the maximum.  The period is searched instead.
            tv, policy = period_step(self.problem, self.plan, t, after, None, verification, warnings)
            self.searched[t] = True
            self.disorder[t] = disorder[0]
            self.disorder_reason[t] = disorder[1]
            self.seconds += time.perf_counter() - started
            return tv, np.asarray(policy, dtype=np.float64)
        if points.size > self.width:
            raise RuntimeError(f"period {t}: {points.size} choice points, more than the {self.width} kept")
        self.states[t], self.points[t] = np.nan, np.nan
        self.states[t, :points.size], self.points[t, :points.size] = k_today, points
        policy = _rule_at(grid, (k_today, points), grid).reshape(-1)
        tv, greedy = period_step(self.problem, self.plan, t, after, policy, verification, warnings)
        try:
            own = self.problem.policy_step(after, policy)
        except ValueError as error:
            raise InvalidDocument.at("solver.method", f"in period {t} the endogenous grid method's policy is not "
                                     f"allowed by the model ({error}); use backward induction's search (drop "
                                     "solver.method)") from error
        if not np.isfinite(own).all():
            raise InvalidDocument.at("solver.method", f"in period {t} the endogenous grid method's policy has no "
                                     "finite value somewhere; use backward induction's search (drop solver.method)")
        self.greedy_gap[t] = float(np.abs(np.asarray(greedy, dtype=np.float64) - policy).max())
        self.value_gap[t] = float(np.max(tv - own))
        self.seconds += time.perf_counter() - started
        return tv, policy

    def _tomorrow(self, t: int, points: np.ndarray) -> np.ndarray:
        """Period ``t``'s choice at states ``points`` and every shock point, (m, shocks); the problem is left in
        period ``t − 1``."""
        rule = self.rule(t)
        if rule is not None:
            return rule(points)
        # The searched last period: its own search between the grid points, at the terminal value, in its params.
        self.plan.enter(t)
        try:
            return self.problem.policy_rule(self.plan.terminal, self.searched_policy)(points)
        finally:
            self.plan.enter(t - 1)

    def carry(self) -> dict[str, np.ndarray]:
        """Arrays saved with a checkpoint: every period's endogenous grid so far and which periods were searched."""
        return {
            "egm_states": self.states.copy(), "egm_points": self.points.copy(), "egm_searched": self.searched.copy(),
            "egm_gaps": np.stack([self.greedy_gap, self.value_gap]), "egm_searched_policy": self.searched_policy.copy(),
            "egm_disorder": self.disorder.copy(), "egm_disorder_reason": np.array(self.disorder_reason, dtype=str),
        }

    def resume(self, state: dict[str, Any], first_done: int) -> bool:
        arrays = [state.get(key) for key in ("egm_states", "egm_points", "egm_searched", "egm_gaps",
                                             "egm_searched_policy")]
        if any(not isinstance(a, np.ndarray) for a in arrays) or arrays[0].shape != self.states.shape:
            return False
        self.states, self.points, self.searched = arrays[0].copy(), arrays[1].copy(), arrays[2].astype(bool)
        self.greedy_gap, self.value_gap = arrays[3][0].copy(), arrays[3][1].copy()
        self.searched_policy = arrays[4].copy()
        disorder, reason, T = state.get("egm_disorder"), state.get("egm_disorder_reason"), self.plan.periods
        if isinstance(disorder, np.ndarray) and isinstance(reason, np.ndarray) and disorder.shape == (T,):
            self.disorder, self.disorder_reason = disorder.astype(np.int64), [str(r) for r in reason.tolist()]
        # The bends of each period are recomputed from the grids, in the order the solve made them.
        for t in range(self.plan.periods - 2, first_done - 1, -1):
            if not self.searched[t + 1]:
                self.kinks[t] = _kinks(self.grid, self._pairs(t + 1), self.kinks[t + 1],
                                       self._period_data(t).transition)
        return True

    def warnings(self, first: int) -> list[str]:
        """The warning of a solve whose rounds fell back to the search (none when every round held)."""
        failed = [t for t in range(first, self.plan.periods) if self.disorder[t] >= 0]
        kink = []
        if self.terminal_kink and self.searched[-1]:
            kink = [f"solver.method endogenous_grid: model.horizon.terminal_value has a kink in the state (abs, min, "
                    f"max or clip of it), where the method has no slope to use: the last period "
                    f"({self.plan.periods - 1}) was solved by backward induction's search"]
        if not failed:
            return kink
        t = failed[-1]
        shock = ", ".join(f"{name}={float(self.data.shock_table[self.disorder[t], i]):g}"
                          for i, name in enumerate(self.data.shocks)) or "the only shock point"
        earlier = f"; periods {first} to {t - 1} were searched too (a round needs tomorrow's policy from a " \
                  "round)" if t > first else ""
        return [f"solver.method endogenous_grid: in period {t}, at shock point {shock}, {self.disorder_reason[t]}: "
                "the continuation is not concave there (a kink or a dip, e.g. in model.horizon.terminal_value), the "
                "first-order condition has several solutions and the method's policy would not be the best choice, "
                f"so period {t} was solved by backward induction's search instead{earlier}; "
                "diagnostics.continuous_choice.endogenous_grid.searched_periods lists the searched periods", *kink]

    def report(self, first: int) -> dict[str, Any]:
        """``diagnostics.continuous_choice.endogenous_grid`` of a horizon."""
        rounds = [t for t in range(first, self.plan.periods) if not self.searched[t]]
        return {
            "periods": len(rounds),
            "searched_periods": [t for t in range(first, self.plan.periods) if self.searched[t]],
            "seconds": self.seconds,
            "greedy_gap": float(self.greedy_gap[first:].max()) if self.plan.periods > first else 0.0,
            "value_gap": float(self.value_gap[first:].max()) if self.plan.periods > first else 0.0,
            "greedy_gap_by_period": self.greedy_gap[first:].tolist(),
        }


def _rule_at(grid: np.ndarray, pairs: tuple[np.ndarray, np.ndarray], k: np.ndarray) -> np.ndarray:
    """The method's policy (m, shocks) at states ``k``: linear along each shock point's endogenous grid, the
    grid's lower end below its first point (the constraint binds) and the last interior choice past its last;
    the lower end everywhere when no choice point is interior."""
    states, choices = pairs
    out = np.empty((k.size, states.shape[1]))
    for z in range(states.shape[1]):
        used = np.isfinite(states[:, z])
        if not used.any():
            out[:, z] = grid[0]
            continue
        order = np.argsort(states[used, z], kind="stable")
        out[:, z] = np.interp(k, states[used, z][order], choices[used][order], left=grid[0])
    return np.clip(out, grid[0], grid[-1])
