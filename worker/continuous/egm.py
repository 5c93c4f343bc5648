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

While the moves shrink geometrically at a steady rate ``ρ`` (the ratios of
successive largest moves), the rounds *leap* (Aitken's extrapolation, every
``LEAP_EVERY`` rounds at most): the policy is moved on by ``move·ρ/(1 − ρ)``,
the rest of that geometric tail (:func:`_leap`, :class:`_Leaps`).  A leap is
not a round and the stopping rule is judged on rounds only, so the answer is
the same fixed point's: the policy returned is always a round's, and its move
is within the tolerance.  On the accuracy benchmark (7 income points) the
leaps cut the rounds from 378 to 299, 252 and 253 at 200, 1,000 and 5,000
points, and the policy ends as close to the fixed point as the stopping rule
promises (at 1,000 points 3.4e-9 from rounds run to 1e-14, against 1.3e-8
without leaps, the means of the Euler errors matching the fixed point's to
three decimals; at 200 points of the tests' seven-point household 2.6e-8
against 1.2e-8).  They do not always pay: on the tests' two-state household
they save 1 to 5 rounds of 200 to 400, and on a five-state chain (assets to
50, 150 points) they take 344 rounds against 337 (measured 2026-12-05).  The
slow part of the rounds is not a geometric tail but the bends of the policy,
carried one link of the chain of choices per round from where the constraint
binds up the grid; no leap shortens that, and neither did starting from
rounds on every fifth grid point (tried: 268 rounds on the grid instead of
378, the coarse rounds' bends then travelling up the fine grid the same way,
and no time saved with the coarse rounds counted).

Certification
-------------
The policy's value ``v_σ`` is computed under the model's interpolation
(Howard evaluation steps to a span far below the tolerance, from the value
the envelope condition gives up to a constant per shock point:
:func:`_envelope_value`), and then the
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
endogenous grid).  A problem that is not concave (a reward convex in the
define, endogenous states not rising, an expected marginal value rising with
the choice), or a policy ending more than ``FAR_STEPS`` grid steps from the
fitted maximiser, gets the search's policy instead, with a warning
(:mod:`worker.continuous.egm_checks`).
"""

from __future__ import annotations

import time
from typing import Any, Callable

import numpy as np

from worker import _slopes
from worker.continuous import egm_checks as checks
from worker.continuous.egm_rounds import bends, first_disorder, read_moved, union_sorted
from worker.continuous.egm_source import egm_kernel, power_law
from worker.continuous.interp_kernels import read_pairs
from worker.defaults import DEFAULT_MAX_ITERATIONS, DEFAULT_TOLERANCE
from worker.errors import InvalidDocument
from worker.euler_points import environment, invert, marginal_at, slope_at, subset
from worker.euler_setup import EulerSetup, setup, slope_trees
from worker.expressions import names_in
from worker.feasibility import ModelData

__all__ = ["KINK_MOST", "KINK_STRENGTH", "MAX_ROUNDS", "POLICY_TOLERANCE", "conditions", "endogenous_grid"]

POLICY_TOLERANCE = 1e-11
"""The iteration stops when no choice moves by more than this share of the grid's width."""
MAX_ROUNDS = 20_000
"""Most rounds of the iteration (count)."""
_NEWTON_STEPS = 60
KINK_STRENGTH = 0.01
"""Weakest bend of the policy added to the choices (dimensionless: a product of transition probabilities along
the chain of choices from where the lower end binds; see :func:`_kinks`).  Above 1, no bends are added.

On the accuracy benchmark's model at 1,000 points (``bench/bench_accuracy.py``, measured 2026-12-05) the worst
Euler error by this method's own rule was −4.20 with the three generations of bends kept before, −4.92 at a
strength of 0.03 (114 bends), −5.41 at 0.01 (321 bends) and −5.60 at 0.003: 0.01 buys a decade for about a
third more choice points."""
KINK_MOST = 1.0
"""The most bends a round adds, per grid point (dimensionless; the strongest are kept), so a round costs at
most about twice a round without bends whatever the shock chain."""
Bends = tuple[np.ndarray, np.ndarray, np.ndarray]
"""``(states, columns, strengths)`` of the bends of a policy: see :func:`_kinks`."""
_BEND_EVERY = 8
"""While the policy still moves by more than ``_BEND_NEAR`` times the stopping rule's tolerance, its bends are
found again every this many rounds only (count): they move with the policy, and a stale bend is only one
more choice point; near the end they are found every round, so the last round's choices hold the bends of the
policy before it.  On the accuracy benchmark at 1,000 points the rounds took 0.066 s finding them every
round, 0.056 s so (the same errors to three decimals; measured 2026-12-05)."""
_BEND_NEAR = 1e3
"""See ``_BEND_EVERY`` (dimensionless)."""
LEAP_EVERY = 10
"""Fewest rounds between two leaps (count; 0: no leaps); see :class:`_Leaps`."""
LEAP_STEADY = 0.03
"""Largest spread of the last three ratios of successive moves for a leap (dimensionless)."""
LEAP_MOST_RATE = 0.995
"""A leap needs the ratios of successive moves below this (dimensionless)."""
LEAP_MOST_GROWTH = 100.0
"""The rounds leap no more when the first move after a leap is more than this many times the one before it."""
_NO_BENDS: Bends = (np.zeros(0), np.zeros(0, dtype=np.int64), np.zeros(0))


def conditions(data: ModelData) -> tuple[EulerSetup | None, tuple[Any, dict] | None, str | None]:
    """``(setup, ∂c/∂k, None)`` when the method applies; else ``(None, None, reason)`` naming the failing condition."""
    if data.draws is not None:
        return None, None, ("it needs tomorrow's state and today's reward known at the choice, and this model has "
                            f"shocks drawn after it ({', '.join(f'`{n}`' for n in data.draws.names)}); the "
                            "first-order condition would hold only in expectation over the draws (solve with howard)")
    if len(data.choices) > 1:
        others = ", ".join(f"`{name}`" for j, name in enumerate(data.choices) if j != data.span_choice)
        return None, None, (f"it needs the continuous choice to be the model's only choice, and this model also "
                            f"has {others} (the method inverts one first-order condition; solve with howard, "
                            "which searches the continuous choice for each combination of the others)")
    if not any(j is not None for j in data.setter) or data.span is not None:
        return None, None, "it needs a continuous choice that is next_of the state (tomorrow's value of it)"
    if len(data.states) != 1:
        return None, None, f"it needs one state, and this model has {len(data.states)}"
    found = setup(data)
    if not isinstance(found, EulerSetup):
        reason = found or "it needs one state and one choice that sets tomorrow's value of it"
        return None, None, reason.replace("Euler-equation errors were not measured: ", "")
    state = found.state
    defines = {name: expr.tree for name, expr in data.source.defines}
    moving = set(slope_trees(defines, state))
    trees = [found.marginal, found.define_slope[0], *found.define_slope[1].values(),
             *(tree for pair in found.after.values() for tree in pair)]
    if any(names_in(tree) & (moving | {state}) - {found.define} for tree in trees):
        return None, None, (
            f"the marginal reward of `{found.define}` or its slope in the choice depends on today's state "
            f"`{state}`, so tomorrow's choice alone does not fix `{found.define}`")
    try:
        in_state = slope_trees(defines, state)
        c_slope = (_slopes.derivative(defines[found.define], state, in_state), in_state)
    except _slopes.NotSmooth as error:
        return None, None, f"`{found.define}` is not differentiable in the state ({error})"
    return found, c_slope, None


def endogenous_grid(problem: Any, found: EulerSetup, c_slope: tuple[Any, dict], solve_from: Callable[..., Any],
                    *, tolerance: float = DEFAULT_TOLERANCE, max_iterations: int = DEFAULT_MAX_ITERATIONS,
                    start: np.ndarray | None = None, **options: Any) -> Any:
    """Solve ``problem`` (a :class:`~worker.continuous.ContinuousProblem`) by the method; a certified outcome.

    ``solve_from(problem, v, **options)`` is the ordinary solver that certifies (Howard's method); ``start``
    (the solve's start, ``solver.initial`` or zeros) is where it searches from when the method is not used.
    """
    data = problem.model_data
    started = time.perf_counter()
    grid = data.state_grids[0]
    n_k, n_z = grid.size, data.n_shocks
    beta = problem.discount
    width = float(grid[-1] - grid[0])
    policy = np.full((n_k, n_z), grid[0])
    pairs: tuple[np.ndarray, np.ndarray] | None = None
    kinks: Bends | None = None
    c_star: np.ndarray | None = None
    rounds, change = 0, np.inf
    power = _power(data, found, grid)
    kernel, params = egm_kernel(data, found, c_slope, power)
    low = float(grid[0])
    scale = float(np.abs(grid).max())
    moved = np.empty((n_k, n_z))
    points, rows = grid, np.arange(n_k)
    tomorrow = np.full((n_k, n_z), low)
    previous: tuple[np.ndarray, np.ndarray] | None = None
    leaps = _Leaps()
    limit = min(max_iterations, MAX_ROUNDS)
    disorder = checks.reward_disorder(data, found, grid)
    with np.errstate(all="ignore"):
        while disorder is None and rounds < limit and change > POLICY_TOLERANCE * width:
            if c_star is None:
                c_star = np.full((points.size, n_z), np.nan)
            elif c_star.shape != (points.size, n_z):
                # The bends moved: carry each shock point's c* onto this round's choices.
                c_star = np.column_stack([np.interp(points, pairs[1], c_star[:, z]) for z in range(n_z)])
            k_today = np.empty((points.size, n_z))
            if not kernel(points, tomorrow, data.transition, beta, params, data.shock_table, power is not None,
                          c_star, k_today, scale):
                c_star, k_today = _numpy_round(data, found, c_slope, beta, points, tomorrow, c_star)
            if not np.isfinite(k_today).all():
                raise InvalidDocument.at("solver.method", "the endogenous grid method broke down: the first-order "
                                         "condition has no solution at some grid points; use howard")
            previous, pairs = pairs, (k_today, points)
            rounds += 1
            # The next round's choices (the grid and this policy's bends) and the policy read there; the policy on
            # the grid is among them, and its move from the last round's is the stopping rule's.
            if kinks is None or rounds % _BEND_EVERY == 0 or change <= _BEND_NEAR * POLICY_TOLERANCE * width:
                kinks = _bends(grid, pairs, kinks, data.transition)
                points, rows = union_sorted(grid, kinks[0]) if kinks[0].size else (grid, np.arange(n_k))
            tomorrow = np.empty((points.size, n_z))
            change = read_moved(k_today, pairs[1], low, float(grid[-1]), points, rows, policy, tomorrow, moved)
            if change < 0.0:  # an endogenous grid not increasing: the problem is not concave there
                disorder = first_disorder(k_today)
                if disorder is not None:
                    break
                tomorrow = _rule_at(grid, pairs, points, ordered=True)
                moved = np.ascontiguousarray(tomorrow[rows])
                change = float(np.abs(moved - policy).max())
            policy, moved = moved, policy
            going = change > POLICY_TOLERANCE * width and rounds < limit and previous is not None
            rate = leaps.rate(change) if going else None
            if rate is not None:
                tomorrow = _leap(grid, previous, points, tomorrow, rate)
                policy = np.ascontiguousarray(tomorrow[rows])
                moved = np.empty_like(policy)
    if disorder is None and rounds:
        disorder = checks.marginal_disorder(data, found, points, tomorrow)
    egm_seconds = time.perf_counter() - started
    report = {"rounds": rounds, "leaps": leaps.count, "last_change": change if change >= 0.0 else 0.0,
              "seconds": egm_seconds}
    if disorder is not None:
        warning = checks.disorder_warning(data, disorder, rounds)
        return checks.searched(problem, solve_from, report, warning, start, tolerance=tolerance,
                               max_iterations=max_iterations, **options)
    flat = np.ascontiguousarray(policy.reshape(-1))
    try:
        value = _policy_value(problem, flat, tolerance, _envelope_value(problem, found, grid, policy))
    except ValueError as error:
        raise InvalidDocument.at("solver.method", f"the endogenous grid method's policy is not allowed by the "
                                 f"model ({error}); use howard") from error
    outcome = solve_from(problem, value, tolerance=tolerance, max_iterations=max_iterations, **options)
    gap, step = float(np.abs(np.asarray(outcome.policy, dtype=np.float64) - flat).max()), float(np.diff(grid).max())
    if not gap <= checks.FAR_STEPS * step:  # the method's policy far from the best choice: the search's returned
        outcome.warnings.append(checks.far_warning(gap, step))
        problem.egm_report, problem.egm_rule = {**report, "greedy_gap": 0.0}, None
        return outcome
    problem.egm_report = {**report, "greedy_gap": gap}
    outcome.policy = flat
    problem.egm_rule = lambda k: _rule_at(grid, pairs, np.asarray(k, dtype=np.float64).reshape(-1))
    return outcome


class _Leaps:
    """When the rounds leap (Aitken's extrapolation): :meth:`rate`."""

    def __init__(self) -> None:
        self.moves: list[float] = []
        self.since = 0
        self.on = LEAP_EVERY > 0
        self.count = 0
        self.leapt_at = np.inf

    def rate(self, change: float) -> float | None:
        """Record a round's move (the largest move of a choice on the grid); the rate to leap with now, or None.

        A leap needs ``LEAP_EVERY`` rounds since the last, and the last three ratios of successive moves
        steady (within ``LEAP_STEADY`` of each other) and below ``LEAP_MOST_RATE``: the moves then shrink
        geometrically, and the policy's distance to the fixed point is about ``move·ρ/(1 − ρ)`` along the
        last move.  A leap moves the policy by the fast parts of the last move too, so the next rounds' moves
        may first grow; the rounds leap no more once the move, when a leap is due, is not below the move at
        the last leap (the leaps no longer pay), or the first move after a leap is more than
        ``LEAP_MOST_GROWTH`` times the one before it."""
        self.since += 1
        if self.since == 1 and self.count:
            self.on = self.on and change <= LEAP_MOST_GROWTH * self.leapt_at
        self.moves = [*self.moves[-3:], change]
        if not self.on or self.since < LEAP_EVERY or len(self.moves) < 4:
            return None
        rates = [after / before for before, after in zip(self.moves, self.moves[1:])]
        if not (all(0.0 < r < LEAP_MOST_RATE for r in rates) and max(rates) - min(rates) <= LEAP_STEADY):
            return None
        if not change < self.leapt_at:
            self.on = False
            return None
        self.since, self.leapt_at, self.count, self.moves = 0, change, self.count + 1, []
        return rates[-1]


def _leap(grid: np.ndarray, previous: tuple[np.ndarray, np.ndarray], points: np.ndarray, tomorrow: np.ndarray,
          rate: float) -> np.ndarray:
    """Aitken's leap: ``tomorrow`` (the policy at ``points``) moved on by the rest of a geometric tail of its last
    move (from the policy of the ``previous`` round's pairs) at ``rate``, ``move·rate/(1 − rate)``; not where the
    choice is at an end of the grid in either round (where the policy bends), and clipped to the grid."""
    low, high = float(grid[0]), float(grid[-1])
    earlier = _rule_at(grid, previous, points, ordered=True)
    free = (tomorrow > low) & (tomorrow < high) & (earlier > low) & (earlier < high)
    return np.clip(tomorrow + np.where(free, tomorrow - earlier, 0.0) * (rate / (1.0 - rate)), low, high)


def _power(data: ModelData, found: EulerSetup, grid: np.ndarray) -> tuple[float, float] | None:
    """``(A, p)`` when the marginal reward is ``A·c**p`` at every shock point (:func:`power_law`), else None."""
    found_laws = set()
    shocks = data.shock_table[None, :, :]
    for z in range(data.n_shocks):
        env = environment(data, found, grid[:1, None], shocks[:, z:z + 1, :], grid[:1, None])
        law = power_law(lambda c, env=env: marginal_at(found, {**env}, c[:, None], slope=False)[:, 0],
                        max(float(np.abs(env[found.define]).max()), 1.0))
        if law is None:
            return None
        found_laws.add(law)
    return found_laws.pop() if len(found_laws) == 1 else None


def _numpy_round(data: ModelData, found: EulerSetup, c_slope: tuple[Any, dict], beta: float, points: np.ndarray,
                 tomorrow: np.ndarray, c_star: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """One round in numpy (the kernel's twin, with bisection where Newton steps do not settle): ``(c*, k*)``."""
    shocks = data.shock_table[None, :, :]
    shape = (points.size, data.n_shocks)
    env_next = environment(data, found, points[:, None], shocks, tomorrow)
    expected = slope_at(found.state_slope, env_next, shape) @ data.transition.T
    env_today = environment(data, found, points[:, None], shocks, np.broadcast_to(points[:, None], shape))
    target = -beta * expected / slope_at(found.define_slope, env_today, shape)
    start = np.where(np.isfinite(c_star), c_star, np.broadcast_to(env_today[found.define], shape))
    c_star = _inverse_marginal(found, env_today, start, target)
    return c_star, _state_for(data, found, c_slope, points, shocks, c_star)


def _kinks(grid: np.ndarray, pairs: tuple[np.ndarray, np.ndarray], previous: Bends | None,
           transition: np.ndarray) -> Bends:
    """``(states, columns, strengths)`` where the method's policy bends, inside the grid, for the next round's
    choices: each bend's state, the shock point (column) whose policy bends there, and its strength.

    Strength 1: the states where the lower end starts to bind, for each shock
    point.  Tomorrow's policy in column ``z'`` bends there, so today's expected
    marginal value bends at that choice in every column ``z``, weighted by
    ``transition[z, z']``: today's policy bends at the state that chooses it,
    with the bend's strength times that probability — and so on, each weaker
    than the last.  A bend is kept while its strength is at least
    ``KINK_STRENGTH`` (at most ``KINK_MOST`` bends per grid point, the
    strongest).  With the bends among the choices the endogenous grid has a
    point on each, and reading it linearly is exact there.
    """
    states, choices = pairs
    n_z = states.shape[1]
    if KINK_STRENGTH > 1.0:
        return _NO_BENDS
    values, columns, strengths = [states[0]], [np.arange(n_z)], [np.ones(n_z)]
    if previous is not None and previous[0].size:
        earlier, column, strength = previous
        rows = np.minimum(np.searchsorted(choices, earlier), choices.size - 1)
        found = choices[rows] == earlier
        carried = strength[found, None] * transition[:, column[found]].T  # (bends found, n_z)
        keep = carried >= KINK_STRENGTH
        values.append(states[rows[found]][keep])
        columns.append(np.broadcast_to(np.arange(n_z), keep.shape)[keep])
        strengths.append(carried[keep])
    value, column, strength = np.concatenate(values), np.concatenate(columns), np.concatenate(strengths)
    inside = np.isfinite(value) & (value > grid[0]) & (value < grid[-1]) & ~np.isin(value, grid)
    value, column, strength = value[inside], column[inside], strength[inside]
    order = np.lexsort((-strength, column, value))
    value, column, strength = value[order], column[order], strength[order]
    first = np.ones(value.size, dtype=bool)
    first[1:] = (value[1:] != value[:-1]) | (column[1:] != column[:-1])
    value, column, strength = value[first], column[first], strength[first]
    most = _most_bends(grid)
    if value.size > most:
        strongest = np.argsort(-strength, kind="stable")[:most]
        strongest = strongest[np.argsort(value[strongest], kind="stable")]
        value, column, strength = value[strongest], column[strongest], strength[strongest]
    return value, column.astype(np.int64), strength


def _bends(grid: np.ndarray, pairs: tuple[np.ndarray, np.ndarray], previous: Bends | None,
           transition: np.ndarray) -> Bends:
    """:func:`_kinks`, compiled (:func:`worker.continuous.egm_rounds.bends`, the same answer)."""
    if KINK_STRENGTH > 1.0:
        return _NO_BENDS
    earlier, column, strength = previous if previous is not None else _NO_BENDS
    return bends(grid, pairs[0], pairs[1], earlier, column, strength, np.ascontiguousarray(transition),
                 KINK_STRENGTH, _most_bends(grid))


def _most_bends(grid: np.ndarray) -> int:
    """The most bends a round adds to the choices (count): ``KINK_MOST`` per grid point."""
    return int(KINK_MOST * grid.size)


def _rule_at(grid: np.ndarray, pairs: tuple[np.ndarray, np.ndarray], k: np.ndarray, *,
             ordered: bool = False) -> np.ndarray:
    """The method's policy (m, n_z) at states ``k`` (m,): linear along each shock point's endogenous grid;
    the grid's lower end below its first point (the constraint binds), its upper end past the last.
    ``ordered``: ``k`` is known to be sorted."""
    states, choices = pairs
    out = np.empty((k.size, states.shape[1]))
    if (ordered or np.all(k[1:] >= k[:-1])) and read_pairs(states, choices, grid[0], grid[-1], k, out):
        return out
    for z in range(states.shape[1]):
        order = np.argsort(states[:, z], kind="stable")
        out[:, z] = np.interp(k, states[order, z], choices[order], left=grid[0], right=grid[-1])
    return np.clip(out, grid[0], grid[-1])


def _inverse_marginal(found: EulerSetup, env: dict[str, Any], guess: np.ndarray, target: np.ndarray) -> np.ndarray:
    """The ``c`` with ``∂r/∂c(c) = target``: Newton steps on the logarithms (exact in one step for a marginal
    reward that is a power of ``c``, as CRRA and log rewards have), :func:`worker.euler_points.invert` where the
    marginal reward or the target is not positive or a step does not settle."""
    c = np.where(np.isfinite(guess) & (guess > 0), guess, 1.0)
    settled = np.zeros(c.shape, dtype=bool)
    for _ in range(_NEWTON_STEPS):
        marginal = marginal_at(found, env, c, slope=False)
        elasticity = c * marginal_at(found, env, c, slope=True) / marginal
        step = (np.log(marginal) - np.log(target)) / elasticity
        usable = np.isfinite(step)
        c = np.where(usable, c * np.exp(-np.clip(step, -50.0, 50.0)), c)
        settled = usable & (np.abs(step) <= 4 * np.finfo(float).eps)
        if settled.all():
            return c
    rest = ~settled
    c[rest] = invert(found, subset(env, rest), c[rest], target[rest]) if rest.any() else c[rest]
    return c


def _state_for(data: ModelData, found: EulerSetup, c_slope: tuple[Any, dict], points: np.ndarray,
               shocks: np.ndarray, c_star: np.ndarray) -> np.ndarray:
    """Today's state ``k*`` (m, n_z) at which the define equals ``c_star`` with the choice at ``points`` (m,)."""
    k = np.broadcast_to(points[:, None], c_star.shape).copy()
    x = np.broadcast_to(points[:, None], c_star.shape)
    scale = float(np.abs(points).max())

    def at(k: np.ndarray) -> tuple[dict[str, Any], np.ndarray]:
        env = environment(data, found, k, shocks, x)
        return env, np.broadcast_to(env[found.define], c_star.shape) - c_star

    env, gap = at(k)
    for _ in range(_NEWTON_STEPS):
        step = gap / slope_at(c_slope, env, c_star.shape)
        moved, (env_moved, gap_moved) = k - step, at(k - step)
        # A step that leaves the define's domain (below 0 for k**alpha: Newton's tangent overshoots a concave
        # define from above) is halved until it lands inside; from below the steps then approach k* monotonely.
        for _ in range(_NEWTON_STEPS):
            outside = ~np.isfinite(gap_moved) & np.isfinite(gap) & np.isfinite(step)
            if not outside.any():
                break
            step = np.where(outside, 0.5 * step, step)
            moved, (env_moved, gap_moved) = k - step, at(k - step)
        k, env, gap = moved, env_moved, gap_moved
        if np.all(np.abs(step) <= 4 * np.finfo(float).eps * (np.abs(k) + scale)):
            break
    return k


def _envelope_value(problem: Any, found: EulerSetup, grid: np.ndarray, policy: np.ndarray) -> np.ndarray | None:
    """A start for :func:`_policy_value` (n,): the policy's value up to a constant per shock point by the envelope
    condition (its slope in the state is ``∂r/∂k`` at the policy, integrated along the grid by trapezoids), the
    constants those that make one evaluation step's mean move at each shock point vanish for a move constant in
    the state (``(I − β P) c = mean move``); None where it is not finite."""
    data = problem.model_data
    beta = problem.discount
    with np.errstate(all="ignore"):
        env = environment(data, found, grid[:, None], data.shock_table[None, :, :], policy)
        slope = slope_at(found.state_slope, env, policy.shape)
        value = np.zeros(policy.shape)
        value[1:] = np.cumsum(0.5 * (slope[1:] + slope[:-1]) * np.diff(grid)[:, None], axis=0)
        if not np.isfinite(value).all():
            return None
        flat = np.ascontiguousarray(value.reshape(-1))
        moved = (problem.policy_step(flat, np.ascontiguousarray(policy.reshape(-1))) - flat).reshape(policy.shape)
        constants = np.linalg.solve(np.eye(data.n_shocks) - beta * data.transition, moved.mean(axis=0))
        start = np.ascontiguousarray((value + constants).reshape(-1))
    return start if np.isfinite(start).all() else None


def _policy_value(problem: Any, policy: np.ndarray, tolerance: float, start: np.ndarray | None = None) -> np.ndarray:
    """``v_σ`` under the model's interpolation: evaluation steps from ``start`` (or zeros) until the span of their
    move is within ``0.01·tolerance·(1 − β)/β`` (the step's MacQueen–Porteus bracket within 1% of the tolerance).

    Only the solver's start: its own bound certifies.  On the accuracy benchmark at 1,000 points, 460 steps
    from zeros, 313 from the envelope condition's value (:func:`_envelope_value`).  Stopping at the tolerance's
    own span (237 steps) saved 2 ms there, but at 5,000 points the solver's second iteration then missed the
    tolerance by 5% (1.05e-8 against 9.9e-9) and it took a third (measured 2026-12-05)."""
    beta = problem.discount
    stop = 0.01 * tolerance * (1.0 - beta) / beta
    value = np.zeros(problem.n) if start is None else start
    total = 0
    while total < 1_000_000:
        value, done, span = problem.policy_steps(value, policy, 1000, stop)
        total += done
        if span <= stop:
            break
    return value
