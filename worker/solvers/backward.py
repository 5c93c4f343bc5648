"""Backward induction: a finite horizon solved by one Bellman step per period, from the terminal value.

With ``T`` periods, ``V_T`` the terminal value and ``β_t`` the discount of period ``t``::

    V_t(x) = max_c  r_t(x, c) + β_t · E[V_{t+1}(x') | x, c],    t = T−1, …, 0

Each step is the exact maximum over every allowed choice of period ``t`` (the compiled
problem's unrestricted :meth:`~worker.problem.CompiledProblem.bellman_step`, with that period's
params and discount in force), so ``V_t`` is the exact value of the (grid-restricted) problem
up to rounding: there is no fixed point to approach and no discount restriction but ``β_t ≥ 0``
(``β_t = 0``: a life table ending in a survival probability of 0; period t is then its best reward).

Error bound
-----------
The only error is the rounding of the steps.  A step adds at most its rounding allowance
``ρ_t = ROUNDING_ULPS · ε · max(‖V_t‖∞, ‖V_{t+1}‖∞)`` (the same per-step allowance the infinite-horizon
solvers use, before their ``1/(1 − β)`` factor), and an error ``e`` in ``V_{t+1}`` moves ``V_t`` by at
most ``β_t · e`` (a max of sums with non-negative weights ``β_t·p`` is 1-Lipschitz in them).  So
``e_t = ρ_t + β_t · e_{t+1}`` with ``e_T = 0``, and the reported error bound is ``max_t e_t``: a stated
allowance for float64 rounding, not a proof for every summation order, exactly as in the infinite case.

Hints
-----
With hints, each period runs the hinted search first and then the unrestricted step at the same
``V_{t+1}`` (on the fly, the hinted policy seeds its exact block search, which is what makes it
fast).  The value kept is always the unrestricted step's, so every period is verified where it is
made: an error in an early-solved period would otherwise propagate into every period before it,
and checking only at the end would cost another unrestricted step per period anyway.  A period
where the hinted search missed a better choice is counted in ``verification`` and warned about.

Progress, checkpoints, cancel
-----------------------------
One log entry per period (``iteration`` counts the periods done, ``period`` names the period,
``periods`` is ``T``);
``should_stop`` is polled before each period; a checkpoint (every ``checkpoint_s`` solving seconds)
holds the values and policies of the periods done, so a resumed solve continues with the next
period.  A time limit stops between periods with status ``time_limit``: the result then covers
the periods solved (the last ones).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

from worker.convergence_log import ConvergenceLog
from worker.defaults import DEFAULT_CHECKPOINT_S
from worker.errors import Canceled, InfeasibleModel
from worker.problem import CompiledProblem
from worker.solvers.outcome import EPS, ROUNDING_ULPS, Checkpoint, Entry

__all__ = ["METHOD", "HorizonOutcome", "PeriodPlan", "backward_induction", "period_step"]

METHOD = "backward_induction"
"""The method name a finite-horizon result reports (and its checkpoints carry)."""


@dataclass
class PeriodPlan:
    """What backward induction needs beyond the compiled problem.

    Attributes
    ----------
    periods : int
        ``T``.
    discounts : (T,) float64
        ``β_t``, each positive.
    terminal : (n,) float64
        ``V_T``.
    enter : callable
        ``enter(t)`` makes the problem's Bellman step that of period ``t`` (its params and discount).
    describe_point : callable
        ``describe_point(i)``: flat point ``i`` in words, for errors.
    stepper : object, optional
        Takes each period's step in place of the plain one (the endogenous grid method,
        :mod:`worker.egm_horizon`): ``step(t, after, verification, warnings) -> (V_t, policy)``,
        ``carry() -> dict`` of arrays saved with each checkpoint, ``resume(state, first_done) -> bool``
        (whether a checkpoint's carry restores it).
    check_policy : callable, optional
        ``check_policy(t, policy)`` after period ``t``'s step (the problem in period ``t``): raises on a policy
        the model refuses (a continuous choice's draw probabilities, :mod:`worker.continuous.draw_periods`).
    """

    periods: int
    discounts: np.ndarray
    terminal: np.ndarray
    enter: Callable[[int], None]
    describe_point: Callable[[int], str]
    stepper: Any = None
    check_policy: Callable[[int, np.ndarray], None] | None = None


@dataclass
class HorizonOutcome:
    """What :func:`backward_induction` returns.

    Attributes
    ----------
    first_period : int
        The first period solved (0 unless a time limit stopped the solve).
    values, policies : (T − first_period, n)
        ``V_t`` and the greedy policy of periods ``first_period .. T−1``, in that order.
    bounds : (T − first_period,) float64
        ``e_t``, the rounding allowance accumulated down to each period (see the module).
    """

    first_period: int
    values: np.ndarray
    policies: np.ndarray
    bounds: np.ndarray
    status: str
    log: list[Entry]
    seconds: float
    warnings: list[str] = field(default_factory=list)
    verification: dict[str, Any] | None = None
    resumed_from_iteration: int | None = None

    @property
    def error_bound(self) -> float:
        return float(self.bounds.max()) if self.bounds.size else 0.0


def backward_induction(
    problem: CompiledProblem,
    plan: PeriodPlan,
    *,
    time_limit_s: float | None = None,
    checkpoint_s: float | None = None,
    on_progress: Callable[[Entry], None] | None = None,
    checkpoint: Checkpoint | None = None,
    should_stop: Callable[[], bool] | None = None,
    fingerprint: str = "",
) -> HorizonOutcome:
    """Solve the periods from the last to the first; see the module for the rules."""
    T, n = plan.periods, problem.n
    values = np.empty((T, n))
    # Choice indices, or the chosen values of a continuous choice (float64), as the problem's steps give them.
    policies = np.empty((T, *getattr(problem, "policy_shape", (n,))),  # (n, 2): a continuous choice beside others
                        dtype=np.float64 if getattr(problem, "choose_at", None) is not None else np.int64)
    bounds = np.zeros(T)
    log: list[Entry] = ConvergenceLog()
    warnings: list[str] = []
    verification = {"periods": 0, "hints_held": True, "periods_broken": 0, "policy_changes": 0} \
        if problem.hints_active else None
    done, seconds_before, resumed = 0, 0.0, None
    state = checkpoint.load() if checkpoint is not None else None
    if _usable(state, fingerprint, T, n) and (
            plan.stepper is None or plan.stepper.resume(state, T - int(state["iteration"]))):
        done = int(state["iteration"])
        values[T - done:] = state["values"]
        policies[T - done:] = state["policies"]
        bounds[T - done:] = state["bounds"]
        log = ConvergenceLog(dict(entry) for entry in state["log"])
        warnings = list(state.get("warnings", []))
        verification = None if state.get("verification") is None else dict(state["verification"])
        seconds_before, resumed = float(state.get("seconds", 0.0)), done
    started = time.perf_counter()
    every = DEFAULT_CHECKPOINT_S if checkpoint_s is None else float(checkpoint_s)

    def elapsed() -> float:
        return seconds_before + time.perf_counter() - started

    last_save = elapsed()
    status = "converged"
    while done < T:
        if should_stop is not None and should_stop():
            raise Canceled(f"the solve was canceled after {done} of {T} periods", iteration=done, log=list(log))
        if time_limit_s is not None and elapsed() >= time_limit_s:
            status = "time_limit"
            break
        t = T - 1 - done
        after = plan.terminal if t == T - 1 else values[t + 1]
        plan.enter(t)
        if plan.stepper is not None:
            tv, policy = plan.stepper.step(t, after, verification, warnings)
        else:
            tv, policy = period_step(problem, plan, t, after, None if t == T - 1 else policies[t + 1],
                                      verification, warnings)
        if plan.check_policy is not None:
            plan.check_policy(t, policy)
        scale = max(float(np.abs(tv).max()), float(np.abs(after).max()))
        bounds[t] = ROUNDING_ULPS * EPS * scale + plan.discounts[t] * (0.0 if t == T - 1 else bounds[t + 1])
        values[t], policies[t] = tv, policy
        done += 1
        entry = {
            "iteration": done,
            "period": t,
            "periods": T,
            "distance": float(np.abs(tv - after).max()),
            "error_bound": float(bounds[t:].max()),
            "policy_changes": n if t == T - 1 else int(np.count_nonzero(
                (policy != policies[t + 1]).reshape(n, -1).any(axis=1))),
            "seconds": elapsed(),
        }
        log.append(entry)
        if on_progress is not None:
            on_progress(dict(entry))
        if checkpoint is not None and done < T and elapsed() - last_save >= every:
            last_save = elapsed()
            checkpoint.save({
                "fingerprint": fingerprint, "method": METHOD, "iteration": done, "periods": T,
                "values": values[T - done:].copy(), "policies": policies[T - done:].copy(),
                "bounds": bounds[T - done:].copy(), "log": list(log), "warnings": list(warnings),
                "verification": None if verification is None else dict(verification), "seconds": last_save,
                **({} if plan.stepper is None else plan.stepper.carry()),
            })
    if verification is not None:
        verification["seconds"] = elapsed()
    first = T - done
    return HorizonOutcome(
        first_period=first, values=values[first:], policies=policies[first:], bounds=bounds[first:], status=status,
        log=log, seconds=elapsed(), warnings=warnings, verification=verification, resumed_from_iteration=resumed,
    )


def period_step(
    problem: CompiledProblem, plan: PeriodPlan, t: int, after: np.ndarray, guess: np.ndarray | None,
    verification: dict[str, Any] | None, warnings: list[str],
) -> tuple[np.ndarray, np.ndarray]:
    """``V_t`` and its policy from ``V_{t+1}`` (``after``): the unrestricted step, seeded by the hinted one."""
    if verification is not None:
        hinted_v, hinted_policy = problem.bellman_step(after, restricted=True)
        hinted_v = np.array(hinted_v, dtype=np.float64)
        guess = hinted_policy
    tv, policy = problem.bellman_step(after, restricted=False, policy_guess=guess)
    tv = np.asarray(tv, dtype=np.float64)
    policy = np.asarray(policy)
    if not np.isfinite(tv).all():
        bad = np.flatnonzero(~np.isfinite(tv))
        raise InfeasibleModel.at(
            "model",
            f"in period {t} no choice is allowed, or every allowed choice's value is not finite, at {bad.size:,} "
            f"points (first: {plan.describe_point(int(bad[0]))}): the feasible conditions, the reward or the "
            "next period's value leave nothing to choose there",
        )
    if verification is not None:
        scale = max(float(np.abs(tv).max()), float(np.abs(after).max()))
        broken = int(np.count_nonzero(tv > hinted_v + ROUNDING_ULPS * EPS * scale))
        verification["periods"] += 1
        verification["policy_changes"] += int(np.count_nonzero(
            (policy != np.asarray(hinted_policy)).reshape(policy.shape[0], -1).any(axis=1)))
        if broken:
            if verification["hints_held"]:
                warnings.append(
                    f"the hints did not hold in period {t}: {broken} points found better choices outside the hinted "
                    "search; every period's value comes from the unrestricted step, so the answer is exact"
                )
            verification["hints_held"] = False
            verification["periods_broken"] += 1
    return tv, policy


def _usable(state: dict[str, Any] | None, fingerprint: str, periods: int, n: int) -> bool:
    """Whether a checkpoint belongs to this solve (same document, method and sizes)."""
    if not state or state.get("fingerprint") != fingerprint or state.get("method") != METHOD:
        return False
    done = int(state.get("iteration", -1))
    if state.get("periods") != periods or not 0 < done <= periods:
        return False
    values = np.asarray(state.get("values"))
    return values.shape == (done, n) and np.isfinite(values).all() and np.asarray(state.get("policies")).shape == (
        done, n)
