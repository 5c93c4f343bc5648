"""When the endogenous grid method's policy is not the one to return (:mod:`worker.continuous.egm`).

The method (Carroll 2006) solves the first-order condition, which picks the best choice only in a
concave problem.  Before, a model that is not concave (a convex reward ``c**2/2``, say) ran its rounds
to the end, an endogenous grid that did not increase was sorted, and the method's policy was returned
up to the whole grid away from the best choice with no word said.  Three checks, each cheap:

* :func:`reward_disorder` — before the rounds: the reward must be concave in the define ``c`` (its
  marginal reward not rising) at the values ``c`` takes on the grid's points (each state with the
  choice at the grid's lower end and at the state itself, every shock point);
* in the rounds: the endogenous states must increase with the choice (the compiled reading of the
  endogenous grid fails where they do not; :func:`worker.continuous.egm_rounds.first_disorder` then
  names the shock point);
* :func:`marginal_disorder` — after the rounds: the expected marginal value of the last policy must
  not rise with the choice (:func:`~worker.continuous.egm_rounds.first_disorder`).

Where one fails the rounds are abandoned and :func:`searched` solves by the ordinary solver (Howard's
method, its search with the document's hints) from the solve's start (``solver.initial``, or zeros),
returning the search's policy, with a warning naming the shock point and the reason.  And where the
rounds pass but the method's policy ends
more than ``FAR_STEPS`` of the grid's largest step from the fitted problem's maximiser, the search's
policy is returned too, with a warning (:func:`far_warning`).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from worker.continuous.egm_rounds import first_disorder
from worker.euler_points import environment, marginal_at, slope_at

__all__ = ["FAR_STEPS", "disorder_warning", "far_warning", "marginal_disorder", "reward_disorder", "searched",
           "shock_point"]

FAR_STEPS = 1.0
"""The method's policy is not returned when it is farther than this many of the grid's largest steps from the
fitted problem's maximiser at the certified value (dimensionless).  On concave households the largest gap is
far below a step: 0.017 of it on the accuracy benchmark's at 200 and 1,000 points (``bench/bench_accuracy.py``,
gaps 0.017 and 0.0035), 0.026 on the tests' two-state household (120 points); on the convex ``c**2/2`` of
``tests/worker/test_egm_not_concave.py``, 29 steps (the whole grid; measured 2026-12-05)."""
_ROUNDING = 1e-9
"""A rise smaller than this share of the marginal reward (per unit elasticity) is rounding (dimensionless)."""


def shock_point(data: Any, z: int) -> str:
    """Shock point ``z`` in words, e.g. ``y=0.7``."""
    return ", ".join(f"{name}={float(data.shock_table[z, i]):g}" for i, name in enumerate(data.shocks)) \
        or "the only shock point"


def reward_disorder(data: Any, found: Any, grid: np.ndarray) -> tuple[int, str] | None:
    """``(shock point, reason)`` where the marginal reward rises with the define (the reward is not concave in
    it) at a value the define takes on the grid's points; None where it does not."""
    n_z = data.n_shocks
    shocks = data.shock_table[None, :, :]
    for x in (np.full((grid.size, n_z), grid[0]), np.broadcast_to(grid[:, None], (grid.size, n_z))):
        with np.errstate(all="ignore"):
            env = environment(data, found, grid[:, None], shocks, x)
            c = np.broadcast_to(np.asarray(env[found.define], dtype=np.float64), x.shape).copy()
            marginal = marginal_at(found, env, c, slope=False)
            rise = marginal_at(found, env, c, slope=True)
            bad = np.isfinite(rise) & np.isfinite(marginal) & (rise * np.abs(c) > _ROUNDING * np.abs(marginal)) \
                & (rise > 0.0)
        if bad.any():
            row, z = (int(i) for i in np.argwhere(bad)[0])
            return z, (f"the marginal reward rises with `{found.define}` (at {found.define} = {c[row, z]:.6g}): "
                       f"the reward is not concave in `{found.define}`")
    return None


def marginal_disorder(data: Any, found: Any, points: np.ndarray, tomorrow: np.ndarray) -> tuple[int, str] | None:
    """``(shock point, reason)`` where the expected marginal value of the policy ``tomorrow`` (read at the choices
    ``points``, (m, shock points)) rises with the choice; None where it does not."""
    shape = tomorrow.shape
    with np.errstate(all="ignore"):
        env = environment(data, found, points[:, None], data.shock_table[None, :, :], tomorrow)
        expected = slope_at(found.state_slope, env, shape) @ data.transition.T
    return first_disorder(np.broadcast_to(points[:, None], shape), expected)


def searched(problem: Any, solve_from: Any, report: dict[str, Any], warning: str, start: np.ndarray | None = None,
             **options: Any) -> Any:
    """The ordinary solver's outcome from ``start`` (the solve's own start: ``solver.initial``, or zeros), its
    policy returned, with ``warning``; ``report`` is the rounds' ``diagnostics.continuous_choice.endogenous_grid``
    (its ``greedy_gap`` 0: the policy reported is the search's)."""
    outcome = solve_from(problem, np.zeros(problem.n) if start is None else start, **options)
    outcome.warnings.append(warning)
    problem.egm_report = {**report, "greedy_gap": 0.0}
    problem.egm_rule = None
    return outcome


def disorder_warning(data: Any, disorder: tuple[int, str], rounds: int) -> str:
    """The warning of rounds abandoned at ``disorder`` (shock point, reason)."""
    where = f"after {rounds} round{'s' if rounds > 1 else ''}" if rounds else "before its rounds"
    return (f"solver.method endogenous_grid: {where}, at shock point {shock_point(data, disorder[0])}, "
            f"{disorder[1]}: the problem is not concave there, the first-order condition the method solves does "
            "not pick the best choice, so the method was not used: the value and policy are Howard's method's "
            "(its search, from solver.initial, or from zeros without one); "
            "diagnostics.continuous_choice.endogenous_grid.greedy_gap is 0 (the policy reported is the search's)")


def far_warning(gap: float, step: float) -> str:
    """The warning when the method's policy ends ``gap`` from the fitted problem's maximiser, past ``FAR_STEPS``
    grid steps (the largest ``step``)."""
    return (f"solver.method endogenous_grid: the method's policy ended {gap:.6g} from the fitted problem's best "
            f"choice, more than {FAR_STEPS:g} of the grid's largest step ({step:.6g}): the problem is probably not "
            "concave, so the policy reported is Howard's method's search at the certified value, not the method's; "
            "diagnostics.continuous_choice.endogenous_grid.greedy_gap is 0 (the policy reported is the search's)")
